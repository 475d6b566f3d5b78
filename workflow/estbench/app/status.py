"""What a run will compute, and why: every shard compared with the spec and code it must have.

The same comparison (``estbench.simulate.shard.shard_state``) decides, inside each job, which
shards to recompute; ``estbench status`` and the runner's progress line use it
to say what will run before it runs.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from estbench.study import jobs
from estbench.simulate.job import shard_tasks
from estbench.simulate.shard import DAMAGED, MISSING, UP_TO_DATE, estimator_code_hash
from estbench.study.model import Study


@dataclass(frozen=True)
class ShardPlan:
    """One shard of the study and what the next run does with it."""

    scenario: str
    estimator: str
    first_block: int
    replicates: int
    reason: str      #: 'up to date', or why it will be (re)computed
    path: Path

    @property
    def pending(self) -> bool:
        return self.reason != UP_TO_DATE

    @property
    def missing(self) -> bool:
        return self.reason == MISSING

    @property
    def damaged(self) -> bool:
        return self.reason.startswith(DAMAGED)


def shard_plans(study: Study, workdir: Path | str = ".") -> list[ShardPlan]:
    """Every shard of the study with its state on disk, piece by piece."""
    layout, plans = study.layout(workdir), []
    codes = {e.function: estimator_code_hash(e.function, study.search_dirs) for e in study.estimators.values()}
    for piece in study.pieces:
        spec = jobs.piece_spec(study, *piece.key)
        outputs = {e: layout.shard(piece.scenario, e, piece.first_block) for e in study.estimators}
        for task in shard_tasks(spec, study.search_dirs, outputs, codes):
            plans.append(ShardPlan(piece.scenario, task.name, piece.first_block,
                                   piece.n_blocks * study.block_size, task.state.reason, task.out))
    return plans


def pending_jobs(study: Study, workdir: Path | str = ".",
                 plans: list[ShardPlan] | None = None) -> dict[tuple[str, int], int]:
    """Job key (scenario, first block of its first piece) -> replicates of every job
    the next run will run: those with a shard to compute or without a record.
    *plans*: ``shard_plans`` of the study, if already at hand."""
    layout, job_of = study.layout(workdir), jobs.job_of_piece(study)
    pending = {job_of[(plan.scenario, plan.first_block)]
               for plan in (shard_plans(study, workdir) if plans is None else plans) if plan.pending}
    return {job.key: sum(p.n_blocks for p in job.pieces) * study.block_size
            for job in study.jobs if job.key in pending or not layout.job_record(*job.key).exists()}
