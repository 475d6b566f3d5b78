"""Where things live: the source checkout and a study's result folder."""

from __future__ import annotations

from pathlib import Path

#: Root of the source checkout this package was installed from (editable install).
PROJECT_ROOT = Path(__file__).resolve().parents[2]
SNAKEFILE = PROJECT_ROOT / "Snakefile"
SCHEMA_FILE = PROJECT_ROOT / "workflow" / "schemas" / "study.schema.yaml"
BUILTIN_ESTIMATORS = PROJECT_ROOT / "estimators"
REPORT_TEMPLATES = PROJECT_ROOT / "reports"
DEFAULT_STUDY = PROJECT_ROOT / "config" / "config.yaml"
PROFILES_DIR = PROJECT_ROOT / "workflow" / "profiles"


def results_dir(study_name: str, workdir: Path | str = ".") -> Path:
    """Folder holding every generated file of one study."""
    return Path(workdir) / "results" / study_name


def store_path(study_name: str, workdir: Path | str = ".") -> Path:
    """The study's DuckDB store, the single source of truth for the report."""
    return results_dir(study_name, workdir) / "store.duckdb"


def shard_file(results: Path | str, scenario: str, estimator: str, first_block: int) -> Path:
    """Parquet shard of one scenario x estimator x range of seed blocks, under *results*."""
    return Path(results) / "shards" / scenario / estimator / f"{first_block}.parquet"


def job_record_file(results: Path | str, scenario: str, first_block: int) -> Path:
    """Record of one simulation job (a scenario x range of seed blocks), under *results*.

    Written after every shard of the job is in place: it is the job's output
    as Snakemake sees it.
    """
    return Path(results) / "jobs" / scenario / f"{first_block}.json"


def shard_path(study_name: str, scenario: str, estimator: str, first_block: int,
               workdir: Path | str = ".") -> Path:
    """Parquet shard of one scenario x estimator x range of seed blocks."""
    return shard_file(results_dir(study_name, workdir), scenario, estimator, first_block)


def job_record_path(study_name: str, scenario: str, first_block: int, workdir: Path | str = ".") -> Path:
    """Record of one simulation job of a study."""
    return job_record_file(results_dir(study_name, workdir), scenario, first_block)
