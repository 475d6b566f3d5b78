"""The shard file: one estimator's estimates from one job, as Parquet with provenance.

A shard holds the rows of one scenario x estimator x range of seed blocks
(``SHARD_SCHEMA``) and carries in its footer the spec and code hashes that
decide its numbers, the versions that ran it and its wall time. This module
writes shards (streamed a row group at a time to a temporary name, then moved
into place), verifies them and says whether an existing one still stands.
"""

from __future__ import annotations

import json
import os
import platform
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Mapping

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import scipy

from estbench import __version__
from estbench.core.files import remove_leftovers, temporary_name
from estbench.core.hashing import code_hash, short_hash
from estbench.simulate import plugins
from estbench.simulate.estimator import FIELDS, STATUS_OK, BlockResult

#: Arrow schema of every shard and of the store's ``estimates`` table.
SHARD_SCHEMA = pa.schema([
    ("scenario", pa.string()),
    ("estimator", pa.string()),
    ("block", pa.int64()),
    ("rep", pa.int64()),
    *[(name, pa.float64()) for name in FIELDS],
    ("status", pa.string()),
    ("message", pa.string()),
])
METADATA_KEY = b"estbench"
#: Rows per Parquet row group: large enough for fast scans, small enough to stream.
ROW_GROUP_ROWS = 65_536
UP_TO_DATE = "up to date"
MISSING = "missing"
DAMAGED = "damaged: "  #: prefix of the reason, followed by what is wrong


def versions() -> dict:
    """Versions that decide the bit streams and the numbers."""
    return {"estbench": __version__, "numpy": np.__version__, "scipy": scipy.__version__,
            "pyarrow": pa.__version__, "python": platform.python_version()}


class ShardProblem(ValueError):
    """A shard file is unreadable, truncated, fails its page checksums or has the wrong rows."""


def spec_hash(spec: Mapping) -> str:
    """Hash of everything that decides a shard's numbers except which blocks it holds."""
    core = {k: v for k, v in spec.items() if k not in ("first_block", "n_blocks")}
    return short_hash(core)


def verify_shard(path: Path | str, full: bool = True) -> dict:
    """Metadata of a sound shard; ``ShardProblem`` saying what is wrong otherwise.

    The quick check reads the footer and metadata only; the full check also
    reads every page, a row group at a time, verifying the CRC page checksums
    written with it.
    """
    try:
        handle = pq.ParquetFile(path, page_checksum_verification=True)
        meta = json.loads((handle.metadata.metadata or {})[METADATA_KEY])
        rows = handle.metadata.num_rows
        if full:
            for i in range(handle.num_row_groups):
                handle.read_row_group(i)
    except Exception as exc:
        raise ShardProblem(f"unreadable ({type(exc).__name__}: {str(exc).splitlines()[0][:160]})") from None
    # Readers may take names from the Parquet schema or from the stored Arrow schema: check both.
    columns = handle.schema_arrow.remove_metadata()
    if not columns.equals(SHARD_SCHEMA) or handle.schema.names != SHARD_SCHEMA.names:
        raise ShardProblem(f"has columns {handle.schema.names}, expected {SHARD_SCHEMA.names}")
    expected = meta["n_blocks"] * meta["block_size"]
    if rows != expected or meta["rows"] != expected:
        raise ShardProblem(f"holds {rows} rows, expected {expected}")
    return meta


def read_metadata(path: Path | str) -> dict:
    """The provenance a shard carries in its Parquet metadata."""
    return verify_shard(path, full=False)


def read_block(path: Path | str, block: int) -> pa.Table:
    """The rows of one seed block of an existing shard (to keep them in a grown one)."""
    return pq.read_table(path, filters=[("block", "=", block)], schema=SHARD_SCHEMA).replace_schema_metadata(None)


@dataclass(frozen=True)
class ShardState:
    """Whether an existing shard stands as it is, and which of its blocks can be kept."""

    reason: str                     #: UP_TO_DATE, or why the shard must be (re)computed
    keep: frozenset = frozenset()   #: blocks of the existing file that are still valid

    @property
    def current(self) -> bool:
        return self.reason == UP_TO_DATE


def shard_state(path: Path | str, spec: Mapping, code: str) -> ShardState:
    """Compare the shard at *path* with the *spec* and estimator *code* hash it must have."""
    path = Path(path)
    if not path.exists():
        return ShardState(MISSING)
    try:
        meta = verify_shard(path, full=False)
    except ShardProblem as exc:
        return ShardState(f"{DAMAGED}{exc}")
    if meta.get("code_hash") != code:
        return ShardState("estimator code changed")
    if meta.get("spec_hash") != spec_hash(spec) or meta["first_block"] != spec["first_block"]:
        return ShardState("settings changed")
    old = range(meta["first_block"], meta["first_block"] + meta["n_blocks"])
    new = range(spec["first_block"], spec["first_block"] + spec["n_blocks"])
    if old == new:
        return ShardState(UP_TO_DATE)
    try:
        verify_shard(path)  # its blocks are copied: every page must be sound
    except ShardProblem as exc:
        return ShardState(f"{DAMAGED}{exc}")
    return ShardState("more blocks" if len(new) > len(old) else "fewer blocks",
                      keep=frozenset(old).intersection(new))


