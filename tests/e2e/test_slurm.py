"""A study run on a real SLURM cluster gives byte-identical results to a local run.

Needs a running cluster: `.ci/slurm-up` (as root) starts a one-node one on this
machine. Without a cluster the test fails on CI (where CI is set) and is skipped
on a developer's machine, saying why.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess

import pytest

from conftest import ROOT, run_cli, tiny_study, write_study

pytestmark = pytest.mark.snakemake

SLURM_PROFILE = ROOT / "workflow" / "profiles" / "slurm"
# sinfo's long node states in which a node takes jobs (a trailing * would mean
# the node does not respond).
READY_STATES = {"idle", "mixed", "allocated", "completing"}


def _cluster_problem() -> str | None:
    """Why no job can be submitted to SLURM from here, or None if a node is ready."""
    if shutil.which("sinfo") is None or shutil.which("squeue") is None:
        return "the SLURM client commands (sinfo, squeue) are not installed"
    try:
        proc = subprocess.run(["sinfo", "--noheader", "--Node", "--format=%T"],
                              capture_output=True, text=True, timeout=30)
    except subprocess.TimeoutExpired:
        return "`sinfo` did not answer within 30 s"
    if proc.returncode != 0:
        return f"`sinfo` failed: {proc.stderr.strip()}"
    states = set(proc.stdout.split())
    if not states & READY_STATES:
        return f"no SLURM node takes jobs (node states: {', '.join(sorted(states)) or 'none'})"
    return None


@pytest.fixture(scope="module")
def slurm_cluster() -> None:
    problem = _cluster_problem()
    if problem is None:
        return
    if os.environ.get("CI", "").lower() not in ("", "0", "false"):
        pytest.fail(f"CI must test the SLURM profile, but {problem}; "
                    "`.ci/slurm-up` (run as root) starts a one-node cluster", pytrace=False)
    pytest.skip(f"no SLURM cluster here: {problem}; run `.ci/slurm-up` as root to start one")


def _slurm_jobs(run_id: str) -> list[tuple[str, str]]:
    """(state, comment) of every job SLURM still lists under this Snakemake run's job name."""
    proc = subprocess.run(["squeue", "--noheader", "--states=all", f"--name={run_id}",
                           "--format=%T|%k"], capture_output=True, text=True, timeout=30, check=True)
    return [tuple(line.split("|", 1)) for line in proc.stdout.splitlines()]


def _results(cwd, study_path) -> tuple[str, bytes]:
    estimates = run_cli("query", study_path, "SELECT scenario, estimator, rep, estimate FROM estimates "
                        "ORDER BY 1, 2, 3", cwd=cwd, check=True).stdout
    return estimates, (cwd / "results/tiny/performance.csv").read_bytes()


def test_slurm_run_matches_local_run(tmp_path, slurm_cluster):
    # 2 scenarios x 2 estimators, 6 seed blocks each in one job: 4 SLURM jobs.
    study = tiny_study(blocks_per_job=6)
    local, cluster = tmp_path / "local", tmp_path / "cluster"
    local.mkdir()
    cluster.mkdir()
    local_study, cluster_study = write_study(local, study), write_study(cluster, study)

    run_cli("run", local_study, "--cores", "2", cwd=local, check=True)
    # --verbose: Snakemake's own log on stderr, to read what the executor did
    proc = run_cli("run", cluster_study, "--cores", "2", "--verbose", "--", "--profile", SLURM_PROFILE,
                   cwd=cluster, check=True, timeout=240)
    log = proc.stdout + proc.stderr

    # Evidence from SLURM itself, without accounting: the plugin names every job
    # after the run and comments it with the rule and wildcards; squeue lists
    # finished jobs for MinJobAge (300 s on the .ci/slurm-up cluster).
    run_id = re.search(r"SLURM run ID: (\S+)", log)
    assert run_id, f"the run did not go through the SLURM executor:\n{log}"
    assert len(list((cluster / "results/tiny/shards").rglob("*.parquet"))) == 4
    records = sorted((cluster / "results/tiny/jobs").rglob("*.json"))
    assert len(records) == 2  # one job per scenario, each writing a shard per estimator
    expected = sorted(f"rule_simulate_wildcards_{p.parent.name}_{p.stem}" for p in records)
    jobs = _slurm_jobs(run_id.group(1))
    assert sorted(comment for _, comment in jobs) == expected, "one SLURM job per simulation job, and only those"
    assert {state for state, _ in jobs} == {"COMPLETED"}
    # ingest and report read and write the store on this machine
    assert "localrule ingest:" in log and "localrule report:" in log

    estimates, performance = _results(cluster, cluster_study)
    assert estimates.count("\n") == 1 + 2 * 2 * 60  # header + scenarios x estimators x replicates
    assert (estimates, performance) == _results(local, local_study)


def test_profile_reads_partition_and_account_from_the_environment(tmp_path, monkeypatch):
    # A dry run plans the SLURM jobs without a cluster, showing each job's resources.
    path = write_study(tmp_path, tiny_study(blocks_per_job=6))

    def planned_job_resources() -> list[str]:
        proc = run_cli("run", path, "--verbose", "--", "--profile", SLURM_PROFILE, "--dry-run",
                       cwd=tmp_path, check=True)
        resources, rule = [], None
        for line in (proc.stdout + "\n" + proc.stderr).splitlines():
            if re.fullmatch(r"(local)?rule \w+:", line):
                rule = line
            elif rule == "rule simulate:" and line.strip().startswith("resources:"):
                resources.append(line.strip())
        return resources

    monkeypatch.delenv("ESTBENCH_SLURM_PARTITION", raising=False)
    monkeypatch.delenv("ESTBENCH_SLURM_ACCOUNT", raising=False)
    unset = planned_job_resources()
    assert len(unset) == 2 and not any("slurm_" in line for line in unset), unset

    monkeypatch.setenv("ESTBENCH_SLURM_PARTITION", "short")
    monkeypatch.setenv("ESTBENCH_SLURM_ACCOUNT", "survey_team")
    chosen = planned_job_resources()
    assert len(chosen) == 2, chosen
    for line in chosen:
        assert "slurm_partition=short" in line and "slurm_account=survey_team" in line, line
