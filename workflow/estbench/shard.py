"""One simulation job: a scenario x range of seed blocks -> one Parquet shard per estimator.

The job spec is plain JSON (built by ``jobs.job_spec``), so a job needs neither
the study file nor Snakemake::

    python -m estbench.shard --spec JSON --search-dir D --results results/<study> --record PATH

Each seed block is drawn once and handed to every estimator whose shard needs
it: comparisons stay paired and the draw is paid once. A shard already made by
the same spec and code is left untouched (bytes and mtime); one whose range
grew keeps the blocks it has. Shards are streamed to temporary files a row
group at a time, so memory does not grow with the replicate count, and moved
into place with ``os.replace``. The job record is written last: a killed job
leaves neither a partial shard nor a record of work it did not finish.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import platform
import resource
import sys
import time
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Callable, Iterator, Mapping

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import scipy

from . import __version__, plugins
from .dgms import build_dgm
from .estimator import FIELDS, STATUS_OK, BlockResult, apply_to_block
from .jobs import estimator_specs, job_of, shards_of_job
from .scenarios import canonical_json
from .seeding import block_generator, estimator_generator

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
    return hashlib.sha256(canonical_json(core).encode()).hexdigest()[:16]


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


@dataclass
class ShardTask:
    """One estimator's part of a job: its spec, callable, code hash and shard."""

    spec: dict
    fn: Callable
    code: str
    out: Path | None
    state: ShardState
    seconds: float = 0.0

    def __post_init__(self):
        self.takes_level = plugins.accepts(self.fn, "level")
        self.takes_rng = plugins.accepts(self.fn, "rng")

    @property
    def name(self) -> str:
        return self.spec["estimator"]["name"]

    def kwargs(self, block: int) -> dict:
        """Keyword arguments of the estimator on *block*: its args, level and own stream."""
        kwargs = dict(self.spec["estimator"].get("args", {}))
        if self.takes_level:
            kwargs["level"] = self.spec["level"]
        if self.takes_rng:
            scen = self.spec["scenario"]
            kwargs["rng"] = estimator_generator(self.spec["seed"], scen["spawn_key"], block, self.name)
        return kwargs


def estimator_code_hash(function: str, search_dirs) -> str:
    """Hash of an estimator's code: its module and the same-folder helpers it imports."""
    return plugins.code_hash(plugins.code_files(function, search_dirs))


def shard_tasks(job: Mapping, search_dirs, outputs: Mapping[str, Path] | None = None,
                codes: Mapping[str, str] | None = None) -> list[ShardTask]:
    """The job's shards, each with the state of its existing file in *outputs* (if any).

    *codes* maps estimator functions to their code hash, if already computed.
    """
    tasks = []
    for spec in estimator_specs(job):
        function = spec["estimator"]["function"]
        code = codes[function] if codes else estimator_code_hash(function, search_dirs)
        out = Path(outputs[spec["estimator"]["name"]]) if outputs else None
        state = shard_state(out, spec, code) if out else ShardState(MISSING)
        tasks.append(ShardTask(spec, plugins.resolve(function, search_dirs), code, out, state))
    return tasks


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


def iter_block_tables(job: Mapping, search_dirs, tasks: list[ShardTask],
                      timing: dict | None = None) -> Iterator[tuple[ShardTask, pa.Table]]:
    """(task, rows of one block) for every block of the job and every task, in block order.

    A block is drawn once, and only if some task needs it computed; blocks a
    task keeps are copied from its existing shard.
    """
    scen, seed, reps = job["scenario"], job["seed"], job["block_size"]
    dgm = build_dgm(scen["dgm"], tuple(search_dirs), seed)
    timing = {} if timing is None else timing
    timing.setdefault("draw", 0.0)
    for block in range(job["first_block"], job["first_block"] + job["n_blocks"]):
        data = None
        for task in tasks:
            if block in task.state.keep:
                yield task, pq.read_table(task.out, filters=[("block", "=", block)],
                                          schema=SHARD_SCHEMA).replace_schema_metadata(None)
                continue
            if data is None:
                start = time.perf_counter()
                data = dgm.draw(block_generator(seed, scen["spawn_key"], block), reps, scen["n"])
                timing["draw"] += time.perf_counter() - start
            start = time.perf_counter()
            result = apply_to_block(task.fn, data, reps, task.kwargs(block))
            table = block_table(scen["key"], task.name, block, reps, result)
            task.seconds += time.perf_counter() - start
            yield task, table


def compute_shard(spec: Mapping, search_dirs) -> pa.Table:
    """The rows of one shard, computed in memory (for tests and notebooks)."""
    job = job_of([spec])
    return pa.concat_tables([t for _, t in iter_block_tables(job, search_dirs, shard_tasks(job, search_dirs))])


