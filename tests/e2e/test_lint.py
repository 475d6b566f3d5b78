"""`snakemake --lint` on the workflow: the only lint left is one we decline on purpose.

Every rule runs in the environment estbench was installed into (the one that
validated the study and will ingest and report), so a per-rule conda environment
or container is not used; any other lint fails this test.
"""

import re
import subprocess
import sys

import pytest

from estbench.core.bundled import DEMO_STUDY, SNAKEFILE

pytestmark = pytest.mark.snakemake

DECLINED = {"Specify a conda environment or container for each rule."}


def test_snakemake_lint_finds_nothing_but_the_declined_lint(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "snakemake", "--lint", "--snakefile", str(SNAKEFILE),
                           "--configfile", str(DEMO_STUDY), "--directory", str(tmp_path)],
                          cwd=tmp_path, capture_output=True, text=True, timeout=300)
    output = proc.stdout + proc.stderr
    rules = set(re.findall(r"^Lints for rule (\w+)", output, flags=re.M))
    lints = set(re.findall(r"^\s+\* (.+?):\s*$", output, flags=re.M))
    assert "Error" not in output, output
    assert rules <= {"simulate", "ingest", "report", "all"}
    assert lints <= DECLINED, output
    assert not (tmp_path / "results").exists()  # linting runs nothing
