"""How a study's work is cut: pieces (the shards' unit) packed into jobs (the processes).

A *piece* is one scenario x a range of seed blocks; every estimator writes one
shard per piece. Piece boundaries depend only on the scenario's n, the block
size and ``blocks_per_job``, never on the rest of the study, so adding an
estimator, a scenario or replicates never moves a finished shard.

A *job* is one process: it computes a run of pieces, one after the other. With
``blocks_per_job: auto`` small pieces (a narrow scenario of a wide grid) are
packed together, so a grid of hundreds of small scenarios runs as a handful of
processes instead of paying a start-up per scenario; with an integer
``blocks_per_job`` every piece is its own job. Packing changes no number: each
seed block is drawn from its own stream whichever job draws it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

#: Values (block_size x n per block) one piece draws at most when ``blocks_per_job``
#: is 'auto': several seconds of work for cheap estimators. A piece's shards are
#: committed as it ends, so a kill loses at most the pieces being computed.
AUTO_VALUES_PER_JOB = 50_000_000
#: Values one job draws at most when ``values_per_job`` is 'auto': a handful of
#: pieces, so start-ups (about a CPU-second each) stay a few per cent of the work.
AUTO_VALUES_PER_PACK = 400_000_000
#: Jobs a study is spread over, when its work allows, so that a machine's cores
#: (or a cluster's nodes) all get some; common practice, chosen by estbench.
SPREAD_JOBS = 8
#: Values a job draws at least, unless the whole study is smaller: below this a
#: job's start-up (about a CPU-second: Python, numpy, scipy, pyarrow) outweighs its work.
MIN_VALUES_PER_JOB = 2_000_000


@dataclass(frozen=True)
class Piece:
    """One scenario x a range of seed blocks: the unit of the shards."""

    scenario: str        #: scenario key
    first_block: int
    n_blocks: int
    values: int          #: values drawn: n x block_size x n_blocks

    @property
    def key(self) -> tuple[str, int]:
        return (self.scenario, self.first_block)


@dataclass(frozen=True)
class Job:
    """One simulation process: a run of pieces, named after its first one."""

    pieces: tuple[Piece, ...]

    @property
    def key(self) -> tuple[str, int]:
        """(scenario, first block) of its first piece: the name of its record, spec and log."""
        return self.pieces[0].key

    @property
    def values(self) -> int:
        return sum(p.values for p in self.pieces)


def pack_target(total_values: int) -> int:
    """Values per job for a study drawing *total_values* in all (``values_per_job: auto``).

    The study spread over ``SPREAD_JOBS`` jobs, but at most ``AUTO_VALUES_PER_PACK``
    and at least ``MIN_VALUES_PER_JOB`` per job.
    """
    return min(AUTO_VALUES_PER_PACK, max(MIN_VALUES_PER_JOB, math.ceil(total_values / SPREAD_JOBS)))


def pack(pieces: Sequence[Piece], target: int) -> list[Job]:
    """Consecutive *pieces* packed into jobs of about *target* values each.

    The study needs J = ceil(total / target) jobs; they share the work evenly:
    a piece goes to job floor(J x (values before it + half its own) / total),
    so the jobs are consecutive runs of nearly equal work, with no small
    remainder at the end. A piece larger than a job's share is a job of its own.
    """
    if not pieces:
        return []
    total = sum(p.values for p in pieces)
    n_jobs = max(1, math.ceil(total / target))
    runs: dict[int, list[Piece]] = {}
    before = 0
    for piece in pieces:
        runs.setdefault(min(n_jobs - 1, int(n_jobs * (before + piece.values / 2) / total)), []).append(piece)
        before += piece.values
    return [Job(tuple(run)) for run in runs.values()]
