"""`estbench new estimator`: the scaffold works as written and plugs into a study."""

import subprocess
import sys

from conftest import run_cli, tiny_study, write_study


def test_new_estimator_scaffold_runs_its_tests_and_passes_check(tmp_path):
    out = run_cli("new", "estimator", "plot_centre", "--dir", tmp_path, cwd=tmp_path, check=True).stdout
    assert "wrote" in out and (tmp_path / "plot_centre.py").exists()
    tests = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider",
                            "test_plot_centre.py"], cwd=tmp_path, capture_output=True, text=True)
    assert tests.returncode == 0 and "2 passed" in tests.stdout, tests.stdout + tests.stderr
    study = tiny_study()
    study["estimators"]["plot_centre"] = {"function": "plot_centre:plot_centre", "target": "mean"}
    assert run_cli("check", write_study(tmp_path, study), cwd=tmp_path).returncode == 0
    again = run_cli("new", "estimator", "plot_centre", "--dir", tmp_path, cwd=tmp_path)
    assert again.returncode == 2 and "already exists" in again.stderr
    bad = run_cli("new", "estimator", "2fast", "--dir", tmp_path, cwd=tmp_path)
    assert bad.returncode == 2 and "`NAME` must be a Python identifier" in bad.stderr


def test_every_example_study_is_valid():
    from estbench.core.bundled import EXAMPLE_STUDIES
    for path in sorted(EXAMPLE_STUDIES.glob("*.yaml")):
        proc = run_cli("check", path, cwd=path.parent)
        assert proc.returncode == 0, f"{path.name}: {proc.stderr}"


def test_scaffold_test_passes_for_an_estimator_returning_a_plain_array(tmp_path):
    """The contract allows returning estimates alone (README, "Adding an estimator")."""
    run_cli("new", "estimator", "plot_mean", "--dir", tmp_path, cwd=tmp_path, check=True)
    module = tmp_path / "plot_mean.py"
    text = module.read_text()
    body = text[:text.index("    x = np.asarray(x, dtype=float)")] + "    return np.asarray(x, dtype=float).mean(axis=1)\n"
    module.write_text(body)
    tests = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider",
                            "test_plot_mean.py"], cwd=tmp_path, capture_output=True, text=True)
    assert tests.returncode == 0 and "2 passed" in tests.stdout, tests.stdout + tests.stderr


def test_new_estimator_refuses_names_that_hide_other_modules(tmp_path):
    builtin = run_cli("new", "estimator", "location", "--dir", tmp_path, cwd=tmp_path)
    assert builtin.returncode == 2 and "would hide estbench's built-in estimator module location" in builtin.stderr
    for name in ("json", "numpy"):   # the standard library, an installed package
        proc = run_cli("new", "estimator", name, "--dir", tmp_path, cwd=tmp_path)
        assert proc.returncode == 2 and "already an importable Python module" in proc.stderr
    assert list(tmp_path.iterdir()) == []
