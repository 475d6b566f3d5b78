# Shared helpers: load and validate the study, name every output.
import shlex
import sys
from pathlib import Path

from snakemake.utils import validate

from estbench import jobs, paths
from estbench.precision import with_allocation
from estbench.study import study_from_mapping

if not workflow.configfiles:
    raise ValueError("no study given: run `estbench run STUDY.yaml` or pass --configfile STUDY.yaml")

STUDY_FILE = str(Path(workflow.configfiles[-1]).resolve())
validate(config, str(paths.SCHEMA_FILE))
STUDY = with_allocation(study_from_mapping(config, source=Path(STUDY_FILE)))

PYTHON = shlex.quote(sys.executable)
SEARCH_ARGS = " ".join(f"--search-dir {shlex.quote(d)}" for d in STUDY.search_dirs)
RESULTS = f"results/{STUDY.name}"
STORE = f"{RESULTS}/store.duckdb"
REPORT_HTML = f"{RESULTS}/report.html"
PERFORMANCE_CSV = f"{RESULTS}/performance.csv"
JOB_RECORDS = [str(p) for p in jobs.job_record_paths(STUDY)]
ESTIMATOR_SOURCES = jobs.estimator_sources(STUDY)


wildcard_constraints:
    scenario="[0-9a-f]{16}",
    first_block="[0-9]+",
