"""Ingest's memory and time as the store grows: 10^6, 10^7 and (opt-in) 10^8 estimate rows.

    .venv/bin/python benchmarks/ingest_scale.py [--rows 1e6 1e7] [--with-1e8]

For each size it writes the synthetic shards of ``report_scale.py`` (20
scenarios x 5 estimators; invented numbers) and runs the workflow's ingest step,
``python -m estbench.analyse.store``, in a fresh process, recording its wall time and
peak resident memory (VmHWM). Ingest streams the Parquet row groups into DuckDB,
so its memory must stay flat while the rows grow a hundredfold. The 10^8 row
needs about 4 GB of shards and 3 GB of store on disk.
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

sys.path.insert(0, str(Path(__file__).resolve().parent))
from report_scale import write_shards  # noqa: E402

_CHILD = """
import json, sys, time
from estbench.analyse.store import main
start = time.perf_counter()
code = main(["--study", sys.argv[1], "--store", sys.argv[2]])
seconds = time.perf_counter() - start
peak = next(int(l.split()[1]) for l in open("/proc/self/status") if l.startswith("VmHWM:"))
print(json.dumps({"code": code, "seconds": seconds, "peak_kib": peak}))
"""


def measure(rows: int) -> dict:
    reps = rows // 100  # 20 scenarios x 5 estimators
    with tempfile.TemporaryDirectory(prefix="estbench-ingest-") as tmp:
        folder = Path(tmp)
        start = time.perf_counter()
        study, path, shards = write_shards(folder, reps)
        built = time.perf_counter() - start
        store = folder / "results" / study.name / "store.duckdb"
        store.parent.mkdir(parents=True, exist_ok=True)
        proc = subprocess.run([sys.executable, "-c", _CHILD, str(path), str(store)], cwd=folder,
                              capture_output=True, text=True, check=True)
        result = json.loads(proc.stdout.strip().splitlines()[-1])
        result.update(rows=rows, built=built, shard_mib=sum(p.stat().st_size for p in shards) / 2**20,
                      store_mib=store.stat().st_size / 2**20)
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=float, nargs="+", default=[1e6, 1e7])
    parser.add_argument("--with-1e8", action="store_true", help="add the 10^8-row store")
    args = parser.parse_args()
    sizes = [int(r) for r in args.rows] + ([10**8] if args.with_1e8 else [])
    print(f"machine: {os.cpu_count()} cores; {time.strftime('%Y-%m-%d %H:%M')}")
    print("rows | shards MiB | store MiB | ingest s | ingest peak RSS MiB")
    results = []
    for rows in sizes:
        r = measure(rows)
        results.append(r)
        print(f"{r['rows']:,} | {r['shard_mib']:.0f} | {r['store_mib']:.0f} | {r['seconds']:.1f} | "
              f"{r['peak_kib'] / 1024:.0f}", flush=True)
    first, last = results[0], results[-1]
    print(f"rows x{last['rows'] / first['rows']:.0f} -> ingest peak memory x"
          f"{last['peak_kib'] / first['peak_kib']:.2f}, time x{last['seconds'] / first['seconds']:.1f}")


if __name__ == "__main__":
    main()
