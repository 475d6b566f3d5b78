"""The validated study: what every later stage reads instead of the YAML."""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Mapping

from estbench.core.layout import ResultsLayout
from estbench.simulate import plugins
from estbench.study.packing import AUTO_VALUES_PER_JOB, Job, Piece, pack, pack_target
from estbench.study.scenarios import Scenario, expand_study


@dataclass(frozen=True)
class EstimatorSpec:
    """One estimator as the study names it."""

    name: str
    function: str
    target: str
    args: Mapping = field(default_factory=dict)
    description: str = ""


#: Default of ``max_failed_share``: above this share of failed replicates in a
#: scenario an estimator is flagged. Common practice, chosen by estbench (no
#: published rule): a fifth of the datasets missing is enough to question the rest.
DEFAULT_MAX_FAILED_SHARE = 0.2


@dataclass(frozen=True)
class Study:
    """A validated study, with defaults applied."""

    name: str
    description: str
    seed: int
    replicates: int
    block_size: int
    blocks_per_job: int | None   #: None = 'auto': pieces sized by the data drawn
    values_per_job: int | None   #: None = 'auto': see ``jobs``
    level: float
    sample_sizes: tuple
    dgms: Mapping[str, Mapping]
    estimators: Mapping[str, EstimatorSpec]
    reference: str | None
    targets: Mapping[str, float]
    max_failed_share: float      #: failed share in a scenario above which an estimator is flagged
    report: Mapping              #: report-only options (tolerance, zip, asymptotic_efficiency)
    source: Path | None          #: the study file, when loaded from one
    raw: Mapping                 #: the mapping as written, for the report appendix
    allocation: Mapping = field(default_factory=dict)  #: scenario key -> seed blocks, from --until-precise

    @property
    def n_blocks(self) -> int:
        """Seed blocks per scenario: replicates rounded up to whole blocks."""
        return -(-self.replicates // self.block_size)

    @property
    def replicates_run(self) -> int:
        """Replicates actually run per scenario (a whole number of blocks)."""
        return self.n_blocks * self.block_size

    @property
    def search_dirs(self) -> list[str]:
        """Folders searched for estimator modules."""
        return plugins.search_path(self.source.parent if self.source else None)

    def layout(self, workdir: Path | str = ".") -> ResultsLayout:
        """Where this study's results live when it is run from *workdir*."""
        return ResultsLayout.of(self.name, workdir)

    @cached_property
    def scenarios(self) -> list[Scenario]:
        return expand_study(self.dgms, self.sample_sizes)

    @cached_property
    def _scenario_n(self) -> dict:
        return {s.key: s.n for s in self.scenarios}

    @cached_property
    def scenarios_by_key(self) -> dict[str, Scenario]:
        return {s.key: s for s in self.scenarios}

    def job_blocks(self, scenario: str | None = None) -> int:
        """Seed blocks per piece (shard) of one scenario: ``blocks_per_job``, or if 'auto'
        enough blocks to draw about ``AUTO_VALUES_PER_JOB`` values (block_size x n each).

        It depends on block_size and n only, never on the estimators, the other
        scenarios or the replicate count, so adding any of them keeps every
        existing shard's blocks.
        """
        if self.blocks_per_job is not None:
            return self.blocks_per_job
        n = self._scenario_n[scenario] if scenario else max(self.sample_sizes)
        return max(1, AUTO_VALUES_PER_JOB // (self.block_size * n))

    def job_first_blocks(self, scenario: str | None = None) -> list[int]:
        """First seed block of every piece (and shard) of a scenario."""
        return list(range(0, self.blocks_of(scenario), self.job_blocks(scenario)))

    @cached_property
    def pieces(self) -> tuple[Piece, ...]:
        """Every piece (scenario x range of seed blocks), scenario by scenario."""
        out = []
        for s in self.scenarios:
            blocks, step = self.blocks_of(s.key), self.job_blocks(s.key)
            for first in range(0, blocks, step):
                n_blocks = min(step, blocks - first)
                out.append(Piece(s.key, first, n_blocks, s.n * self.block_size * n_blocks))
        return tuple(out)

    @cached_property
    def jobs(self) -> tuple[Job, ...]:
        """The simulation jobs: consecutive pieces packed into jobs of about
        ``values_per_job`` values (see ``estbench.study.packing``). If that is
        'auto': one job per piece with an integer ``blocks_per_job``, else
        ``pack_target`` of the study's values."""
        if self.values_per_job is not None:
            return tuple(pack(self.pieces, self.values_per_job))
        if self.blocks_per_job is not None:
            return tuple(Job((p,)) for p in self.pieces)
        return tuple(pack(self.pieces, pack_target(sum(p.values for p in self.pieces))))

    @cached_property
    def pieces_by_key(self) -> dict[tuple[str, int], Piece]:
        return {p.key: p for p in self.pieces}

    @cached_property
    def jobs_by_key(self) -> dict[tuple[str, int], Job]:
        """Job by the (scenario, first block) of its first piece."""
        return {j.key: j for j in self.jobs}

    def blocks_of(self, scenario: str | None) -> int:
        """Seed blocks of one scenario: ``n_blocks``, or more where precision asked for them."""
        return max(self.n_blocks, int(self.allocation.get(scenario, 0))) if scenario else self.n_blocks
