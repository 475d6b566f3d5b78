"""One simulation job: a run of pieces (scenario x range of seed blocks) -> one Parquet
shard per piece and estimator.

The job spec is a plain JSON file (written from ``estbench.study.jobs.job_spec``),
so a job needs neither the study file nor Snakemake::

    python -m estbench.simulate.job --spec results/<study>/specs/<scenario>/<first_block>.json \
        --search-dir D --record results/<study>/jobs/<scenario>/<first_block>.json

The pieces are computed one after the other, each piece's shards committed
before the next starts, so a killed job keeps the pieces it finished. Each
seed block is drawn once and handed to every estimator whose shard needs it:
comparisons stay paired and the draw is paid once. A shard already made by
the same spec and code is left untouched (bytes and mtime); one whose range
grew keeps the blocks it has. Shards are streamed to temporary files a row
group at a time, so memory does not grow with the replicate count, and moved
into place with ``os.replace``. The job record is written last: a killed job
leaves neither a partial shard nor a record of work it did not finish.

This is the process every simulation job starts: it imports numpy, scipy and
pyarrow, never duckdb, matplotlib or pandas (a test checks).
"""

from __future__ import annotations

import argparse
import faulthandler
import json
import resource
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable, Iterator, Mapping

import pyarrow as pa

from estbench.core.errors import UserError, entry_point
from estbench.core.files import write_text_atomically
from estbench.core.layout import ResultsLayout
from estbench.simulate import plugins
from estbench.simulate.dgms import build_dgm
from estbench.simulate.estimator import apply_to_block
from estbench.simulate.seeding import block_generator, estimator_generator
from estbench.simulate.shard import (MISSING, ShardState, ShardWriter, block_table, estimator_code_hash,
                                     read_block, read_metadata, shard_state, spec_hash, versions)

#: Keys a piece shares with each of its per-estimator shard specs.
COMMON_KEYS = ("seed", "block_size", "first_block", "n_blocks", "scenario")
#: Keys of a job spec: what its pieces share, and the pieces.
JOB_KEYS = ("seed", "block_size", "estimators", "pieces")


def piece_specs(job: Mapping) -> list[dict]:
    """The spec of each piece of a job, as a job of its own (one scenario, one block range)."""
    shared = {"seed": job["seed"], "block_size": job["block_size"], "estimators": job["estimators"]}
    return [{**shared, **piece} for piece in job["pieces"]]


def estimator_specs(piece: Mapping) -> list[dict]:
    """The spec of each shard of a piece: the piece's common part plus one estimator.

    A shard's spec decides its numbers, so its hash tells whether an existing
    shard still stands.
    """
    common = {k: piece[k] for k in COMMON_KEYS}
    return [{**common, **entry} for entry in piece["estimators"]]


def piece_of(specs: Iterable[Mapping]) -> dict:
    """The piece computing the given shard specs (which must share scenario and blocks)."""
    specs = list(specs)
    common = {k: specs[0][k] for k in COMMON_KEYS}
    if any({k: s[k] for k in COMMON_KEYS} != common for s in specs):
        raise ValueError("shard specs of one piece must share seed, block size, blocks and scenario")
    return {**common, "estimators": [{k: v for k, v in s.items() if k not in COMMON_KEYS} for s in specs]}


def shards_of_piece(layout: ResultsLayout, piece: Mapping) -> dict[str, Path]:
    """Estimator name -> shard path of every shard a piece writes."""
    key, first = piece["scenario"]["key"], piece["first_block"]
    return {e["estimator"]["name"]: layout.shard(key, e["estimator"]["name"], first) for e in piece["estimators"]}


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


def shard_tasks(piece: Mapping, search_dirs, outputs: Mapping[str, Path] | None = None,
                codes: Mapping[str, str] | None = None) -> list[ShardTask]:
    """The piece's shards, each with the state of its existing file in *outputs* (if any).

    *codes* maps estimator functions to their code hash, if already computed.
    """
    tasks = []
    for spec in estimator_specs(piece):
        function = spec["estimator"]["function"]
        code = codes[function] if codes else estimator_code_hash(function, search_dirs)
        out = Path(outputs[spec["estimator"]["name"]]) if outputs else None
        state = shard_state(out, spec, code) if out else ShardState(MISSING)
        tasks.append(ShardTask(spec, plugins.resolve(function, search_dirs), code, out, state))
    return tasks


def iter_block_tables(piece: Mapping, search_dirs, tasks: list[ShardTask],
                      timing: dict | None = None) -> Iterator[tuple[ShardTask, pa.Table]]:
    """(task, rows of one block) for every block of the piece and every task, in block order.

    A block is drawn once, and only if some task needs it computed; blocks a
    task keeps are copied from its existing shard.
    """
    scen, seed, reps = piece["scenario"], piece["seed"], piece["block_size"]
    dgm = build_dgm(scen["dgm"], tuple(search_dirs), seed)
    timing = {} if timing is None else timing
    timing.setdefault("draw", 0.0)
    for block in range(piece["first_block"], piece["first_block"] + piece["n_blocks"]):
        data = None
        for task in tasks:
            if block in task.state.keep:
                yield task, read_block(task.out, block)
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
    piece = piece_of([spec])
    return pa.concat_tables([t for _, t in iter_block_tables(piece, search_dirs, shard_tasks(piece, search_dirs))])


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


