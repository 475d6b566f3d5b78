"""Where a study's generated files live: one object every rule, verb and stage asks.

Everything a run writes goes under ``<workdir>/results/<study>/``::

    shards/<scenario>/<estimator>/<first_block>.parquet   one estimator's estimates from one piece
    specs/<scenario>/<first_block>.json                   a job's spec, named after its first piece
    jobs/<scenario>/<first_block>.json                    a job's record, written after its shards
    logs/jobs/<scenario>/<first_block>.log                a job's log
    logs/ingest.log, logs/report.log, logs/snakemake-<time>.log
    store.duckdb, performance.csv, checks.csv, report.html
    allocation.json                                       seed blocks settled by --until-precise
    shards-to-recompute.txt                               damaged shards ingest removed
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path


@dataclass(frozen=True)
class ResultsLayout:
    """The results folder of one study and the path of every file in it.

    Methods that name a job or a shard also accept Snakemake wildcard strings
    (``"{scenario}"``), so the rules spell their patterns through this object too.
    """

    root: Path

    @classmethod
    def of(cls, study_name: str, workdir: Path | str = ".") -> "ResultsLayout":
        """The layout of study *study_name* run from folder *workdir*."""
        return cls(Path(workdir) / "results" / study_name)

    @classmethod
    def of_store(cls, store: Path | str) -> "ResultsLayout":
        """The layout whose store is *store*."""
        return cls(Path(store).parent)

    @property
    def workdir(self) -> Path:
        """The folder the study is run from (``results/`` lives in it)."""
        return self.root.parent.parent

    @property
    def store(self) -> Path:
        """The DuckDB store, the single source of truth for the report."""
        return self.root / "store.duckdb"

    @property
    def report_html(self) -> Path:
        return self.root / "report.html"

    @property
    def performance_csv(self) -> Path:
        return self.root / "performance.csv"

    @property
    def checks_csv(self) -> Path:
        return self.root / "checks.csv"

    @property
    def allocation(self) -> Path:
        """Seed blocks per scenario settled by ``estbench run --until-precise``."""
        return self.root / "allocation.json"

    @property
    def recompute_marker(self) -> Path:
        """Shards ingest found damaged and removed, so the next run recomputes them."""
        return self.root / "shards-to-recompute.txt"

    @property
    def logs(self) -> Path:
        return self.root / "logs"

    @property
    def run_lock(self) -> Path:
        """Held by the one ``estbench run`` of this study."""
        return self.root / ".run.lock"

    def stage_log(self, stage: str) -> Path:
        """Log of the one-off ``ingest`` or ``report`` stage."""
        return self.logs / f"{stage}.log"

    def snakemake_log(self, stamp: str) -> Path:
        """Snakemake's own output during one ``estbench run`` started at *stamp*."""
        return self.logs / f"snakemake-{stamp}.log"

    def shard(self, scenario: str, estimator: str, first_block: int | str) -> Path:
        """Parquet shard of one piece (scenario x range of seed blocks) x estimator."""
        return self.root / "shards" / scenario / estimator / f"{first_block}.parquet"

    def job_spec(self, scenario: str, first_block: int | str) -> Path:
        """Spec of one simulation job, named after its first piece (see :meth:`job_record`)."""
        return self.root / "specs" / scenario / f"{first_block}.json"

    def job_record(self, scenario: str, first_block: int | str) -> Path:
        """Record of one simulation job, named after its first piece (scenario x first block).

        Written after every shard of the job is in place: it is the job's
        output as Snakemake sees it.
        """
        return self.root / "jobs" / scenario / f"{first_block}.json"

    def job_log(self, scenario: str, first_block: int | str) -> Path:
        return self.logs / "jobs" / scenario / f"{first_block}.log"

    @classmethod
    def of_shard(cls, shard: Path | str) -> "ResultsLayout":
        """The layout holding *shard* (a path made by :meth:`shard`)."""
        shard = Path(shard)
        layout = cls(shard.parents[3])
        if layout.shard(shard.parent.parent.name, shard.parent.name, shard.stem) != shard:
            raise ValueError(f"{shard} is not a shard path (results/<study>/shards/<scenario>/<estimator>/<block>.parquet)")
        return layout

    @classmethod
    def of_job_record(cls, record: Path | str) -> "ResultsLayout":
        """The layout holding job *record* (a path made by :meth:`job_record`)."""
        record = Path(record)
        layout = cls(record.parents[2])
        if layout.job_record(record.parent.name, record.stem) != record:
            raise ValueError(f"{record} is not a job record path (results/<study>/jobs/<scenario>/<block>.json)")
        return layout
