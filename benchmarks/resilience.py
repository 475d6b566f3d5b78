"""What interruptions and growth cost, as ratios of CPU time measured in one run.

    .venv/bin/python benchmarks/resilience.py [--replicates 20000]

- resume: a cold run is killed (SIGKILL to its process group) when about half
  its shards exist, then run again to the end. Work = CPU seconds of every
  process of both runs (children included) against one uninterrupted run.
- add an estimator: a finished study gains one estimator and runs again.
  Work = CPU seconds of that run against that estimator's own compute in the
  uninterrupted run (its shard jobs' seconds, from the store's provenance) plus
  the report step alone (``estbench report``).

CPU time, unlike wall time, does not move with other load on a shared machine.
"""

from __future__ import annotations

import argparse
import os
import resource
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

STUDY = {
    "study": "resilience", "seed": 99, "block_size": 1000, "blocks_per_job": 5,
    "sample_sizes": [20, 100, 500],
    "dgms": {"normal": {"distribution": "norm", "params": {"loc": 0.0, "scale": 1.0}},
             "heavy": {"distribution": "t", "params": {"df": 3}}},
    "estimators": {"mean": {"function": "location:mean", "target": "mean"},
                   "median": {"function": "location:median", "target": "mean"},
                   "trimmed": {"function": "location:trimmed_mean", "target": "mean",
                               "args": {"proportion": 0.2}}},
    "reference": "mean",
}
EXTRA = {"huber": {"function": "location:huber", "target": "mean"}}


def cpu_of(cmd, cwd) -> float:
    """CPU seconds (user + system) of *cmd* and everything it starts, run to the end."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    subprocess.run(cmd, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True)
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def killed_work(cmd, cwd, stop_when, cores: int) -> float:
    """An upper bound on the CPU seconds of a run killed when *stop_when* turns true.

    Processes killed with SIGKILL are reaped by init, so their CPU time never
    reaches this process's RUSAGE_CHILDREN; cores x wall time bounds it instead.
    """
    start = time.monotonic()
    proc = subprocess.Popen(cmd, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    while proc.poll() is None and not stop_when():
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    return cores * (time.monotonic() - start)


def estbench(*args) -> list[str]:
    return [sys.executable, "-m", "estbench.cli", *map(str, args)]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=20_000)
    args = parser.parse_args()
    study = {**STUDY, "replicates": args.replicates}
    with tempfile.TemporaryDirectory(prefix="estbench-resilience-") as tmp:
        tmp = Path(tmp)
        plain, killed = tmp / "plain", tmp / "killed"
        for folder in (plain, killed):
            folder.mkdir()
            (folder / "study.yaml").write_text(yaml.safe_dump(study, sort_keys=False))
        uninterrupted = cpu_of(estbench("run", "study.yaml", "--cores", "2"), plain)

        shards = killed / "results" / "resilience" / "shards"
        total = len(list((plain / "results" / "resilience" / "shards").rglob("*.parquet")))
        half = lambda: shards.exists() and len(list(shards.rglob("*.parquet"))) >= total // 2
        first = killed_work(estbench("run", "study.yaml", "--cores", "2"), killed, half, cores=2)
        done_at_kill = len(list(shards.rglob("*.parquet")))
        second = cpu_of(estbench("run", "study.yaml", "--cores", "2"), killed)

        grown = {**study, "estimators": {**study["estimators"], **EXTRA}}
        (plain / "study.yaml").write_text(yaml.safe_dump(grown, sort_keys=False))
        added = cpu_of(estbench("run", "study.yaml", "--cores", "2"), plain)
        own = float(subprocess.run(
            estbench("query", "SELECT sum(seconds) FROM provenance p JOIN shards s USING (path) "
                     "WHERE s.estimator = 'huber'", "--study", "study.yaml"),
            cwd=plain, capture_output=True, text=True, check=True).stdout.splitlines()[1])
        report = cpu_of(estbench("report", "study.yaml"), plain)

    print(f"machine: {os.cpu_count()} cores; {time.strftime('%Y-%m-%d %H:%M')}; "
          f"{args.replicates:,} replicates x 6 scenarios x 3 estimators, {total} shards")
    print(f"uninterrupted run: {uninterrupted:.1f} CPU-s")
    print(f"killed at {done_at_kill}/{total} shards: at most {first:.1f} (2 cores x wall) + rerun "
          f"{second:.1f} = {first + second:.1f} CPU-s -> at most {(first + second) / uninterrupted:.3f}x "
          f"the uninterrupted work")
    print(f"adding one estimator: {added:.1f} CPU-s; its own shard compute {own:.1f} s + report "
          f"{report:.1f} CPU-s = {own + report:.1f} -> {added / (own + report):.2f}x")


if __name__ == "__main__":
    main()
