# Shared helpers: load and validate the study, name every output through its layout.
import shlex
import sys
from pathlib import Path

from snakemake.utils import validate

from estbench.core import bundled
from estbench.study import jobs
from estbench.study.allocation import with_allocation
from estbench.study.load import study_from_mapping

if not workflow.configfiles:
    raise ValueError("no study given: run `estbench run STUDY.yaml` or pass --configfile STUDY.yaml")

STUDY_FILE = str(Path(workflow.configfiles[-1]).resolve())
validate(config, str(bundled.SCHEMA_FILE))
STUDY = with_allocation(study_from_mapping(config, source=Path(STUDY_FILE)))
LAYOUT = STUDY.layout()

PYTHON = shlex.quote(sys.executable)
SEARCH_ARGS = " ".join(f"--search-dir {shlex.quote(d)}" for d in STUDY.search_dirs)
STORE = str(LAYOUT.store)
REPORT_HTML = str(LAYOUT.report_html)
PERFORMANCE_CSV = str(LAYOUT.performance_csv)
CHECKS_CSV = str(LAYOUT.checks_csv)
JOB_RECORDS = [str(p) for p in jobs.job_record_paths(STUDY, LAYOUT)]
ESTIMATOR_SOURCES = jobs.estimator_sources(STUDY)


wildcard_constraints:
    scenario="[0-9a-f]{16}",
    first_block="[0-9]+",
