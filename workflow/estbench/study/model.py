"""The validated study: what every later stage reads instead of the YAML."""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Mapping

from estbench.core.layout import ResultsLayout
from estbench.simulate import plugins
from estbench.study.scenarios import Scenario, expand_study


@dataclass(frozen=True)
class EstimatorSpec:
    """One estimator as the study names it."""

    name: str
    function: str
    target: str
    args: Mapping = field(default_factory=dict)
    description: str = ""


#: Values (block_size x n per block) one job draws when ``blocks_per_job`` is 'auto':
#: several seconds of work for cheap estimators, so start-up stays a few per cent.
AUTO_VALUES_PER_JOB = 50_000_000

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
    blocks_per_job: int | None   #: None = 'auto', sized per scenario by the data drawn
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

    def job_blocks(self, scenario: str | None = None) -> int:
        """Seed blocks per job of one scenario: ``blocks_per_job``, or if 'auto' enough
        blocks to draw about ``AUTO_VALUES_PER_JOB`` values (block_size x n each).

        It depends on block_size and n only, never on the estimators or the
        replicate count, so adding either keeps every existing job's blocks.
        """
        if self.blocks_per_job is not None:
            return self.blocks_per_job
        n = self._scenario_n[scenario] if scenario else max(self.sample_sizes)
        return max(1, AUTO_VALUES_PER_JOB // (self.block_size * n))

    def job_first_blocks(self, scenario: str | None = None) -> list[int]:
        """First seed block of every job (and shard) of a scenario."""
        return list(range(0, self.blocks_of(scenario), self.job_blocks(scenario)))

    def blocks_of(self, scenario: str | None) -> int:
        """Seed blocks of one scenario: ``n_blocks``, or more where precision asked for them."""
        return max(self.n_blocks, int(self.allocation.get(scenario, 0))) if scenario else self.n_blocks
