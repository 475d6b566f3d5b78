"""Shared fixtures: tiny study files and the estbench CLI run as users run it."""

from __future__ import annotations

import os
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
