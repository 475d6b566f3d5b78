"""How long rendering the report takes, and how much memory, on a large store.

Builds a store of 20 scenarios (4 DGMs x 5 sample sizes) x 5 estimators x
10^5 replicates = 10^7 estimate rows, each with an SE, an interval and a
p-value, through the real ingest path (Parquet shards with provenance ->
``estbench.analyse.store.ingest``). The estimates are synthesised (normal errors with
each estimator's own spread, a few failures with messages), not computed by
the estimators: this measures the report, not the simulation. Then it runs
``estbench.report.render`` in a fresh process and prints its wall time and
peak resident memory next to the size the estimates would take as numpy
arrays — the render must never load them all. The peak includes DuckDB's
cache of the store's blocks and its join tables, which it frees on close.

Run:  .venv/bin/python benchmarks/report_scale.py [--reps 100000] [--keep DIR]
Target (issue 5): under 15 s on a 2-core machine.

Wide mode: ``--wide K [K ...]`` builds, for each K, a study of one normal DGM
with ``loc`` swept over K values x n in {10, 50} (2K scenarios) x 4 estimators
(mean, median, 10% trimmed mean, SD) x 1000 replicates, through the same
ingest path, then times ``estbench report`` as a user runs it (a fresh
process, imports included) and prints, per K, the ingest and report seconds,
seconds per scenario, the page's size and its figures: the report's cost must
grow at most linearly, and cheaply, with the scenarios.

Run:  .venv/bin/python benchmarks/report_scale.py --wide 50 100 200 [--keep DIR]
Target: 400 scenarios (K = 200) under 30 s on a 2-core machine, the page a few MB.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import yaml
from scipy import stats

from estbench.simulate.shard import SHARD_SCHEMA, versions, write_atomic
from estbench.analyse.store import ingest
from estbench.study.load import study_from_mapping

#: Spread of each synthetic estimator relative to the usual one for its estimand
#: (the mean's for a location, the normal-theory SD's for the SD), and its bias in SDs.
ESTIMATORS = {"mean": (1.00, 0.0), "median": (1.25, 0.0), "trimmed_10": (1.03, 0.0),
              "winsorized_10": (1.04, 0.01), "huber": (1.02, 0.02), "sd": (1.00, -0.05)}
FUNCTIONS = {"mean": "location:mean", "median": "location:median", "trimmed_10": "location:trimmed_mean",
             "winsorized_10": "location:winsorized_mean", "huber": "location:huber"}


def study_mapping(reps: int) -> dict:
    return {
        "study": "report-scale",
        "description": "Synthetic store for timing the report (invented numbers).",
        "seed": 7, "replicates": reps, "block_size": reps // 10, "blocks_per_job": 10,
        "sample_sizes": [10, 20, 50, 100, 500],
        "dgms": {
            "normal": {"distribution": "norm", "params": {"loc": 5.0, "scale": 1.0}},
            "wide": {"distribution": "norm", "params": {"loc": 5.0, "scale": 3.0}},
            "t5": {"distribution": "t", "params": {"df": 5, "loc": 5.0, "scale": 1.0}},
            "logistic": {"distribution": "logistic", "params": {"loc": 5.0, "scale": 1.0}},
        },
        "estimators": {name: {"function": fn, "target": "mean"} for name, fn in FUNCTIONS.items()},
        "reference": "mean",
        "targets": {"bias": 0.002, "coverage": 0.001},
        "report": {"asymptotic_efficiency": {"median": {"normal": 2 / np.pi, "wide": 2 / np.pi}}},
    }


def wide_mapping(locations: int) -> dict:
    """The wide study: *locations* values of loc x 2 sample sizes, 1000 replicates."""
    return {
        "study": "report-wide",
        "description": f"Synthetic wide store for timing the report: {locations} locations "
                       "(invented numbers).",
        "seed": 2026, "replicates": 1000, "block_size": 1000, "sample_sizes": [10, 50],
        "dgms": {"normal": {"distribution": "norm", "params": {"loc": list(range(locations)), "scale": 1.0}}},
        "estimators": {"mean": {"function": "location:mean", "target": "mean"},
                       "median": {"function": "location:median", "target": "mean"},
                       "trimmed_10": {"function": "location:trimmed_mean", "target": "mean",
                                      "args": {"proportion": 0.1}},
                       "sd": {"function": "scale:sd", "target": "sd"}},
        "reference": "mean",
    }


def synthetic_shard(study, scenario, estimator: str, rng) -> pa.Table:
    """One scenario x estimator, every seed block: normal errors, SE, t interval, p-value."""
    reps, n = study.replicates_run, scenario.n
    params = scenario.spec["params"]
    if study.estimators[estimator].target == "sd":   # normal theory: sd(s) ≈ σ/√(2(n − 1))
        truth, usual = params["scale"], params["scale"] / np.sqrt(2 * (n - 1))
    else:
        truth, usual = params["loc"], params["scale"] / np.sqrt(n)
    sd = usual * ESTIMATORS[estimator][0]
    shared = rng.standard_normal(reps)             # the "same dataset" part, as for paired estimators
    estimate = truth + sd * (ESTIMATORS[estimator][1] + 0.9 * shared + 0.436 * rng.standard_normal(reps))
    se = sd * np.sqrt(rng.chisquare(n - 1, reps) / (n - 1))
    crit = stats.t.ppf(0.975, n - 1)
    status = np.where(rng.random(reps) < 1e-4, "error", "ok").astype(object)
    failed = status == "error"
    message = np.where(failed, "ValueError: synthetic failure", None).astype(object)
    estimate[failed] = np.nan
    return pa.table({
        "scenario": pa.array([scenario.key] * reps, pa.string()),
        "estimator": pa.array([estimator] * reps, pa.string()),
        "block": np.arange(reps) // study.block_size, "rep": np.arange(reps),
        "estimate": estimate, "se": se, "ci_low": estimate - crit * se, "ci_high": estimate + crit * se,
        "p_value": 2 * stats.t.sf(np.abs((estimate - truth) / se), n - 1),
        "status": pa.array(status, pa.string()), "message": pa.array(message, pa.string()),
    }, schema=SHARD_SCHEMA)


def write_shards(folder: Path, reps: int, raw: dict | None = None):
    """Synthetic shards of the benchmark study (or of *raw*) in *folder*; returns
    (study, study file, shard paths)."""
    raw = raw or study_mapping(reps)
    path = folder / "study.yaml"
    path.write_text(yaml.safe_dump(raw, sort_keys=False))
    study = study_from_mapping(raw, source=path)
    rng = np.random.default_rng(20261201)
    shards = []
    for s in study.scenarios:
        for e in study.estimators:
            out = study.layout(folder).shard(s.key, e, 0)
            write_atomic(synthetic_shard(study, s, e, rng), out, {
                "seed": str(study.seed), "scenario": s.key, "scenario_spawn_key": str(s.spawn_key),
                "estimator": e, "function": study.estimators[e].function, "code_hash": "synthetic",
                "first_block": 0, "n_blocks": study.n_blocks, "block_size": study.block_size,
                "rows": study.replicates_run, "versions": versions(), "seconds": 0.0,
                "created": time.strftime("%Y-%m-%dT%H:%M:%S%z")})
            shards.append(out)
    return study, path, shards


def build_store(folder: Path, reps: int) -> tuple[Path, int]:
    study, _, shards = write_shards(folder, reps)
    store = folder / "store.duckdb"
    ingest(store, study, shards)
    return store, len(study.scenarios) * len(study.estimators) * study.replicates_run


def reuse(folder: Path, reps: int) -> tuple[Path, int] | None:
    """A store this benchmark built before in *folder*, with its row count."""
    store = folder / "store.duckdb"
    if not store.exists():
        return None
    import duckdb
    con = duckdb.connect(str(store), read_only=True)
    try:
        rows = con.execute("SELECT count(*) FROM estimates").fetchone()[0]
        name = con.execute("SELECT name, replicates FROM study").fetchone()
    finally:
        con.close()
    return (store, rows) if name == ("report-scale", reps) else None


_CHILD = """
import json, resource, sys, time
from estbench.core.layout import ResultsLayout
from estbench.report.render import render

