"""A whole cold ``estbench run`` against the hand-written single-process yardstick, deep and wide.

    .venv/bin/python benchmarks/pipeline.py [--deep 100000 [1000000 ...]] [--wide 200 ...]
                                            [--repeats 3] [--cores 2] [--yardstick PATH]

The yardstick (``../shared/bench/limit_full.py`` beside this checkout, written
outside the project) computes in one process, with no files, the same outputs
as the built-in estimators of the reference study: mean, median, 10% trimmed
mean and SD, each with its SE, 95% interval and p-value as estbench defines
them. Two shapes of study:

- deep: ``limit_full.py R``: normal data, n in {10, 20, 50, 100, 200, 500, 1000},
  R replicates each, blocks of 1000;
- wide: ``limit_full.py wide K 10,50``: K normal locations x n in {10, 50},
  1000 replicates each (2K scenarios).

estbench runs the same study (same estimators, block size, sample sizes and
replicates) with ``estbench run --cores N`` in a fresh folder: jobs, ingest,
report, performance.csv, all of it, cold. Both are timed as the commands a user
types, wall clock, in one run and in alternation (median over --repeats), so
load changes hit both alike. The ratio estbench / limit_full is the figure to
compare; 2 cores make 0.5 its floor for the simulation part.

It also prints where estbench's time went (the span of the simulation jobs,
ingest and report, from their logs), the number of jobs and the largest
simulation-job memory (from the job records), and the start-up of one
simulation job process.
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

import yaml

ROOT = Path(__file__).resolve().parents[1]
YARDSTICK = ROOT.parent / "shared" / "bench" / "limit_full.py"
DEEP_SIZES = [10, 20, 50, 100, 200, 500, 1000]
WIDE_SIZES = [10, 50]
ESTIMATORS = {
    "mean": {"function": "location:mean", "target": "mean"},
    "median": {"function": "location:median", "target": "mean"},
    "trimmed_10": {"function": "location:trimmed_mean", "target": "mean", "args": {"proportion": 0.1}},
    "sd": {"function": "scale:sd", "target": "sd"},
}


def deep_study(replicates: int) -> dict:
    return {"study": f"deep-{replicates}", "seed": 6611, "replicates": replicates, "block_size": 1000,
            "sample_sizes": DEEP_SIZES,
            "dgms": {"normal": {"distribution": "norm", "params": {"loc": 0.0, "scale": 1.0}}},
            "estimators": ESTIMATORS, "reference": "mean"}


def wide_study(locations: int) -> dict:
    return {"study": f"wide-{locations}", "seed": 6611, "replicates": 1000, "block_size": 1000,
            "sample_sizes": WIDE_SIZES,
            "dgms": {"normal": {"distribution": "norm",
                                "params": {"loc": [float(j) for j in range(locations)], "scale": 1.0}}},
            "estimators": ESTIMATORS, "reference": "mean"}


def time_yardstick(path: Path, args: list[str]) -> float:
    """Wall seconds of the yardstick command, cold (a new Python process, as typed)."""
    start = time.perf_counter()
    subprocess.run([sys.executable, str(path), *args], check=True, capture_output=True)
    return time.perf_counter() - start


def _stage_seconds(out: Path) -> dict:
    """Simulation span (the first job's work starting to the last record), ingest and report
    seconds, from the job records and the logs."""
    records = [json.loads(p.read_text()) for p in out.glob("jobs/*/*.json")]
    ingest = json.loads((out / "logs" / "ingest.log").read_text().strip().splitlines()[-1])["seconds"]
    report = float(re.search(r"written in ([0-9.]+) s", (out / "logs" / "report.log").read_text()).group(1))
    # A record is written as its job ends, and holds the job's in-process seconds.
    ends = {p: p.stat().st_mtime for p in out.glob("jobs/*/*.json")}
    starts = [end - json.loads(p.read_text())["seconds"] for p, end in ends.items()]
    return {"jobs": len(records), "rss": max(r["max_rss_mb"] for r in records),
            "simulate": max(ends.values()) - min(starts), "ingest": ingest, "report": report}


def time_estbench(raw: dict, cores: int) -> dict:
    """Wall seconds of a cold ``estbench run`` in a fresh folder, and where they went."""
    with tempfile.TemporaryDirectory(prefix="estbench-bench-") as tmp:
        path = Path(tmp) / "study.yaml"
        path.write_text(yaml.safe_dump(raw, sort_keys=False))
        start = time.perf_counter()
        subprocess.run([sys.executable, "-m", "estbench", "run", str(path), "--cores", str(cores)],
                       cwd=tmp, check=True, capture_output=True)
        seconds = time.perf_counter() - start
        return {"estbench": seconds, **_stage_seconds(Path(tmp) / "results" / raw["study"])}


def job_start_up(repeats: int = 5) -> dict:
    """Wall seconds of a simulation job process doing (almost) nothing, against bare Python + numpy."""
    from estbench.study import jobs
    from estbench.study.load import study_from_mapping
    raw = deep_study(1000)
    raw.update(sample_sizes=[10], block_size=10, replicates=10)
    out = {"python": [], "job": []}
    with tempfile.TemporaryDirectory(prefix="estbench-startup-") as tmp:
        source = Path(tmp) / "study.yaml"
        source.write_text(yaml.safe_dump(raw))
        study = study_from_mapping(raw, source=source)
        layout = study.layout(tmp)
        jobs.write_job_specs(study, layout)
        key = jobs.job_keys(study)[0]
        cmd = [sys.executable, "-m", "estbench.simulate.job", "--spec", str(layout.job_spec(*key)),
               *[a for d in study.search_dirs for a in ("--search-dir", d)], "--record", str(layout.job_record(*key))]
        for _ in range(repeats):
            for name, argv in (("python", [sys.executable, "-c", "import numpy"]), ("job", cmd)):
                start = time.perf_counter()
                subprocess.run(argv, check=True, capture_output=True, cwd=tmp)
                out[name].append(time.perf_counter() - start)
    return {k: statistics.median(v) for k, v in out.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--deep", type=int, nargs="*", default=[100_000], help="replicates per n (deep shape)")
    parser.add_argument("--wide", type=int, nargs="*", default=[200], help="locations K (wide shape: 2K scenarios)")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--cores", type=int, default=2)
    parser.add_argument("--yardstick", type=Path, default=YARDSTICK)
    args = parser.parse_args()
    if not args.yardstick.is_file():
        sys.exit(f"no yardstick at {args.yardstick}: pass --yardstick PATH to limit_full.py")
    cases = ([(f"deep R={r:,}", deep_study(r), [str(r)]) for r in args.deep]
             + [(f"wide K={k} ({2 * k} scenarios)", wide_study(k), ["wide", str(k), ",".join(map(str, WIDE_SIZES))])
                for k in args.wide])
    print(f"{time.strftime('%Y-%m-%d %H:%M')}; {os.cpu_count()} cores; estbench run --cores {args.cores}; "
          f"medians of {args.repeats}; yardstick {args.yardstick}")
    rows = []
    for label, raw, yard_args in cases:
        runs: dict[str, list] = {}
        for _ in range(args.repeats):  # alternate, so load changes hit both alike
            runs.setdefault("limit", []).append(time_yardstick(args.yardstick, yard_args))
            for key, value in time_estbench(raw, args.cores).items():
                runs.setdefault(key, []).append(value)
        rows.append((label, {k: statistics.median(v) for k, v in runs.items()}))
        print(f"  {label}: done", flush=True)
    head = ("study", "limit_full s", "estbench s", "estbench / limit_full", "jobs", "simulate s",
            "ingest s", "report s", "max job RSS MB")
    print(" | ".join(head))
    for label, r in rows:
        print(" | ".join([label, f"{r['limit']:.1f}", f"{r['estbench']:.1f}", f"{r['estbench'] / r['limit']:.2f}",
                          f"{r['jobs']:.0f}", f"{r['simulate']:.1f}", f"{r['ingest']:.1f}", f"{r['report']:.1f}",
                          f"{r['rss']:.0f}"]))
    startup = job_start_up()
    print(f"simulation job start-up: {startup['job']:.2f} s for a one-block job process "
          f"(bare `python -c 'import numpy'`: {startup['python']:.2f} s)")
    print("simulate s: the first job's work starting (after its imports) to the last job record; "
          "the rest of estbench s is the CLI, Snakemake's DAG, process start-ups and scheduling.")


if __name__ == "__main__":
    main()
