"""End to end through real Snakemake, started the way users start it."""

import csv

import pyarrow.parquet as pq
import pytest

from conftest import run_cli, tiny_study, write_study

pytestmark = pytest.mark.snakemake


def _estimates(cwd, study_path):
    proc = run_cli("query", study_path, "SELECT scenario, estimator, rep, estimate FROM estimates "
                   "ORDER BY scenario, estimator, rep", cwd=cwd, check=True)
    return proc.stdout


def test_run_produces_store_csv_and_report(tmp_path):
    # An estimator module beside the study file, found without touching estbench.
    (tmp_path / "yard_rules.py").write_text(
        "def midrange(x):\n    return (x.min(axis=1) + x.max(axis=1)) / 2\n")
    study = tiny_study(description="Plot yields <b>bold</b> & co", targets={"bias": 0.5, "coverage": 0.05})
    study["estimators"]["midrange"] = study["estimators"].pop("median")
    study["estimators"]["midrange"]["function"] = "yard_rules:midrange"
    path = write_study(tmp_path, study)
    proc = run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    assert "Report: results/tiny/report.html" in proc.stdout
    out = tmp_path / "results" / "tiny"
    assert (out / "store.duckdb").is_file()
    rows = list(csv.DictReader(open(out / "performance.csv")))
    assert list(rows[0]) == ["scenario", "dgm", "n", "estimator", "target", "measure", "value",
                             "mcse", "n_ok", "n_failed"]
    measures = {(r["estimator"], r["measure"]) for r in rows}
    assert ("mean", "coverage") in measures and ("midrange", "coverage") not in measures
    assert ("midrange", "rmse") in measures
    assert ("midrange", "relative_efficiency") in measures and ("mean", "relative_efficiency") not in measures
    checks = list(csv.DictReader(open(out / "checks.csv")))
    assert {c["check"] for c in checks} == {"mcse_target", "block_heterogeneity"}
    assert {c["df"] for c in checks if c["check"] == "block_heterogeneity"} == {"5"}  # 6 blocks
    plan = run_cli("plan", path, cwd=tmp_path, check=True).stdout
    assert "normal n=20" in plan and "coverage" in plan
    assert {r["n_ok"] for r in rows} == {"60"}
    html = (out / "report.html").read_text()
    assert "<svg" in html and "Plot yields &lt;b&gt;bold&lt;/b&gt; &amp; co" in html
    assert 'id="precision"' in html and "Between-block heterogeneity" in html
    assert "http://" not in html and "https://" not in html
    status = run_cli("status", path, cwd=tmp_path, check=True).stdout
    assert "8 of 8 shards up to date; the next run computes 0 shard(s) in 0 job(s)" in status and "mean: 120 replicates in 2 scenario(s), 0 failed" in status
    # report re-renders from the store alone
    (out / "report.html").unlink()
    run_cli("report", path, cwd=tmp_path, check=True)
    assert (out / "report.html").read_text() == html
    bad = run_cli("query", path, "SELECT nope FROM estimates", cwd=tmp_path)
    assert bad.returncode == 2 and "query failed" in bad.stderr and "Traceback" not in bad.stderr


def test_results_are_bit_identical_across_job_sizes_and_cores(tmp_path):
    outputs = {}
    # (the demo study is run more ways in test_exact_results.py)
    for blocks_per_job, cores in [(1, 2), (6, 1)]:
        cwd = tmp_path / f"bpj{blocks_per_job}-c{cores}"
        cwd.mkdir()
        path = write_study(cwd, tiny_study(blocks_per_job=blocks_per_job))
        run_cli("run", path, "--cores", cores, cwd=cwd, check=True)
        outputs[(blocks_per_job, cores)] = (_estimates(cwd, path),
                                            (cwd / "results/tiny/performance.csv").read_text())
    first = outputs[(1, 2)]
    assert first[0].count("\n") == 241
    for key, value in outputs.items():
        assert value == first, f"results differ for blocks_per_job, cores = {key}"


def test_growing_the_study_keeps_existing_shards(tmp_path):
    path = write_study(tmp_path, tiny_study())
    run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    shards = sorted((tmp_path / "results/tiny/shards").rglob("*.parquet"))
    before = {p: (p.stat().st_mtime_ns, pq.read_table(p).column("estimate").to_numpy().tobytes())
              for p in shards}
    grown = tiny_study(sample_sizes=[5, 20, 50])
    grown["estimators"]["trim"] = {"function": "location:trimmed_mean", "target": "mean",
                                   "args": {"proportion": 0.2}}
    write_study(tmp_path, grown)
    plan = run_cli("status", path, cwd=tmp_path, check=True).stdout
    # New: trim in the 2 old scenarios x 2 jobs, every estimator in the n=50 scenario's 2 jobs.
    assert "8 of 18 shards up to date; the next run computes 10 shard(s) in 6 job(s)" in plan
    assert "  trim: 6 shard(s), 180 replicates: missing" in plan
    run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    after = sorted((tmp_path / "results/tiny/shards").rglob("*.parquet"))
    assert len(after) == 3 * 3 * 2  # scenarios x estimators x shards per pair
    for p, (mtime, data) in before.items():
        assert p.stat().st_mtime_ns == mtime, f"{p} was recomputed"
        assert pq.read_table(p).column("estimate").to_numpy().tobytes() == data
    status = run_cli("status", path, cwd=tmp_path, check=True).stdout
    assert "trim: 180 replicates in 3 scenario(s)" in status


def test_interrupted_before_ingest_loses_nothing(tmp_path):
    path = write_study(tmp_path, tiny_study())
    # Stop after the simulation jobs, as a kill between shard write and ingest would.
    until = run_cli("run", path, "--cores", "2", "--", "--until", "simulate", cwd=tmp_path, check=True)
    assert "Report:" not in until.stdout and "the report was not brought up to date" in until.stdout
    assert not (tmp_path / "results/tiny/store.duckdb").exists()
    shards = sorted((tmp_path / "results/tiny/shards").rglob("*.parquet"))
    mtimes = [p.stat().st_mtime_ns for p in shards]
    assert len(shards) == 8
    run_cli("run", path, "--cores", "2", cwd=tmp_path, check=True)
    assert [p.stat().st_mtime_ns for p in shards] == mtimes  # nothing recomputed
    assert _estimates(tmp_path, path).count("\n") == 241


def test_dry_run_lists_the_jobs_and_claims_no_report(tmp_path):
    path = write_study(tmp_path, tiny_study())
    proc = run_cli("run", path, "--cores", "2", "--", "--dry-run", cwd=tmp_path, check=True)
    out = proc.stdout + proc.stderr
    assert "simulate" in out and "ingest" in out and "report" in out  # Snakemake's own job list
    assert "Report:" not in out and "estbench: done." not in out and "dry run" in proc.stdout
    assert not list((tmp_path / "results").rglob("*.parquet"))
    assert not (tmp_path / "results/tiny/store.duckdb").exists()
