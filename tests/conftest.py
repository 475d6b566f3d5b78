"""Shared fixtures: tiny study files and the estbench CLI run as users run it."""

from __future__ import annotations

import hashlib
import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]


def tiny_study(**overrides) -> dict:
    """A study small enough to run through Snakemake in seconds."""
    study = {
        "study": "tiny",
        "description": "Field survey of plot yields (invented, for tests).",
        "seed": 12345,
        "replicates": 60,
        "block_size": 10,
        "blocks_per_job": 3,
        "sample_sizes": [5, 20],
        "dgms": {"normal": {"distribution": "norm", "params": {"loc": 2.0, "scale": 1.5}}},
        "estimators": {
            "mean": {"function": "location:mean", "target": "mean"},
            "median": {"function": "location:median", "target": "mean"},
        },
        "reference": "mean",
    }
    study.update(overrides)
    return study


def write_study(directory: Path, study: dict, name: str = "study.yaml") -> Path:
    path = Path(directory) / name
    path.write_text(yaml.safe_dump(study, sort_keys=False))
    return path


def run_cli(*args, cwd: Path, check: bool = False, timeout: float = 600) -> subprocess.CompletedProcess:
    """Run ``estbench ARGS`` in *cwd* the way a user does, capturing output.

    On a timeout the whole process group goes (estbench and the Snakemake it
    started), so no orphan keeps polling a cluster after the test.
    """
    child = subprocess.Popen([sys.executable, "-m", "estbench.app.cli", *map(str, args)], cwd=cwd,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                             start_new_session=True)
    try:
        out, err = child.communicate(timeout=timeout)
    except subprocess.TimeoutExpired:
        os.killpg(child.pid, signal.SIGKILL)
        out, err = child.communicate()
        raise AssertionError(f"estbench {' '.join(map(str, args))} did not finish in {timeout} s:\n{out}\n{err}")
    proc = subprocess.CompletedProcess(child.args, child.returncode, out, err)
    if check and proc.returncode != 0:
        raise AssertionError(f"estbench {' '.join(map(str, args))} failed ({proc.returncode}):\n"
                             f"{proc.stdout}\n{proc.stderr}")
    return proc


@pytest.fixture
def study_dir(tmp_path) -> Path:
    return tmp_path


@pytest.fixture(scope="session")
def finished_tiny(tmp_path_factory) -> Path:
    """A folder where `estbench run` finished tiny_study(): copy it with copy_project,
    never change it (one run shared by every fault test)."""
    cwd = tmp_path_factory.mktemp("finished-tiny")
    run_cli("run", write_study(cwd, tiny_study()), "--cores", "2", cwd=cwd, check=True)
    return cwd


def copy_project(source: Path, target: Path) -> Path:
    """Copy a study folder (results and Snakemake's records too), keeping modification times."""
    shutil.copytree(source, target, symlinks=True, dirs_exist_ok=True)
    return target


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def shard_mtimes(cwd: Path) -> dict[str, int]:
    """Shard path (relative to *cwd*) -> modification time in ns: what a rerun must not touch."""
    return {str(p.relative_to(cwd)): p.stat().st_mtime_ns for p in sorted(Path(cwd).rglob("*.parquet"))}


def cli_here(capsys, monkeypatch, cwd: Path, *args) -> tuple[int, str, str]:
    """``estbench ARGS`` through the CLI's own entry point in this process: the code
    run_cli runs, without an interpreter start-up. Returns (exit status, stdout,
    stderr); a traceback would escape as an exception and fail the test."""
    from estbench.app.cli import main
    monkeypatch.chdir(cwd)
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err