def high_water_kib():
    # VmHWM: this process's peak resident set. (ru_maxrss would also count
    # the parent's memory inherited at fork, since Linux keeps it across exec.)
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1])

def cpu_seconds():
    # this process and its finished children (the figure workers)
    return sum(getattr(resource.getrusage(who), f) for who in (resource.RUSAGE_SELF, resource.RUSAGE_CHILDREN)
               for f in ("ru_utime", "ru_stime"))

before, cpu = high_water_kib(), cpu_seconds()
start = time.perf_counter()
render(ResultsLayout.of_store(sys.argv[1]))  # writes report.html and the CSVs beside the store
seconds = time.perf_counter() - start
print(json.dumps({"seconds": seconds, "cpu": cpu_seconds() - cpu, "rss_before_kib": before,
                  "rss_peak_kib": high_water_kib()}))
"""


def time_render(store: Path, folder: Path) -> dict:
    """Render in a fresh process (imports done before the clock starts)."""
    proc = subprocess.run([sys.executable, "-c", _CHILD, str(store)], capture_output=True, text=True, check=True)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def wide(locations: list[int], keep: Path | None) -> None:
    """The wide mode: ingest and report seconds for each number of locations."""
    import re

    print(f"{'scenarios':>9} {'rows':>11} {'ingest s':>9} {'report s':>9} {'report ms/scenario':>19} "
          f"{'report.html MiB':>16} {'figures':>8}")
    with tempfile.TemporaryDirectory() as tmp:
        for k in locations:
            folder = (keep or Path(tmp)) / f"wide{k}"
            folder.mkdir(parents=True, exist_ok=True)
            study, path, shards = write_shards(folder, 0, wide_mapping(k))
            layout = study.layout(folder)
            for stale in (layout.store, layout.store.with_name(layout.store.name + ".wal")):
                stale.unlink(missing_ok=True)       # a fresh ingest every time
            start = time.perf_counter()
            ingest(layout.store, study, shards)
            ingested = time.perf_counter() - start
            start = time.perf_counter()
            subprocess.run([str(Path(sys.executable).with_name("estbench")), "report", path.name], cwd=folder,
                           check=True, capture_output=True)
            reported = time.perf_counter() - start
            html = layout.report_html.read_text(encoding="utf-8")
            scenarios = len(study.scenarios)
            rows = scenarios * len(study.estimators) * study.replicates_run
            print(f"{scenarios:>9} {rows:>11,} {ingested:>9.1f} {reported:>9.1f} "
                  f"{1000 * reported / scenarios:>19.1f} {len(html.encode()) / 2**20:>16.2f} "
                  f"{len(re.findall('<figure>', html)):>8}")
    print(f"cores available {len(os.sched_getaffinity(0))}, 1-min load average {os.getloadavg()[0]:.1f}; "
          "report seconds include starting Python and its imports")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=100_000, help="replicates per scenario")
    parser.add_argument("--keep", type=Path, help="build in this folder and keep it (a store there is reused)")
    parser.add_argument("--wide", type=int, nargs="+", metavar="K",
                        help="time the report of wide studies instead: K locations x 2 sample sizes each")
    args = parser.parse_args()
    if args.wide:
        wide(args.wide, args.keep)
        return
    with tempfile.TemporaryDirectory() as tmp:
        folder = args.keep or Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        start = time.perf_counter()
        reused = reuse(folder, args.reps)
        store, rows = reused or build_store(folder, args.reps)
        built = "reused" if reused else f"{time.perf_counter() - start:.1f} s"
        load_before = os.getloadavg()[0]
        runs = [time_render(store, folder) for _ in range(2)]
        html = (folder / "report.html").stat().st_size
        as_numpy_mib = rows * 5 * 8 / 2**20   # estimate, se, ci_low, ci_high, p_value as float64
        print(f"estimate rows               {rows:>12,}")
        print(f"store built (synth+ingest)  {built:>12}   ({store.stat().st_size / 2**20:.0f} MiB)")
        for i, r in enumerate(runs, 1):
            peak, imported = r["rss_peak_kib"] / 1024, r["rss_before_kib"] / 1024
            print(f"render, run {i}               {r['seconds']:>10.1f} s   ({r['cpu']:.1f} CPU-s)   "
                  f"peak RSS {peak:.0f} MiB (after imports {imported:.0f} MiB)")
        print(f"the estimates as numpy      {as_numpy_mib:>10.0f} MiB (never loaded)")
        print(f"report.html                 {html / 2**20:>10.2f} MiB")
        print(f"cores available             {len(os.sched_getaffinity(0)):>10}   "
              f"(1-min load average {load_before:.1f} before the renders, {os.getloadavg()[0]:.1f} after)")


if __name__ == "__main__":
    main()
