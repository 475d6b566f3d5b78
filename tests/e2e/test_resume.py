"""Run big, survive anything: kills, concurrent runs, damaged shards, edits."""

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from estbench.core.hashing import code_hash
from estbench.simulate.shard import read_metadata

from conftest import run_cli, tiny_study, write_study

pytestmark = pytest.mark.snakemake

SLOW_MODULE = "import time\n\ndef slow_mean(x):\n    time.sleep(0.4)\n    return x.mean(axis=1)\n"


def _study(cwd: Path, **overrides) -> Path:
    (cwd / "slow_bits.py").write_text(SLOW_MODULE)
    study = tiny_study(blocks_per_job=2, **overrides)
    study["estimators"]["slow"] = {"function": "slow_bits:slow_mean", "target": "mean"}
    return write_study(cwd, study)


def _start(cwd: Path, path: Path) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "estbench.app.cli", "run", str(path), "--cores", "2"],
                            cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)


def _running(fragment: str, session: int | None = None) -> bool:
    """Is a process of *session* (all sessions if None) whose command line contains
    *fragment* alive? Read from /proc; other runs on the machine do not count."""
    for pid in filter(str.isdigit, os.listdir("/proc")):
        try:
            if session is not None and os.getsid(int(pid)) != session:
                continue
            if fragment in Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode():
                return True
        except OSError:
            continue
    return False


def _kill_when(proc: subprocess.Popen, ready, timeout: float = 120) -> None:
    deadline = time.monotonic() + timeout
    while not ready():
        assert proc.poll() is None, f"run ended before the kill point: {proc.communicate()}"
        assert time.monotonic() < deadline, "kill point never reached"
        time.sleep(0.02)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()


def _outputs(cwd: Path, path: Path) -> tuple[str, str]:
    counts = run_cli("query", path, "SELECT count(*) AS n, count(DISTINCT (scenario, estimator, rep)) AS d "
                     "FROM estimates", cwd=cwd, check=True).stdout
    return counts, (cwd / "results/tiny/performance.csv").read_text()


@pytest.fixture(scope="module")
def uninterrupted(tmp_path_factory):
    cwd = tmp_path_factory.mktemp("reference")
    path = _study(cwd)
    run_cli("run", path, "--cores", "2", cwd=cwd, check=True)
    return _outputs(cwd, path)


def _shards(cwd):
    return sorted((cwd / "results/tiny/shards").rglob("*.parquet")) if (cwd / "results").exists() else []


@pytest.mark.parametrize("stage", ["ingest", "report"])   # during the shards: test_exact_results.py
def test_sigkill_at_any_stage_then_rerun_gives_identical_results(tmp_path, uninterrupted, stage):
    path = _study(tmp_path)
    proc = _start(tmp_path, path)
    ready = {"ingest": lambda: _running("estbench.analyse.store", proc.pid),
             "report": lambda: _running("estbench.report.render", proc.pid)}[stage]
    _kill_when(proc, ready)
    rerun = run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    assert "cleared Snakemake's locks left by a run that was killed" in rerun.stderr
    counts, csv_text = _outputs(tmp_path, path)
    assert counts == uninterrupted[0] == '"n","d"\n360,360\n'  # none missing, none twice
    assert csv_text == uninterrupted[1]  # byte-identical measures


def test_a_packed_job_killed_midway_keeps_its_finished_pieces(tmp_path, uninterrupted):
    """All 6 pieces in one job (values_per_job): killed after two pieces, the rerun keeps
    their shards as they are, and the results equal the one-job-per-piece reference."""
    path = _study(tmp_path, values_per_job=10**9)
    proc = _start(tmp_path, path)
    _kill_when(proc, lambda: len(_shards(tmp_path)) >= 2 * 3)  # two pieces x three estimators
    kept = {p: p.stat().st_mtime_ns for p in _shards(tmp_path)}
    assert 6 <= len(kept) < 18 and len(list((tmp_path / "results/tiny/jobs").rglob("*.json"))) == 0
    run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    assert all(p.stat().st_mtime_ns == mtime for p, mtime in kept.items())
    assert len(_shards(tmp_path)) == 18 and len(list((tmp_path / "results/tiny/jobs").rglob("*.json"))) == 1
    assert _outputs(tmp_path, path) == uninterrupted


def test_second_concurrent_run_is_refused(tmp_path):
    path = _study(tmp_path)
    first = _start(tmp_path, path)
    try:
        _kill_when_started = time.monotonic()
        while not _running("estbench.simulate.job", first.pid):
            assert time.monotonic() - _kill_when_started < 60 and first.poll() is None
            time.sleep(0.05)
        second = run_cli("run", path, "--cores", "1", cwd=tmp_path)
        assert second.returncode == 2
        assert f"another `estbench run` of study 'tiny' is in progress in this folder (pid {first.pid})" \
            in second.stderr
    finally:
        first.wait(timeout=300)
    assert first.returncode == 0


