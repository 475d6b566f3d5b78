"""The same numbers to the last bit, however the demo study is run.

The demo study (its mechanisms, estimators and reference), narrowed to two
sample sizes and 200 replicates to keep CI short, is run straight; in one-block
jobs killed at several points and resumed on one core (DuckDB with one
thread); ingested shard by shard in reversed order; and on the one-node SLURM
cluster. performance.csv and checks.csv must be byte-identical every time. At
n = 5 the demo's 10% trimmed mean trims nothing, so its comparison with the
mean is the near-degenerate case where summation order used to show.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
import yaml

from estbench.analyse.store import ingest
from estbench.study.allocation import with_allocation
from estbench.study.jobs import shard_paths
from estbench.study.load import load_study

from conftest import ROOT, run_cli, tiny_study, write_study
from test_resume import _kill_when, _running, _start
from test_slurm import SLURM_PROFILE, slurm_cluster  # noqa: F401 (a fixture)

pytestmark = pytest.mark.snakemake

DEMO = ROOT / "config" / "config.yaml"


def _demo(**overrides) -> dict:
    study = yaml.safe_load(DEMO.read_text())
    study.update(replicates=200, sample_sizes=[5, 25], **overrides)
    return study


def _results(cwd: Path) -> Path:
    return cwd / "results" / _demo()["study"]


def _outputs(cwd: Path) -> tuple[bytes, bytes]:
    out = _results(cwd)
    return (out / "performance.csv").read_bytes(), (out / "checks.csv").read_bytes()


@pytest.fixture(scope="module")
def straight(tmp_path_factory) -> tuple[Path, tuple[bytes, bytes]]:
    cwd = tmp_path_factory.mktemp("straight")
    run_cli("run", write_study(cwd, _demo()), "--cores", "2", cwd=cwd, check=True)
    performance, checks = _outputs(cwd)
    assert performance.count(b"\n") > 250 and checks.count(b"\n") > 40   # whole tables, not empty ones
    return cwd, (performance, checks)


def test_one_block_jobs_killed_at_several_points_and_resumed_on_one_core(tmp_path, straight):
    # one-block jobs (the straight run has one job per scenario); the last run on one
    # core, so its ingest runs DuckDB on one thread (the straight run's on two)
    path = write_study(tmp_path, _demo(blocks_per_job=1))
    shards = _results(tmp_path) / "shards"

    def made(k):
        return lambda: len(list(shards.rglob("*.parquet"))) >= k

    for ready in (made(3), made(20)):     # during the simulation, twice
        proc = _start(tmp_path, path)
        _kill_when(proc, lambda: ready() and _running("estbench.simulate.job", proc.pid))
    proc = _start(tmp_path, path)         # then during ingest
    _kill_when(proc, lambda: _running("estbench.analyse.store", proc.pid))
    rerun = run_cli("run", path, "--cores", "1", cwd=tmp_path, check=True)
    assert "cleared Snakemake's locks left by a run that was killed" in rerun.stderr
    assert _outputs(tmp_path) == straight[1]


def test_ingested_shard_by_shard_in_reversed_order(tmp_path, straight):
    # the straight run's shards, loaded one at a time, last first, by DuckDB on one thread
    shutil.copytree(straight[0] / "results", tmp_path / "results")
    for name in ("store.duckdb", "performance.csv", "checks.csv", "report.html"):
        (_results(tmp_path) / name).unlink()
    path = write_study(tmp_path, _demo())
    study = with_allocation(load_study(path), tmp_path)
    layout = study.layout(tmp_path)
    shards = shard_paths(study, layout)[::-1]
    assert len(shards) == 18
    for k in range(1, len(shards) + 1):
        ingest(layout.store, study, shards[:k], threads=1)
    run_cli("report", path, cwd=tmp_path, check=True)
    assert _outputs(tmp_path) == straight[1]


def test_slurm_cluster_gives_the_same_bits(tmp_path, straight, slurm_cluster):  # noqa: F811
    path = write_study(tmp_path, _demo())
    run_cli("run", path, "--cores", "2", "--", "--profile", SLURM_PROFILE, cwd=tmp_path, check=True, timeout=400)
    assert _outputs(tmp_path) == straight[1]


def test_two_estimators_with_the_same_function_compare_exactly(tmp_path):
    study = tiny_study()
    study["estimators"]["mean_again"] = {"function": "location:mean", "target": "mean"}
    run_cli("run", write_study(tmp_path, study), "--cores", "2", cwd=tmp_path, check=True)
    lines = (tmp_path / "results/tiny/performance.csv").read_text().splitlines()
    header = lines[0].replace('"', "").split(",")
    rows = [dict(zip(header, line.replace('"', "").split(","))) for line in lines[1:]]
    paired = {(r["scenario"], r["measure"]): (float(r["value"]), float(r["mcse"]))
              for r in rows if r["estimator"] == "mean_again"}
    for scenario in {s for s, _ in paired}:
        assert paired[(scenario, "relative_efficiency")] == (1.0, 0.0)
        assert paired[(scenario, "relative_mse")] == (1.0, 0.0)
        assert paired[(scenario, "bias_diff")] == (0.0, 0.0)
        assert paired[(scenario, "mse_diff")] == (0.0, 0.0)
    assert len({s for s, _ in paired}) == 2
