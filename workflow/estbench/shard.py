"""One shard: a scenario x estimator x range of seed blocks -> one Parquet file.

The job spec is plain JSON (built by ``jobs.shard_spec``), so a shard job needs
neither the study file nor Snakemake: ``python -m estbench.shard --spec JSON
--search-dir D --out PATH``. The file is written under a temporary name and
moved into place with ``os.replace``, so a killed job never leaves a partial
shard under the final name.
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
from pathlib import Path
from typing import Mapping

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import scipy

from . import __version__, plugins
from .dgms import build_dgm
from .estimator import FIELDS, apply_to_block
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
    reads every page, verifying the CRC page checksums written with it.
    """
    try:
        handle = pq.ParquetFile(path, page_checksum_verification=True)
        meta = json.loads((handle.schema_arrow.metadata or {})[METADATA_KEY])
        rows = handle.metadata.num_rows
        if full:
            handle.read()
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


def _reusable(out: Path, spec: Mapping, code: str) -> pa.Table | None:
    """Rows of an existing shard made by the same spec and code (e.g. before
    ``replicates`` grew, or before a kill), else None."""
    if not out.exists():
        return None
    try:
        meta = verify_shard(out)
    except ShardProblem:
        return None
    if (meta.get("spec_hash") != spec_hash(spec) or meta.get("code_hash") != code
            or meta["first_block"] != spec["first_block"]):
        return None
    return pq.read_table(out)


def compute_shard(spec: Mapping, search_dirs, reuse: pa.Table | None = None) -> pa.Table:
    """Draw each seed block of the shard once and apply the estimator to it.

    Blocks already in *reuse* (same spec and code) are taken from it, not redrawn.
    """
    scen, est = spec["scenario"], spec["estimator"]
    fn = plugins.resolve(est["function"], search_dirs)
    dgm = build_dgm(scen["dgm"], tuple(search_dirs), spec["seed"])
    reps, n, seed = spec["block_size"], scen["n"], spec["seed"]
    wants_rng, wants_level = plugins.accepts(fn, "rng"), plugins.accepts(fn, "level")
    parts = []
    have = set(reuse.column("block").to_pylist()) if reuse is not None else set()
    for block in range(spec["first_block"], spec["first_block"] + spec["n_blocks"]):
        if block in have:
            parts.append(reuse.filter(pc.equal(reuse.column("block"), block)).replace_schema_metadata(None))
            continue
        data = dgm.draw(block_generator(seed, scen["spawn_key"], block), reps, n)
        kwargs = dict(est.get("args", {}))
        if wants_level:
            kwargs["level"] = spec["level"]
        if wants_rng:
            kwargs["rng"] = estimator_generator(seed, scen["spawn_key"], block, est["name"])
        result = apply_to_block(fn, data, reps, kwargs)
        cols = {
            "scenario": pa.array(np.full(reps, scen["key"], dtype=object), pa.string()),
            "estimator": pa.array(np.full(reps, est["name"], dtype=object), pa.string()),
            "block": pa.array(np.full(reps, block, dtype=np.int64)),
            "rep": pa.array(np.arange(block * reps, (block + 1) * reps, dtype=np.int64)),
        }
        for name in FIELDS:
            values = result.columns[name]
            cols[name] = (pa.nulls(reps, pa.float64()) if values is None
                          else pa.array(values, pa.float64(), from_pandas=False))
        cols["status"] = pa.array(result.status, pa.string())
        cols["message"] = pa.array(result.message, pa.string())
        parts.append(pa.table(cols, schema=SHARD_SCHEMA))
    return pa.concat_tables(parts)


def write_atomic(table: pa.Table, out: Path, metadata: Mapping) -> None:
    """Write *table* with *metadata* to ``out.tmp-<pid>``, then rename it to *out*."""
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    table = table.replace_schema_metadata({METADATA_KEY: json.dumps(metadata, sort_keys=True)})
    tmp = out.with_name(f"{out.name}.tmp-{os.getpid()}")
    try:
        pq.write_table(table, tmp, compression="zstd", write_page_checksum=True)
        os.replace(tmp, out)
    finally:
        tmp.unlink(missing_ok=True)


def run_shard(spec: Mapping, search_dirs, out: Path) -> dict:
    """Compute one shard and write it atomically; return its provenance."""
    start = time.perf_counter()
    out = Path(out)
    code = plugins.code_hash(plugins.code_files(spec["estimator"]["function"], search_dirs))
    reuse = _reusable(out, spec, code)
    table = compute_shard(spec, search_dirs, reuse)
    scen = spec["scenario"]
    meta = {
        "spec_hash": spec_hash(spec),
        "reused_blocks": 0 if reuse is None else len(set(reuse.column("block").to_pylist())),
        "seed": str(spec["seed"]),
        "scenario": scen["key"],
        "scenario_spawn_key": str(scen["spawn_key"]),  # block b uses spawn_key=(this, b)
        "estimator": spec["estimator"]["name"],
        "function": spec["estimator"]["function"],
        "code_hash": code,
        "first_block": spec["first_block"],
        "n_blocks": spec["n_blocks"],
        "block_size": spec["block_size"],
        "rows": table.num_rows,
        "versions": versions(),
        "seconds": round(time.perf_counter() - start, 6),
        "max_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }
    write_atomic(table, out, meta)
    return meta


def read_metadata(path: Path | str) -> dict:
    """The provenance a shard carries in its Parquet metadata."""
    return verify_shard(path, full=False)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="python -m estbench.shard",
                                     description="Compute one shard (used by the workflow).")
    parser.add_argument("--spec", required=True, help="job spec as JSON")
    parser.add_argument("--search-dir", action="append", default=[],
                        help="folder searched for estimator modules (repeatable)")
    parser.add_argument("--out", required=True, type=Path, help="Parquet file to write")
    args = parser.parse_args(argv)
    meta = run_shard(json.loads(args.spec), args.search_dir, args.out)
    print(f"{args.out}: {meta['rows']} replicates in {meta['seconds']:.2f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
