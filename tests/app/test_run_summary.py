"""What `estbench run` says when it ends and how it exits: a summary read from the
store, a warning and exit status 3 when an estimator fails too often, exit 2 for a
bad `max_failed_share`, and no run lock left behind.

The failure counts are known by construction: the estimators below fail on every
replicate of a scenario, or on a fixed number of the 10 replicates of every seed
block, and tiny_study runs 6 blocks of 10 replicates in each of its 2 scenarios.
"""

import os

import pytest
from conftest import run_cli, tiny_study, write_study
from estbench.app import runner
from estbench.core.errors import UserError
from estbench.study.load import study_from_mapping

#: Estimators beside the study file (a water-testing lab's readings).
LAB_RULES = '''
import numpy as np


def picky_mean(x):
    """The mean, refusing fewer than 10 readings: fails on every replicate at n = 5."""
    if x.shape[1] < 10:
        raise ValueError("needs at least 10 readings")
    return x.mean(axis=1)


def patchy_mean(x, bad):
    """The mean, non-finite on the first `bad` replicates of every seed block."""
    estimate = x.mean(axis=1)
    estimate[:bad] = np.nan
    return estimate
'''


def _study_with(tmp_path, **estimators):
    (tmp_path / "lab_rules.py").write_text(LAB_RULES)
    study = tiny_study()
    study["estimators"].update(estimators)
    return write_study(tmp_path, study), study


def _patchy(bad: int) -> dict:
    return {"function": "lab_rules:patchy_mean", "target": "mean", "args": {"bad": bad}}


@pytest.mark.snakemake
def test_an_estimator_failing_on_every_replicate_of_a_scenario_exits_3_with_the_work_kept(tmp_path):
    path, _ = _study_with(tmp_path, picky={"function": "lab_rules:picky_mean", "target": "mean"})
    proc = run_cli("run", path, "--cores", "2", cwd=tmp_path)
    assert proc.returncode == 3, proc.stdout + proc.stderr
    lines = proc.stdout.splitlines()
    assert lines[0] == "estbench: done. 2 scenarios, 3 estimators, 360 estimates in the store"
    assert lines[1:5] == ["  failed replicates, over all scenarios:",
                          "    mean    0 of 120 (0.0%)",
                          "    median  0 of 120 (0.0%)",
                          "    picky   60 of 120 (50.0%)"]
    warning = "picky failed on every replicate of normal, n = 5 (60 of 60, 100%)"
    assert [line for line in lines if "warning:" in line] == [f"  warning: {warning}"]
    assert "  Report: results/tiny/report.html" in lines
    assert lines[-1] == ("estbench: finished with 1 warning about failed replicates (exit status 3); "
                         "the results and the report are kept")
    out = tmp_path / "results" / "tiny"
    for name in ("store.duckdb", "report.html", "performance.csv", "checks.csv"):
        assert (out / name).is_file(), name
    html = (out / "report.html").read_text()
    assert f"<li>{warning}</li>" in html
    assert "1 scenario × estimator pair failed too often</strong>" in html       # the glance section
    assert '60 of 60 <span class="mcse">(100%)</span>' in html and "e+02%" not in html
    assert not (out / ".run.lock").exists()


@pytest.mark.snakemake
def test_the_study_sets_the_failed_share_that_is_too_much(tmp_path):
    path, study = _study_with(tmp_path, patchy1=_patchy(1), patchy3=_patchy(3))
    proc = run_cli("run", path, "--cores", "2", cwd=tmp_path)
    assert proc.returncode == 3, proc.stdout + proc.stderr
    lines = proc.stdout.splitlines()
    assert "    patchy1  12 of 120 (10.0%)" in lines and "    patchy3  36 of 120 (30.0%)" in lines
    # 3 of every 10 is above the default 0.2, 1 of every 10 is not
    assert [line for line in lines if "warning:" in line] == [
        f"  warning: patchy3 failed on 18 of 60 replicates of normal, n = {n} (30.0%), "
        f"more than max_failed_share = 0.2" for n in (5, 20)]

    write_study(tmp_path, {**study, "max_failed_share": 0.5})
    proc = run_cli("run", path, "--cores", "2", cwd=tmp_path)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "warning:" not in proc.stdout and "    patchy3  36 of 120 (30.0%)" in proc.stdout
    assert "failed too often" not in (tmp_path / "results/tiny/report.html").read_text()
    stored = run_cli("query", path, "SELECT max_failed_share FROM study", cwd=tmp_path, check=True)
    assert stored.stdout.splitlines() == ['"max_failed_share"', "0.5"]


