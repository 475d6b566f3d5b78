"""Guards of the package's shape: stages import one way, a simulation job stays lean,
the registries agree with the schema, and every entry point keeps the exit-2 contract."""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

import estbench
from estbench.analyse.measures import MEASURE_NAMES
from estbench.core import bundled
from estbench.simulate.dgms import KIND_MODULES, kind_module
from estbench.simulate.dgms.mechanism import MECHANISMS
from estbench.study import jobs
from estbench.study.load import study_from_mapping

from conftest import tiny_study, write_study

PACKAGE = Path(estbench.__file__).parent
#: The stages in import order: a module may import its own stage and those before it.
STAGES = ("core", "simulate", "study", "analyse", "report", "app")


def _modules() -> list[Path]:
    return sorted(p for p in PACKAGE.rglob("*.py") if "bundled" not in p.relative_to(PACKAGE).parts)


def _estbench_imports(path: Path) -> list[tuple[int, str]]:
    """(line, module) of every estbench import in *path*, at any depth (lazy ones too)."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.ImportFrom):
            assert node.level == 0, f"{path}:{node.lineno}: relative import; use estbench.<stage>..."
            names = [node.module] if node.module != "estbench" else [f"estbench.{a.name}" for a in node.names]
            found += [(node.lineno, n) for n in names if n.split(".")[0] == "estbench"]
        elif isinstance(node, ast.Import):
            found += [(node.lineno, a.name) for a in node.names if a.name.split(".")[0] == "estbench"]
    return found


def test_every_module_lives_in_a_stage():
    loose = [p.name for p in _modules() if p.parent == PACKAGE and p.name not in ("__init__.py", "__main__.py")]
    assert loose == []
    assert sorted(p.name for p in PACKAGE.iterdir() if p.is_dir() and p.name not in ("__pycache__", "bundled")) \
        == sorted(STAGES)


def test_stages_import_one_way():
    wrong = []
    for path in _modules():
        parts = path.relative_to(PACKAGE).parts
        if len(parts) == 1:       # estbench/__init__.py and __main__.py may reach any stage
            continue
        rank = STAGES.index(parts[0])
        for line, module in _estbench_imports(path):
            target = module.split(".")[1] if "." in module else None
            if target in STAGES and STAGES.index(target) > rank:
                wrong.append(f"{path.relative_to(PACKAGE)}:{line} ({parts[0]}) imports {module}")
    assert wrong == [], "imports against the stage order " + " <- ".join(STAGES) + ":\n" + "\n".join(wrong)


def test_the_import_check_sees_a_backward_import(tmp_path):
    """The guard itself can fail: a lazy import of a later stage inside a function is found."""
    bad = tmp_path / "bad.py"
    bad.write_text("def f():\n    from estbench.report.render import render\n    return render\n")
    assert _estbench_imports(bad) == [(2, "estbench.report.render")]


def _job_imports(tmp_path, raw: dict) -> set[str]:
    """Run the first job of study *raw* as the workflow runs it; the modules it imported."""
    study = study_from_mapping(raw, source=write_study(tmp_path, raw))
    key, first = jobs.job_keys(study)[0]
    record = study.layout(tmp_path).job_record(key, first)
    spec = jobs.write_job_spec(study, study.layout(tmp_path), key, first)
    probe = ("import runpy, sys\n"
             "sys.argv[0] = 'estbench.simulate.job'\n"
             "try:\n"
             "    runpy.run_module('estbench.simulate.job', run_name='__main__')\n"
             "except SystemExit as exc:\n"
             "    assert not exc.code, exc.code\n"
             "print(' '.join(sorted(sys.modules)))\n")
    args = ["--spec", str(spec.relative_to(tmp_path)),
            *[a for d in study.search_dirs for a in ("--search-dir", d)],
            "--record", str(record.relative_to(tmp_path))]
    proc = subprocess.run([sys.executable, "-c", probe, *args], cwd=tmp_path, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    assert record.is_file()
    assert len(list((tmp_path / "results").rglob("*.parquet"))) == len(study.jobs[0].pieces) * len(study.estimators)
    return set(proc.stdout.split())


def test_a_simulation_job_imports_no_store_plotting_or_dataframe_library(tmp_path):
    """The job process imports numpy, scipy and pyarrow only (common practice: keep job start-up lean)."""
    imported = {m.split(".")[0] for m in _job_imports(tmp_path, tiny_study())}
    assert not imported & {"duckdb", "matplotlib", "pandas", "jinja2", "snakemake"}


def test_a_job_imports_scipy_stats_only_when_its_dgms_or_estimators_need_it(tmp_path):
    """scipy.stats costs about a CPU-second per job: a numpy-only study does without it."""
    (tmp_path / "share_bits.py").write_text("def share(x):\n    return x.mean(axis=1)\n")
    raw = tiny_study(dgms={"coin": {"mechanism": "proportion", "params": {"p": 0.3}}},
                     estimators={"share": {"function": "share_bits:share", "target": "p"}}, reference="share")
    imported = _job_imports(tmp_path, raw)
    assert "numpy" in imported and "pyarrow" in imported
    assert "scipy.stats" not in imported


def _schema() -> dict:
    return yaml.safe_load(bundled.SCHEMA_FILE.read_text())


def test_dgm_kinds_agree_with_the_schema():
    branches = _schema()["definitions"]["dgm"]["oneOf"]
    assert {b["required"][0] for b in branches} == set(KIND_MODULES)
    for key in KIND_MODULES:
        module = kind_module(key)
        assert module.KEY == key and all(callable(getattr(module, f)) for f in ("build", "describe", "problems"))


def test_mechanisms_agree_with_the_schema():
    mechanism = _schema()["definitions"]["dgm"]["properties"]["mechanism"]
    assert mechanism["enum"] == list(MECHANISMS)
    text = " ".join(mechanism["description"].split())
    for name, cls in MECHANISMS.items():
        assert f"{name} ({', '.join(cls.PARAMS)})" in text, f"the schema does not list {name}'s parameters"


def test_measures_agree_with_the_schema():
    targets = _schema()["properties"]["targets"]
    assert tuple(targets["propertyNames"]["enum"]) == MEASURE_NAMES
    assert targets["propertyNames"]["x-rule"].endswith(", ".join(MEASURE_NAMES))


def test_every_bundled_file_is_there():
    for path in (bundled.SNAKEFILE, bundled.SCHEMA_FILE, bundled.DEMO_STUDY,
                 bundled.REPORT_TEMPLATES / "report.html.j2", bundled.REPORT_TEMPLATES / "report.css",
                 bundled.PROFILES_DIR / "slurm" / "config.yaml", bundled.BUILTIN_ESTIMATORS / "location.py",
                 *(bundled.RULES_DIR / f"{r}.smk" for r in ("common", "simulate", "store", "report"))):
        assert path.is_file(), path
    included = [line.split('"')[1] for line in bundled.SNAKEFILE.read_text().splitlines()
                if line.startswith("include:")]
    assert included and all((bundled.ROOT / name).is_file() for name in included)


# ------------------------------------------------------------------ entry points --

#: Every ``python -m`` entry point with a user error it must turn into one line and exit 2.
ENTRY_POINTS = {
    "estbench": (["check", "nope.yaml"], "estbench: cannot read study file"),
    "estbench.app.cli": (["query", "study.yaml", "SELECT 1"], "estbench: no store at"),
    "estbench.simulate.job": (["--spec", "nope.json", "--record", "results/s/jobs/0123456789abcdef/0.json"],
                              "estbench: `--spec`: cannot read the job spec nope.json"),
    "estbench.analyse.store": (["--study", "nope.yaml", "--store", "results/s/store.duckdb"],
                               "estbench: cannot read study file"),
    "estbench.report.render": (["--store", "results/s/store.duckdb"], "estbench: no store at"),
}


def test_every_entry_point_is_covered():
    """A module that can be run with ``python -m`` must be listed above."""
    runnable = {"estbench"} | {
        ".".join(("estbench", *p.relative_to(PACKAGE).with_suffix("").parts))
        for p in _modules() if p.name != "__main__.py" and 'if __name__ == "__main__":' in p.read_text()}
    assert runnable == set(ENTRY_POINTS)


@pytest.mark.parametrize("module", sorted(ENTRY_POINTS))
def test_entry_point_turns_a_user_error_into_one_line_and_exit_2(tmp_path, module):
    write_study(tmp_path, tiny_study())
    args, expected = ENTRY_POINTS[module]
    proc = subprocess.run([sys.executable, "-m", module, *args], cwd=tmp_path, capture_output=True, text=True)
    assert proc.returncode == 2, proc.stderr
    lines = [line for line in proc.stderr.splitlines() if not line.startswith("estbench: using ")]
    assert len(lines) == 1 and lines[0].startswith(expected), proc.stderr
    assert "Traceback" not in proc.stderr