def test_damaged_shards_are_recomputed(tmp_path, uninterrupted):
    path = _study(tmp_path)
    run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    shards = _shards(tmp_path)
    shards[0].write_bytes(shards[0].read_bytes()[:200])           # truncated: caught before Snakemake
    data = bytearray(shards[5].read_bytes())
    data[40] ^= 0x40              # bit flip in the first data page: only ingest's page checksums see it
    shards[5].write_bytes(bytes(data))
    rerun = run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    assert "removed a damaged shard, to be recomputed" in rerun.stderr
    assert "ingest found damaged shards" in rerun.stderr
    assert _outputs(tmp_path, path) == uninterrupted


def test_editing_one_estimator_module_reruns_only_its_shards(tmp_path):
    path = _study(tmp_path)
    run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    before = {p: p.stat().st_mtime_ns for p in _shards(tmp_path)}
    (tmp_path / "slow_bits.py").write_text(SLOW_MODULE.replace("time.sleep(0.4)", "time.sleep(0.1)"))
    run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    changed = {p.parent.name for p in _shards(tmp_path) if p.stat().st_mtime_ns != before[p]}
    assert changed == {"slow"}
    assert sum(p.parent.name == "slow" and p.stat().st_mtime_ns != before[p] for p in _shards(tmp_path)) == 6
    assert {read_metadata(p)["code_hash"] for p in _shards(tmp_path) if p.parent.name == "slow"} \
        == {code_hash([tmp_path / "slow_bits.py"])}


def test_more_replicates_only_adds_seed_blocks(tmp_path):
    path = _study(tmp_path, replicates=50)  # 5 blocks: shards of blocks 0-1, 2-3, 4
    run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    first = {p: pq.read_table(p) for p in _shards(tmp_path)}
    _study(tmp_path, replicates=80)       # 8 blocks: 4 grows to 4-5, 6-7 is new
    rerun = run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    for p, table in first.items():
        grown = pq.read_table(p)
        assert grown.slice(0, table.num_rows).column("estimate").equals(table.column("estimate"))
        if p.name == "4.parquet":
            info = read_metadata(p)
            assert info["reused_blocks"] == 1 and info["n_blocks"] == 2
    assert len(_shards(tmp_path)) == 2 * 3 * 4
    counts = run_cli("query", path, "SELECT count(*) FROM estimates", cwd=tmp_path, check=True)
    assert counts.stdout.splitlines()[1] == str(2 * 3 * 80)
    assert rerun.returncode == 0


def test_until_precise_stops_at_the_first_sufficient_block_count(tmp_path):
    # One scenario: SD of the mean is 1.5/sqrt(20) = 0.335, so a bias MCSE of 0.04 needs
    # about (0.335/0.04)^2 = 70 replicates (Morris, White & Crowther 2019: n_sim = Var/MCSE^2).
    study = tiny_study(sample_sizes=[20], replicates=20, estimators={
        "mean": {"function": "location:mean", "target": "mean"}}, reference="mean",
        targets={"bias": 0.04})
    cwd = tmp_path / "precise"
    cwd.mkdir()
    path = write_study(cwd, study)
    out = run_cli("run", path, "--cores", "2", "--until-precise", cwd=cwd, check=True)
    assert "1 of 1 scenarios meet every target" in out.stderr
    allocation = __import__("json").loads((cwd / "results/tiny/allocation.json").read_text())
    (blocks,) = allocation.values() or [2]
    assert 4 <= blocks <= 20
    rows = run_cli("query", path, "SELECT value, mcse FROM performance WHERE measure = 'bias'",
                   cwd=cwd, check=True).stdout.splitlines()[1]
    assert float(rows.split(",")[1]) <= 0.04
    # One block fewer would not have met the target ...
    fewer = tmp_path / "fewer"
    fewer.mkdir()
    run_cli("run", write_study(fewer, {**study, "replicates": (blocks - 1) * 10}), "--cores", "2",
            cwd=fewer, check=True)
    mcse = run_cli("query", fewer / "study.yaml", "SELECT mcse FROM performance WHERE measure = 'bias'",
                   cwd=fewer, check=True).stdout.splitlines()[1]
    assert float(mcse) > 0.04
    # ... and a plain run with the final replicate count gives the same numbers.
    fixed = tmp_path / "fixed"
    fixed.mkdir()
    run_cli("run", write_study(fixed, {**study, "replicates": blocks * 10}), "--cores", "2",
            cwd=fixed, check=True)
    assert (fixed / "results/tiny/performance.csv").read_text() == \
        (cwd / "results/tiny/performance.csv").read_text()