@pytest.mark.snakemake
def test_a_clean_run_sums_up_its_checks_and_leaves_no_lock(tmp_path):
    # MCSE of bias = SD/sqrt(n_sim), of the empirical SE = SE/sqrt(2(n_sim - 1)) (Morris, White &
    # Crowther 2019, Statistics in Medicine 38:2074, Table 6). The estimates' SD is at least
    # 1.5/sqrt(20) = 0.34 here, so with 60 replicates no bias MCSE comes near 1e-6 (4 not met),
    # and no empirical-SE MCSE near 10 (4 met).
    path = write_study(tmp_path, tiny_study(targets={"bias": 1e-6, "empirical_se": 10}))
    proc = run_cli("run", path, "--cores", "2", cwd=tmp_path)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    lines = proc.stdout.splitlines()
    assert lines[:4] == ["estbench: done. 2 scenarios, 2 estimators, 240 estimates in the store",
                         "  failed replicates, over all scenarios:",
                         "    mean    0 of 120 (0.0%)",
                         "    median  0 of 120 (0.0%)"]
    assert "  MCSE targets not met: 4 of 8" in lines
    flagged, alpha = run_cli("query", path, "SELECT count(*) FILTER (WHERE NOT passed), any_value(\"limit\") "
                             "FROM checks WHERE \"check\" = 'block_heterogeneity'",
                             cwd=tmp_path, check=True).stdout.splitlines()[1].split(",")
    # 4 tests (2 scenarios x 2 estimators), each flagging with probability alpha by chance
    assert f"  block heterogeneity flags: {flagged} of 4 tests (about {4 * float(alpha):.2g} expected " \
           f"by chance at alpha = {float(alpha):g})" in lines
    assert lines[-1] == "  Measures: results/tiny/performance.csv  Checks: results/tiny/checks.csv"
    assert not (tmp_path / "results/tiny/.run.lock").exists()


@pytest.mark.parametrize("value, rule", [(1, "must be < 1, got 1"), (-0.1, "must be >= 0, got -0.1"),
                                         ("high", "must be a number, got 'high'")])
def test_a_bad_max_failed_share_is_refused_with_one_line(tmp_path, value, rule):
    proc = run_cli("run", write_study(tmp_path, tiny_study(max_failed_share=value)), cwd=tmp_path)
    assert proc.returncode == 2 and "Traceback" not in proc.stderr
    head, *problems = proc.stderr.splitlines()
    assert head.endswith("has 1 problem:") and problems == [f"  `max_failed_share`: {rule}"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["study.yaml"]  # nothing written


# ------------------------------------------------------------------ the run lock


@pytest.fixture
def tiny(tmp_path):
    return study_from_mapping(tiny_study(), source=write_study(tmp_path, tiny_study()))


def test_the_lock_refuses_a_second_run_and_is_removed_when_the_run_ends(tmp_path, tiny):
    lock = tiny.layout(tmp_path).run_lock
    with runner.study_lock(tiny, tmp_path):
        assert lock.read_text() == str(os.getpid())
        refused = pytest.raises(UserError, match=f"in progress in this folder \\(pid {os.getpid()}\\)")
        with refused, runner.study_lock(tiny, tmp_path):
            pass
        assert lock.exists()
    assert not lock.exists()
    with pytest.raises(RuntimeError), runner.study_lock(tiny, tmp_path):
        raise RuntimeError("a run that fails")
    assert not lock.exists()


def test_a_starter_that_locked_a_removed_lock_file_starts_again(tmp_path, tiny, monkeypatch):
    # The race: a starter opens the lock file, the holder then removes it and a third
    # run creates a new one; the starter's lock is on the removed file, which guards
    # nothing. It must notice and lock the file now at the path.
    lock = tiny.layout(tmp_path).run_lock
    real_flock, calls = runner.fcntl.flock, []

    def flock_after_the_holder_left(fh, op):
        calls.append(op)
        if len(calls) == 1:
            lock.unlink()
            lock.write_text("")
        return real_flock(fh, op)

    monkeypatch.setattr(runner.fcntl, "flock", flock_after_the_holder_left)
    with runner.study_lock(tiny, tmp_path):
        assert len(calls) == 2
        assert lock.read_text() == str(os.getpid())   # the file at the path is the one held
    assert not lock.exists()
