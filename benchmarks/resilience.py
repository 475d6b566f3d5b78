"""What interruptions and growth cost, as ratios of CPU time measured in one run.

    .venv/bin/python benchmarks/resilience.py [--replicates 800000]

- resume: a cold run is killed (SIGKILL to its process group) when about half
  its jobs are done, then run again to the end. Work = CPU seconds of every
  process of both runs (children included) against one uninterrupted run.
- add an estimator: a finished study gains one estimator and runs again.
  Work = CPU seconds of that run against that estimator's own compute (its
  shards' seconds from the store's provenance: drawing the data it needs and
  applying it) plus the report step alone (``estbench report``).

CPU time, unlike wall time, does not move with other load on a shared machine.
The default size (22 jobs of a few seconds each with auto job sizing) is the
smallest where a kill's loss, at most the jobs running at that moment, and one
more start of estbench and Snakemake are small against the whole run; a
tiny study measures mostly those fixed costs.
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
    "study": "resilience", "seed": 99, "block_size": 1000,
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


def session_cpu(session: int) -> float:
    """CPU seconds used so far by every process of *session* and the children they reaped.

    Each live process counts its own time (utime + stime) and that of the children
    it has reaped (cutime + cstime), so every CPU second is counted once.
    """
    tick = os.sysconf("SC_CLK_TCK")
    total = 0
    for pid in filter(str.isdigit, os.listdir("/proc")):
        try:
            if os.getsid(int(pid)) != session:
                continue
            fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            continue
        total += sum(int(v) for v in fields[11:15])  # utime stime cutime cstime
    return total / tick


def killed_work(cmd, cwd, stop_when) -> float:
    """CPU seconds of a run killed with SIGKILL when *stop_when* turns true, read from
    /proc just before the kill (killed processes are reaped by init, so their time
    never reaches this process's RUSAGE_CHILDREN)."""
    proc = subprocess.Popen(cmd, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    used = 0.0
    while proc.poll() is None and not stop_when():
        used = session_cpu(proc.pid)
        time.sleep(0.02)
    used = max(used, session_cpu(proc.pid))
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    return used


def estbench(*args) -> list[str]:
    return [sys.executable, "-m", "estbench.app.cli", *map(str, args)]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=800_000)
    args = parser.parse_args()
    study = {**STUDY, "replicates": args.replicates}
    with tempfile.TemporaryDirectory(prefix="estbench-resilience-") as tmp:
        tmp = Path(tmp)
        plain, killed = tmp / "plain", tmp / "killed"
        for folder in (plain, killed):
            folder.mkdir()
            (folder / "study.yaml").write_text(yaml.safe_dump(study, sort_keys=False))
        uninterrupted = cpu_of(estbench("run", "study.yaml", "--cores", "2"), plain)

        records = killed / "results" / "resilience" / "jobs"
        total = len(list((plain / "results" / "resilience" / "jobs").rglob("*.json")))
        half = lambda: records.exists() and len(list(records.rglob("*.json"))) >= total // 2
        first = killed_work(estbench("run", "study.yaml", "--cores", "2"), killed, half)
        done_at_kill = len(list(records.rglob("*.json")))
        second = cpu_of(estbench("run", "study.yaml", "--cores", "2"), killed)

        grown = {**study, "estimators": {**study["estimators"], **EXTRA}}
        (plain / "study.yaml").write_text(yaml.safe_dump(grown, sort_keys=False))
        added = cpu_of(estbench("run", "study.yaml", "--cores", "2"), plain)
        own = float(subprocess.run(
            estbench("query", "study.yaml", "SELECT sum(seconds) FROM provenance p JOIN shards s USING (path) "
                     "WHERE s.estimator = 'huber'"),
            cwd=plain, capture_output=True, text=True, check=True).stdout.splitlines()[1])
        report = cpu_of(estbench("report", "study.yaml"), plain)

    print(f"machine: {os.cpu_count()} cores; {time.strftime('%Y-%m-%d %H:%M')}; "
          f"{args.replicates:,} replicates x 6 scenarios x 3 estimators, {total} jobs")
    print(f"uninterrupted run: {uninterrupted:.1f} CPU-s")
    print(f"killed at {done_at_kill}/{total} jobs: {first:.1f} + rerun {second:.1f} = "
          f"{first + second:.1f} CPU-s -> {(first + second) / uninterrupted:.3f}x the uninterrupted work")
    print(f"adding one estimator: {added:.1f} CPU-s; its own shard compute {own:.1f} s + report "
          f"{report:.1f} CPU-s = {own + report:.1f} -> {added / (own + report):.2f}x")


if __name__ == "__main__":
    main()