def run_piece(piece: Mapping, search_dirs, outputs: Mapping[str, Path],
              codes: dict | None = None) -> dict:
    """Bring every shard of *piece* (estimator name -> path in *outputs*) up to date.

    Shards that are up to date are not touched. Returns what was done to each
    shard and why, and the time spent drawing and estimating. *codes* caches
    estimator code hashes across the pieces of a job.
    """
    start = time.perf_counter()
    if codes is not None:
        for entry in piece["estimators"]:
            function = entry["estimator"]["function"]
            if function not in codes:
                codes[function] = estimator_code_hash(function, search_dirs)
    tasks = shard_tasks(piece, search_dirs, outputs, codes)
    todo = [t for t in tasks if not t.state.current]
    timing = {"draw": 0.0}
    writers = {t.name: ShardWriter(t.out) for t in todo}
    try:
        if todo:
            for task, table in iter_block_tables(piece, search_dirs, todo, timing):
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
        "scenario": piece["scenario"]["key"],
        "first_block": piece["first_block"],
        "n_blocks": piece["n_blocks"],
        "shards": {t.name: {"path": str(t.out), "action": "kept" if t.state.current else "computed",
                            "reason": t.state.reason, "reused_blocks": len(t.state.keep),
                            "estimator_seconds": round(t.seconds, 6)} for t in tasks},
        "draw_seconds": round(timing["draw"], 6),
        "seconds": round(time.perf_counter() - start, 6),
    }


def run_job(job: Mapping, search_dirs, layout: ResultsLayout) -> dict:
    """Bring every shard of every piece of *job* up to date, piece by piece.

    Each piece's shards are in place before the next piece starts. Returns the
    job record: each piece's report (see ``run_piece``), the job's time and peak memory.
    """
    start = time.perf_counter()
    codes: dict[str, str] = {}
    pieces = [run_piece(piece, search_dirs, shards_of_piece(layout, piece), codes) for piece in piece_specs(job)]
    return {
        "pieces": pieces,
        "block_size": job["block_size"],
        "replicates": sum(p["n_blocks"] for p in pieces) * job["block_size"],
        "seconds": round(time.perf_counter() - start, 6),
        "max_rss_mb": _max_rss_mb(),
        "versions": versions(),
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
    }


def run_shard(spec: Mapping, search_dirs, out: Path) -> dict:
    """Bring one shard up to date on its own (a piece of one estimator); return its provenance."""
    run_piece(piece_of([spec]), search_dirs, {spec["estimator"]["name"]: out})
    return read_metadata(out)


def write_record(record: Mapping, path: Path | str) -> None:
    """Write the job record atomically."""
    write_text_atomically(path, json.dumps(record, indent=1, sort_keys=True) + "\n")


def _job_from_file(path: Path) -> dict:
    try:
        text = path.read_text()
    except OSError as exc:
        raise UserError(f"`--spec`: cannot read the job spec {path}: {exc.strerror or exc}") from None
    try:
        job = json.loads(text)
    except json.JSONDecodeError as exc:
        raise UserError(f"`--spec`: {path} must hold a job spec in JSON, got invalid JSON ({exc})") from None
    missing = [k for k in JOB_KEYS if not isinstance(job, dict) or k not in job]
    if not missing and (not isinstance(job["pieces"], list) or not job["pieces"]):
        missing = ["pieces (a non-empty list)"]
    if missing:
        raise UserError(f"`--spec`: a job spec needs the keys {', '.join(missing)}")
    return job


@entry_point
def main(argv=None) -> int:
    """``python -m estbench.simulate.job``: run one job and write its record."""
    parser = argparse.ArgumentParser(prog="python -m estbench.simulate.job",
                                     description="Run one simulation job (used by the workflow).")
    parser.add_argument("--spec", required=True, type=Path, help="file holding the job spec as JSON")
    parser.add_argument("--search-dir", action="append", default=[],
                        help="folder searched for estimator modules (repeatable)")
    parser.add_argument("--record", required=True, type=Path,
                        help="the job record to write last (results/<study>/jobs/<scenario>/<first_block>.json)")
    args = parser.parse_args(argv)
    job = _job_from_file(args.spec)
    try:
        layout = ResultsLayout.of_job_record(args.record)
    except ValueError as exc:
        raise UserError(f"`--record`: {exc}") from None
    first = job["pieces"][0]
    path = layout.job_record(first["scenario"]["key"], first["first_block"])
    if path != args.record:
        raise UserError(f"`--record`: the job from scenario {first['scenario']['key']}, block "
                        f"{first['first_block']} writes {path}, not {args.record}")
    for entry in job["estimators"]:  # a module gone or broken since the study was checked
        name, function = entry["estimator"]["name"], entry["estimator"]["function"]
        try:
            plugins.resolve(function, args.search_dir)
        except (ImportError, AttributeError, TypeError) as exc:
            raise UserError(f"`estimators.{name}.function`: cannot use {function!r}: {exc}") from None
    record = run_job(job, args.search_dir, layout)
    write_record(record, path)
    shards = [(name, s) for piece in record["pieces"] for name, s in piece["shards"].items()]
    computed = sum(s["action"] == "computed" for _, s in shards)
    reasons = sorted({f"{name} ({s['reason']})" for name, s in shards if s["action"] == "computed"})
    print(f"{path}: {len(record['pieces'])} piece(s); computed {computed} shard(s)"
          f"{': ' + ', '.join(reasons) if reasons else ''}; kept {len(shards) - computed}; "
          f"{record['replicates']} replicates in {record['seconds']:.2f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    faulthandler.enable()  # an estimator that crashes the process leaves its stack in the job's log
    sys.exit(main())