def estimator_code_hash(function: str, search_dirs) -> str:
    """Hash of an estimator's code: its module and the same-folder helpers it imports."""
    return code_hash(plugins.code_files(function, search_dirs))


# Arrays are built from their buffers: pyarrow's general converter (``pa.array``)
# imports pandas on first use, which costs every job about 0.4 CPU-seconds and 45 MB.
def _numbers(values: np.ndarray, dtype, arrow_type: pa.DataType) -> pa.Array:
    values = np.ascontiguousarray(values, dtype=dtype)
    return pa.Array.from_buffers(arrow_type, len(values), [None, pa.py_buffer(values)])


def _strings(values) -> pa.Array:
    """A string array from Python strings and ``None``s."""
    encoded = [b"" if v is None else str(v).encode() for v in values]
    offsets = np.zeros(len(encoded) + 1, np.int32)
    np.cumsum([len(b) for b in encoded], out=offsets[1:])
    valid = np.fromiter((v is not None for v in values), bool, len(encoded))
    nulls = len(encoded) - int(valid.sum())
    bitmap = pa.py_buffer(np.packbits(valid, bitorder="little")) if nulls else None
    return pa.Array.from_buffers(pa.string(), len(encoded),
                                 [bitmap, pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))],
                                 null_count=nulls)


@lru_cache(maxsize=64)
def _repeated(value: str | None, reps: int) -> pa.Array:
    return _strings([value] * reps)


def block_table(scenario: str, estimator: str, block: int, reps: int, result: BlockResult) -> pa.Table:
    """The rows of one estimator on one seed block."""
    cols = [_repeated(scenario, reps), _repeated(estimator, reps),
            _numbers(np.full(reps, block), np.int64, pa.int64()),
            _numbers(np.arange(block * reps, (block + 1) * reps), np.int64, pa.int64())]
    for name in FIELDS:
        values = result.columns[name]
        cols.append(pa.nulls(reps, pa.float64()) if values is None
                    else _numbers(values, np.float64, pa.float64()))
    if (result.status == STATUS_OK).all():
        cols += [_repeated(STATUS_OK, reps), _repeated(None, reps)]
    else:
        cols += [_strings(result.status), _strings(result.message)]
    return pa.Table.from_arrays(cols, schema=SHARD_SCHEMA)


class ShardWriter:
    """Streams one shard to ``<out>.tmp-<pid>`` in row groups; ``commit`` moves it to *out*."""

    def __init__(self, out: Path | str):
        self.out = Path(out)
        self.tmp = temporary_name(self.out)
        self.rows = 0
        self._parts: list[pa.Table] = []
        self._buffered = 0
        self._writer: pq.ParquetWriter | None = None

    @property
    def total_rows(self) -> int:
        """Rows written so far, flushed or not."""
        return self.rows + self._buffered

    def write(self, table: pa.Table) -> None:
        self._parts.append(table)
        self._buffered += table.num_rows
        while self._buffered >= ROW_GROUP_ROWS:
            self._flush(ROW_GROUP_ROWS)

    def _flush(self, rows: int | None = None) -> None:
        """Write *rows* buffered rows (all if None) as one row group."""
        if self._writer is None:
            self.out.parent.mkdir(parents=True, exist_ok=True)
            remove_leftovers(self.out)  # from a killed job
            self._writer = pq.ParquetWriter(self.tmp, SHARD_SCHEMA, compression="zstd",
                                            write_page_checksum=True)
        if not self._buffered:
            return
        buffered = pa.concat_tables(self._parts)
        rows = self._buffered if rows is None else rows
        self._writer.write_table(buffered.slice(0, rows), row_group_size=rows)
        rest = buffered.slice(rows)
        self._parts, self._buffered = ([rest] if rest.num_rows else []), rest.num_rows
        self.rows += rows

    def commit(self, metadata: Mapping) -> None:
        """Finish the file with *metadata* in its footer and move it into place."""
        self._flush()
        self._writer.add_key_value_metadata({METADATA_KEY.decode(): json.dumps(metadata, sort_keys=True)})
        self._writer.close()
        self._writer = None
        os.replace(self.tmp, self.out)

    def discard(self) -> None:
        """Drop an uncommitted file (after an error)."""
        if self._writer is not None:
            self._writer.close()
            self._writer = None
        self.tmp.unlink(missing_ok=True)


def write_atomic(table: pa.Table, out: Path, metadata: Mapping) -> None:
    """Write *table* with *metadata* as a shard at *out*, atomically."""
    writer = ShardWriter(out)
    try:
        writer.write(table)
        writer.commit(metadata)
    finally:
        writer.discard()
