"""Pipeline cost against the vectorised limit and the per-replicate loop, side by side.

    .venv/bin/python benchmarks/pipeline.py [--replicates 10000 100000] [--repeats 3]
                                            [--with-million [--million-repeats 1]] [--cores 2]

Reference study: normal data, n in {10, 20, 50, 100, 200, 500, 1000}, estimators
mean, median, 10% trimmed mean and SD. For each replicate count it times, in one
run and in alternation (median over --repeats):

- limit: one process draws every seed block once, with the study's own streams,
  and applies the four estimators to it; no files, no Snakemake;
- loop: the per-replicate script most studies start as (draw one dataset, apply
  each estimator, append), timed on a subsample and scaled up linearly;
- estbench: a cold ``estbench run`` in a fresh folder, all stages (shards,
  ingest, report).

It prints the ratios the issue asks for and the largest simulation-job memory
(recorded by each job in its record). Timings are wall-clock seconds
on this machine; only the ratios are meant to travel.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(ROOT / "workflow"), str(ROOT / "estimators")]

from estbench.simulate.dgms import build_dgm  # noqa: E402
from estbench.simulate.plugins import resolve, search_path  # noqa: E402
from estbench.app.runner import snakemake_base  # noqa: E402
from estbench.simulate.seeding import block_generator  # noqa: E402
from estbench.study.load import study_from_mapping  # noqa: E402

SAMPLE_SIZES = [10, 20, 50, 100, 200, 500, 1000]
ESTIMATORS = {
    "mean": {"function": "location:mean", "target": "mean"},
    "median": {"function": "location:median", "target": "mean"},
    "trimmed_10": {"function": "location:trimmed_mean", "target": "mean", "args": {"proportion": 0.1}},
    "sd": {"function": "scale:sd", "target": "sd"},
}


def reference_study(replicates: int) -> dict:
    block = 1000
    return {
        "study": f"bench-{replicates}", "seed": 2026, "replicates": replicates,
        "block_size": block,  # blocks_per_job: 'auto' (the default)
        "sample_sizes": SAMPLE_SIZES,
        "dgms": {"normal": {"distribution": "norm", "params": {"loc": 0.0, "scale": 1.0}}},
        "estimators": ESTIMATORS, "reference": "mean",
    }


def time_limit(raw: dict) -> float:
    """The vectorised limit: draw each block once, apply every estimator, keep nothing."""
    study = study_from_mapping(raw)
    fns = {name: resolve(e.function, search_path(None)) for name, e in study.estimators.items()}
    start = time.perf_counter()
    for s in study.scenarios:
        dgm = build_dgm(s.spec)
        for b in range(study.n_blocks):
            data = dgm.draw(block_generator(study.seed, s.spawn_key, b), study.block_size, s.n)
            for name, e in study.estimators.items():
                fns[name](data, **e.args)
    return time.perf_counter() - start


def time_loop(raw: dict, subsample: int = 400) -> float:
    """The common per-replicate script, timed on *subsample* replicates per n and scaled."""
    from scipy import stats
    rng = np.random.default_rng(raw["seed"])
    start = time.perf_counter()
    rows = []
    for n in raw["sample_sizes"]:
        for _ in range(subsample):
            x = rng.normal(0.0, 1.0, size=n)
            rows.append((n, "mean", float(np.mean(x))))
            rows.append((n, "median", float(np.median(x))))
            rows.append((n, "trimmed_10", float(stats.trim_mean(x, 0.1))))
            rows.append((n, "sd", float(np.std(x, ddof=1))))
    return (time.perf_counter() - start) * raw["replicates"] / subsample


def time_estbench(raw: dict, cores: int) -> dict:
    """Cold end-to-end run in a fresh folder.

    Returns its wall seconds; the largest simulation-job RSS (MB, from the job
    records); the work it had to do (the jobs' in-process seconds spread over
    *cores*, plus the in-process seconds of ingest and report, from their logs);
    and the time Snakemake takes to build the DAG (a dry run of the same study).
    Wall minus work is what start-ups, scheduling and uneven load cost.
    """
    with tempfile.TemporaryDirectory(prefix="estbench-bench-") as tmp:
        path = Path(tmp) / "study.yaml"
        path.write_text(yaml.safe_dump(raw, sort_keys=False))
        start = time.perf_counter()
        subprocess.run([sys.executable, "-m", "estbench.app.cli", "run", str(path), "--cores", str(cores)],
                       cwd=tmp, check=True, capture_output=True)
        seconds = time.perf_counter() - start
        out = Path(tmp) / "results" / raw["study"]
        records = [json.loads(p.read_text()) for p in out.glob("jobs/*/*.json")]
        ingest = json.loads((out / "logs" / "ingest.log").read_text().strip().splitlines()[-1])["seconds"]
        report = float(re.search(r"written in ([0-9.]+) s", (out / "logs" / "report.log").read_text()).group(1))
        start = time.perf_counter()
        subprocess.run([*snakemake_base(path, Path(tmp)), "--dry-run", "--quiet"], cwd=tmp, check=True,
                       capture_output=True)
        dag = time.perf_counter() - start
    work = sum(r["seconds"] for r in records) / cores + ingest + report
    return {"estbench": seconds, "rss": max(r["max_rss_mb"] for r in records), "work": work,
            "jobs": len(records), "dag": dag}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, nargs="+", default=[10_000, 100_000])
    parser.add_argument("--with-million", action="store_true", help="add the 10^6-replicate row")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--million-repeats", type=int, default=1,
                        help="repeats of the 10^6 row (each takes minutes)")
    parser.add_argument("--cores", type=int, default=os.cpu_count() or 1)
    args = parser.parse_args()
    counts = args.replicates + ([1_000_000] if args.with_million else [])
    print(f"machine: {os.cpu_count()} cores; estbench run --cores {args.cores}; "
          f"{time.strftime('%Y-%m-%d %H:%M')}; medians of {args.repeats} repeats "
          f"({args.million_repeats} at 10^6)")
    results = {}
    for reps in counts:
        raw = reference_study(reps)
        runs: dict[str, list] = {}
        for _ in range(args.million_repeats if reps == 1_000_000 else args.repeats):
            # alternate, so load changes hit every variant alike
            runs.setdefault("limit", []).append(time_limit(raw))
            runs.setdefault("loop", []).append(time_loop(raw))
            for key, value in time_estbench(raw, args.cores).items():
                runs.setdefault(key, []).append(value)
        results[reps] = {k: statistics.median(v) for k, v in runs.items()}
    header = ("replicates", "jobs", "limit s", "loop s", "estbench s", "estbench/limit", "loop/estbench",
              "max job RSS MB", "overhead share", "DAG s")
    print(" | ".join(header))
    for reps, r in results.items():
        print(" | ".join([f"{reps:,}", f"{r['jobs']:.0f}", f"{r['limit']:.1f}", f"{r['loop']:.1f}",
                          f"{r['estbench']:.1f}", f"{r['estbench'] / r['limit']:.2f}",
                          f"{r['loop'] / r['estbench']:.1f}", f"{r['rss']:.0f}",
                          f"{1 - r['work'] / r['estbench']:.0%}", f"{r['dag']:.1f}"]))
    if 100_000 in results and 1_000_000 in results:
        print(f"growth 10^5 -> 10^6: {results[1_000_000]['estbench'] / results[100_000]['estbench']:.2f}x")
    print("overhead share: 1 - (job seconds / cores + ingest + report) / wall: start-ups of the CLI, "
          "Snakemake and every job, scheduling and uneven load. DAG s: Snakemake's dry run of the study.")


if __name__ == "__main__":
    main()
