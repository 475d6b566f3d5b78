"""Files that ship inside the package: the workflow, the schema, the report
templates, the execution profiles, the built-in estimators and the example studies.

They are found with ``importlib.resources`` under ``estbench/bundled/``, which
mirrors the repository's own layout (``Snakefile``, ``workflow/rules``,
``workflow/schemas``, ``workflow/profiles``, ``estimators``, ``reports``,
``config``). In a source checkout those entries are links to the top-level
folders, so an editable install and a wheel find the same files by the same code.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path


def _root() -> Path:
    root = resources.files("estbench") / "bundled"
    if not isinstance(root, Path) or not root.is_dir():  # e.g. a zipped install
        raise RuntimeError(f"estbench's bundled files are not on the file system ({root}); "
                           f"install estbench from a wheel or a source checkout")
    return root


ROOT = _root()
SNAKEFILE = ROOT / "Snakefile"
RULES_DIR = ROOT / "workflow" / "rules"
SCHEMA_FILE = ROOT / "workflow" / "schemas" / "study.schema.yaml"
PROFILES_DIR = ROOT / "workflow" / "profiles"
BUILTIN_ESTIMATORS = ROOT / "estimators"
REPORT_TEMPLATES = ROOT / "reports"
DEMO_STUDY = ROOT / "config" / "config.yaml"
EXAMPLE_STUDIES = ROOT / "config" / "studies"
