"""Random streams: one independent stream per (scenario, seed block).

The layers follow numpy.random: entropy (study seed) -> SeedSequence with a
spawn key -> PCG64DXSM bit generator -> Generator. Streams never depend on
how blocks are grouped into jobs, so results are bit-identical whatever the
shard size, core count or executor.
"""

from __future__ import annotations

import hashlib

import numpy as np


def block_seed_sequence(seed: int, scenario_spawn_key: int, block: int) -> np.random.SeedSequence:
    """SeedSequence of block *block* of the scenario with spawn key *scenario_spawn_key*."""
    return np.random.SeedSequence(entropy=seed, spawn_key=(scenario_spawn_key, block))


def block_generator(seed: int, scenario_spawn_key: int, block: int) -> np.random.Generator:
    """Generator that draws the data of one seed block."""
    return np.random.Generator(np.random.PCG64DXSM(block_seed_sequence(seed, scenario_spawn_key, block)))


def estimator_generator(seed: int, scenario_spawn_key: int, block: int, estimator: str) -> np.random.Generator:
    """Generator for an estimator's own randomness (e.g. bootstrap) on one block.

    Its spawn key extends the block's with a hash of the estimator name, so it
    is independent of the data stream and of every other estimator's stream.
    """
    tag = int.from_bytes(hashlib.sha256(estimator.encode()).digest()[:8], "big")
    ss = np.random.SeedSequence(entropy=seed, spawn_key=(scenario_spawn_key, block, tag))
    return np.random.Generator(np.random.PCG64DXSM(ss))
