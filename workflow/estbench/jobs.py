"""What the workflow runs: shard paths and each shard job's own spec.

Used by ``workflow/rules/common.smk`` and by ``estbench status``. A job's
spec holds only what decides its numbers (seed, block size, its scenario, its
estimator's function and args, its blocks, the level if the estimator takes
one). Snakemake reruns a job when its spec changes, so editing one estimator
or adding another never reruns unrelated shards.
"""

from __future__ import annotations

import json
from functools import lru_cache
from pathlib import Path

from . import plugins
from .paths import shard_path
from .study import Study


def shard_paths(study: Study, workdir: Path | str = ".") -> list[Path]:
    """Every shard the study needs, scenario by scenario."""
    return [path for path, _ in shard_rows(study, workdir)]


def shard_rows(study: Study, workdir: Path | str = ".") -> list[tuple[Path, int]]:
    """Every shard with the number of replicates it holds."""
    out = []
    for s in study.scenarios:
        blocks = study.blocks_of(s.key)
        for e in study.estimators:
            for b in study.job_first_blocks(s.key):
                out.append((shard_path(study.name, s.key, e, b, workdir),
                            min(study.blocks_per_job, blocks - b) * study.block_size))
    return out


def scenario_by_key(study: Study, key: str):
    for s in study.scenarios:
        if s.key == key:
            return s
    raise KeyError(f"study {study.name!r} has no scenario {key!r}")


def shard_spec(study: Study, scenario: str, estimator: str, first_block: int) -> dict:
    """The JSON-able spec of one shard job."""
    s = scenario_by_key(study, scenario)
    e = study.estimators[estimator]
    fn = plugins.resolve(e.function, study.search_dirs)
    spec = {
        "seed": study.seed,
        "block_size": study.block_size,
        "first_block": first_block,
        "n_blocks": min(study.blocks_per_job, study.blocks_of(scenario) - first_block),
        "scenario": {"key": s.key, "spawn_key": s.spawn_key, "dgm": s.spec, "n": s.n},
        "estimator": {"name": e.name, "function": e.function, "args": dict(e.args)},
    }
    if plugins.accepts(fn, "level"):
        spec["level"] = study.level
    return spec


def shard_spec_json(study: Study, scenario: str, estimator: str, first_block: int) -> str:
    return json.dumps(shard_spec(study, scenario, estimator, first_block), sort_keys=True)


@lru_cache(maxsize=None)
def _code_files(function: str, dirs: tuple) -> tuple[str, ...]:
    return tuple(str(p) for p in plugins.code_files(function, dirs))


def estimator_sources(study: Study, estimator: str) -> list[str]:
    """Source files of an estimator (its module and same-folder helpers): inputs of its shards."""
    return list(_code_files(study.estimators[estimator].function, tuple(study.search_dirs)))