class ShardWriter:
    """Streams one shard to ``<out>.tmp-<pid>`` in row groups; ``commit`` moves it to *out*."""

    def __init__(self, out: Path | str):
        self.out = Path(out)
        self.tmp = self.out.with_name(f"{self.out.name}.tmp-{os.getpid()}")
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
            for leftover in self.out.parent.glob(f"{self.out.name}.tmp-*"):  # from a killed job
                leftover.unlink(missing_ok=True)
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


def _max_rss_mb() -> float:
    return round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1)


def shard_metadata(task: ShardTask, rows: int, seconds: float) -> dict:
    """Provenance a shard carries in its footer."""
    spec, scen = task.spec, task.spec["scenario"]
    return {
        "spec_hash": spec_hash(spec),
        "reused_blocks": len(task.state.keep),
        "seed": str(spec["seed"]),
        "scenario": scen["key"],
        "scenario_spawn_key": str(scen["spawn_key"]),  # block b uses spawn_key=(this, b)
        "estimator": task.name,
        "function": spec["estimator"]["function"],
        "code_hash": task.code,
        "first_block": spec["first_block"],
        "n_blocks": spec["n_blocks"],
        "block_size": spec["block_size"],
        "rows": rows,
        "versions": versions(),
        "seconds": round(seconds, 6),
        "max_rss_mb": _max_rss_mb(),
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }


def run_job(job: Mapping, search_dirs, outputs: Mapping[str, Path]) -> dict:
    """Bring every shard of *job* (estimator name -> path in *outputs*) up to date.

    Shards that are up to date are not touched. Returns the job record: what
    was done to each shard and why, and the time spent drawing and estimating.
    """
    start = time.perf_counter()
    tasks = shard_tasks(job, search_dirs, outputs)
    todo = [t for t in tasks if not t.state.current]
    timing = {"draw": 0.0}
    writers = {t.name: ShardWriter(t.out) for t in todo}
    try:
        if todo:
            for task, table in iter_block_tables(job, search_dirs, todo, timing):
                writers[task.name].write(table)
            # Each shard is charged its own estimator time plus an even share of the draw.
            draw_share = timing["draw"] / len(todo)
            for task in todo:
                writer = writers[task.name]
                writer.commit(shard_metadata(task, writer.total_rows, task.seconds + draw_share))
    finally:
        for writer in writers.values():
            writer.discard()
    return {
        "scenario": job["scenario"]["key"],
        "first_block": job["first_block"],
        "n_blocks": job["n_blocks"],
        "block_size": job["block_size"],
        "shards": {t.name: {"path": str(t.out), "action": "kept" if t.state.current else "computed",
                            "reason": t.state.reason, "reused_blocks": len(t.state.keep),
                            "estimator_seconds": round(t.seconds, 6)} for t in tasks},
        "draw_seconds": round(timing["draw"], 6),
        "seconds": round(time.perf_counter() - start, 6),
        "max_rss_mb": _max_rss_mb(),
        "versions": versions(),
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }


def run_shard(spec: Mapping, search_dirs, out: Path) -> dict:
    """Bring one shard up to date on its own (a job of one estimator); return its provenance."""
    run_job(job_of([spec]), search_dirs, {spec["estimator"]["name"]: out})
    return read_metadata(out)


def write_record(record: Mapping, path: Path | str) -> None:
    """Write the job record atomically."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f"{path.name}.tmp-{os.getpid()}")
    tmp.write_text(json.dumps(record, indent=1, sort_keys=True) + "\n")
    os.replace(tmp, path)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m estbench.shard",
                                     description="Run one simulation job (used by the workflow).")
    parser.add_argument("--spec", required=True, help="job spec as JSON")
    parser.add_argument("--search-dir", action="append", default=[],
                        help="folder searched for estimator modules (repeatable)")
    parser.add_argument("--results", required=True, type=Path, help="the study's results folder")
    parser.add_argument("--record", required=True, type=Path, help="job record to write when done")
    args = parser.parse_args(argv)
    job = json.loads(args.spec)
    record = run_job(job, args.search_dir, shards_of_job(args.results, job))
    write_record(record, args.record)
    done = [f"{name} ({s['reason']})" for name, s in record["shards"].items() if s["action"] == "computed"]
    kept = [name for name, s in record["shards"].items() if s["action"] == "kept"]
    print(f"{args.record}: computed {', '.join(done) or 'nothing'}; kept {', '.join(kept) or 'nothing'}; "
          f"{record['n_blocks'] * record['block_size']} replicates in {record['seconds']:.2f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
