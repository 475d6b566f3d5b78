"""Precision planning and Monte Carlo checks as a user sees them."""

from conftest import run_cli, tiny_study, write_study


def test_plan_before_any_run_gives_the_worst_case_and_the_published_example(tmp_path):
    # 95% coverage with a target MCSE of 0.5 percentage points needs 1900 replicates
    # (Morris, White & Crowther 2019, Statistics in Medicine 38:2074-2102, section 5.3).
    path = write_study(tmp_path, tiny_study(targets={"coverage": 0.005, "bias": 0.01}))
    out = run_cli("plan", path, cwd=tmp_path, check=True).stdout
    assert "worst-case plan before any run" in out
    lines = {tuple(line.split()[:3]) for line in out.splitlines()}
    assert ("coverage", "0.005", "10000") in lines      # 0.25 / 0.005^2
    assert ("coverage", "0.005", "1900") in lines       # 0.95 * 0.05 / 0.005^2
    assert ("bias", "0.01", "—") in lines               # needs a pilot run or an SD guess
    out = run_cli("plan", path, "--sd", "0.5", cwd=tmp_path, check=True).stdout
    assert ("bias", "0.01", "2500") in {tuple(line.split()[:3]) for line in out.splitlines()}
