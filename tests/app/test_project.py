"""`estbench init` makes a study project, and verbs find its study without being told."""

import subprocess
import sys
from pathlib import Path

from conftest import run_cli, tiny_study, write_study


def test_init_makes_a_project_whose_plug_in_passes_its_tests_and_the_check(tmp_path):
    project = tmp_path / "orchard"
    out = run_cli("init", project, cwd=tmp_path, check=True).stdout
    assert sorted(str(p.relative_to(project)) for p in project.rglob("*") if p.is_file()) == [
        ".gitignore", "README.md", "estimators/midhinge.py", "estimators/test_midhinge.py", "study.yaml"]
    assert "results/" in (project / ".gitignore").read_text() and "estbench run" in out
    tests = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "estimators"],
                           cwd=project, capture_output=True, text=True)
    assert tests.returncode == 0 and "3 passed" in tests.stdout, tests.stdout + tests.stderr
    check = run_cli("check", cwd=project, check=True)      # no study named: ./study.yaml
    assert "using the study file study.yaml" in check.stderr
    assert "6 scenario(s), 3 estimator(s), 1000 replicates per scenario" in check.stdout
    again = run_cli("init", project, cwd=tmp_path)
    assert again.returncode == 2 and "already exists" in again.stderr
    assert again.stderr.count("\n") == 1


def test_the_project_plug_in_is_found_in_its_estimators_folder(tmp_path):
    run_cli("init", tmp_path, cwd=tmp_path, check=True)
    (tmp_path / "estimators" / "midhinge.py").write_text("def midhinge(x):\n    raise RuntimeError('no')\n")
    proc = run_cli("check", cwd=tmp_path)
    assert proc.returncode == 2 and "`estimators.midhinge.function`: a trial run" in proc.stderr


def test_a_lone_study_file_is_used_and_several_must_be_named(tmp_path):
    write_study(tmp_path, tiny_study(), name="survey.yaml")
    (tmp_path / "notes.yaml").write_text("just: notes\n")
    proc = run_cli("check", cwd=tmp_path, check=True)
    assert "using the study file survey.yaml" in proc.stderr and "study 'tiny' is valid" in proc.stdout
    write_study(tmp_path, tiny_study(study="other"), name="other.yaml")
    proc = run_cli("status", cwd=tmp_path)
    assert proc.returncode == 2 and "2 here (other.yaml, survey.yaml); name the one to use" in proc.stderr


def test_no_study_here_says_what_to_do(tmp_path):
    proc = run_cli("plan", cwd=tmp_path)
    assert proc.returncode == 2 and "none in" in proc.stderr and "estbench init" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_demo_is_the_bundled_study(tmp_path):
    proc = run_cli("check", "--demo", cwd=tmp_path, check=True)
    assert "study 'water-lab-nitrate' is valid" in proc.stdout
    assert Path(proc.stderr.split("demo study ")[1].strip()).name == "config.yaml"
    both = run_cli("check", "study.yaml", "--demo", cwd=tmp_path)
    assert both.returncode == 2 and "not both" in both.stderr
