"""What the workflow runs: simulation jobs, their shards, and each job's own spec.

A job is one scenario x a range of seed blocks, for every estimator of the
study: it draws each block once and writes one shard per estimator. Its spec
holds only what decides its numbers (seed, block size, its scenario and
blocks, each estimator's function and args, the level for those that take
one). Snakemake reruns a job when its spec or an estimator's code changes;
the job then recomputes only the shards whose own spec or code changed, and
leaves every other shard untouched (see ``estbench.simulate.job.run_job``).

Used by ``workflow/rules/common.smk``, by the runner and by ``estbench status``.
"""

from __future__ import annotations

import json
from functools import lru_cache
from pathlib import Path

from estbench.core.layout import ResultsLayout
from estbench.simulate import plugins
from estbench.simulate.job import estimator_specs
from estbench.study.model import Study


def job_keys(study: Study) -> list[tuple[str, int]]:
    """(scenario key, first block) of every job, scenario by scenario."""
    return [(s.key, b) for s in study.scenarios for b in study.job_first_blocks(s.key)]


def job_n_blocks(study: Study, scenario: str, first_block: int) -> int:
    """Seed blocks of the job starting at *first_block* (the last one may be short)."""
    return min(study.job_blocks(scenario), study.blocks_of(scenario) - first_block)


def job_record_paths(study: Study, layout: ResultsLayout) -> list[Path]:
    """The record every job writes when all its shards are in place."""
    return [layout.job_record(s, b) for s, b in job_keys(study)]


def shard_paths(study: Study, layout: ResultsLayout) -> list[Path]:
    """Every shard the study needs, scenario by scenario."""
    return [layout.shard(s, e, b) for s, b in job_keys(study) for e in study.estimators]


def scenario_by_key(study: Study, key: str):
    for s in study.scenarios:
        if s.key == key:
            return s
    raise KeyError(f"study {study.name!r} has no scenario {key!r}")


def job_spec(study: Study, scenario: str, first_block: int) -> dict:
    """The JSON-able spec of one job: its scenario and blocks, and every estimator."""
    s = scenario_by_key(study, scenario)
    estimators = []
    for e in study.estimators.values():
        entry = {"estimator": {"name": e.name, "function": e.function, "args": dict(e.args)}}
        if plugins.accepts(plugins.resolve(e.function, study.search_dirs), "level"):
            entry["level"] = study.level
        estimators.append(entry)
    return {
        "seed": study.seed,
        "block_size": study.block_size,
        "first_block": first_block,
        "n_blocks": job_n_blocks(study, scenario, first_block),
        "scenario": {"key": s.key, "spawn_key": s.spawn_key, "dgm": s.spec, "n": s.n},
        "estimators": estimators,
    }


def job_spec_json(study: Study, scenario: str, first_block: int) -> str:
    return json.dumps(job_spec(study, scenario, first_block), sort_keys=True)


def shard_spec(study: Study, scenario: str, estimator: str, first_block: int) -> dict:
    """The spec of one shard: one estimator's part of its job."""
    names = list(study.estimators)
    return estimator_specs(job_spec(study, scenario, first_block))[names.index(estimator)]


def shard_spec_json(study: Study, scenario: str, estimator: str, first_block: int) -> str:
    return json.dumps(shard_spec(study, scenario, estimator, first_block), sort_keys=True)


@lru_cache(maxsize=None)
def _code_files(function: str, dirs: tuple) -> tuple[str, ...]:
    return tuple(str(p) for p in plugins.code_files(function, dirs))


def estimator_sources(study: Study) -> list[str]:
    """Source files of every estimator (modules and same-folder helpers): inputs of each job."""
    files = {f for e in study.estimators.values() for f in _code_files(e.function, tuple(study.search_dirs))}
    return sorted(files)


def job_values(study: Study, scenario: str, first_block: int) -> int:
    """Values a job draws (n per replicate): its scheduling priority, so the largest
    jobs start first and the small ones fill in at the end."""
    n = scenario_by_key(study, scenario).n
    return n * job_n_blocks(study, scenario, first_block) * study.block_size
