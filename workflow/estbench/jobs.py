"""What the workflow runs: simulation jobs, their shards, and each job's own spec.

A job is one scenario x a range of seed blocks, for every estimator of the
study: it draws each block once and writes one shard per estimator. Its spec
holds only what decides its numbers (seed, block size, its scenario and
blocks, each estimator's function and args, the level for those that take
one). Snakemake reruns a job when its spec or an estimator's code changes;
the job then recomputes only the shards whose own spec or code changed, and
leaves every other shard untouched (see ``shard.run_job``).

Used by ``workflow/rules/common.smk``, by the runner and by ``estbench status``.
"""

from __future__ import annotations

import json
from functools import lru_cache
from pathlib import Path
from typing import TYPE_CHECKING, Iterable, Mapping

from . import plugins
from .paths import job_record_path, shard_file, shard_path

if TYPE_CHECKING:
    from .study import Study

#: Keys a job shares with each of its per-estimator shard specs.
COMMON_KEYS = ("seed", "block_size", "first_block", "n_blocks", "scenario")


def job_keys(study: Study) -> list[tuple[str, int]]:
    """(scenario key, first block) of every job, scenario by scenario."""
    return [(s.key, b) for s in study.scenarios for b in study.job_first_blocks(s.key)]


def job_n_blocks(study: Study, scenario: str, first_block: int) -> int:
    """Seed blocks of the job starting at *first_block* (the last one may be short)."""
    return min(study.job_blocks(scenario), study.blocks_of(scenario) - first_block)


def job_record_paths(study: Study, workdir: Path | str = ".") -> list[Path]:
    """The record every job writes when all its shards are in place."""
    return [job_record_path(study.name, s, b, workdir) for s, b in job_keys(study)]


def shard_paths(study: Study, workdir: Path | str = ".") -> list[Path]:
    """Every shard the study needs, scenario by scenario."""
    return [shard_path(study.name, s, e, b, workdir) for s, b in job_keys(study) for e in study.estimators]


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


def estimator_specs(job: Mapping) -> list[dict]:
    """The spec of each shard of a job: the job's common part plus one estimator.

    A shard's spec decides its numbers, so its hash tells whether an existing
    shard still stands.
    """
    common = {k: job[k] for k in COMMON_KEYS}
    return [{**common, **entry} for entry in job["estimators"]]


def job_of(specs: Iterable[Mapping]) -> dict:
    """The job computing the given shard specs (which must share scenario and blocks)."""
    specs = list(specs)
    common = {k: specs[0][k] for k in COMMON_KEYS}
    if any({k: s[k] for k in COMMON_KEYS} != common for s in specs):
        raise ValueError("shard specs of one job must share seed, block size, blocks and scenario")
    return {**common, "estimators": [{k: v for k, v in s.items() if k not in COMMON_KEYS} for s in specs]}


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


def shards_of_job(results: Path | str, job: Mapping) -> dict[str, Path]:
    """Estimator name -> shard path of every shard a job writes under *results*."""
    key, first = job["scenario"]["key"], job["first_block"]
    return {e["estimator"]["name"]: shard_file(results, key, e["estimator"]["name"], first)
            for e in job["estimators"]}


def job_values(study: Study, scenario: str, first_block: int) -> int:
    """Values a job draws (n per replicate): its scheduling priority, so the largest
    jobs start first and the small ones fill in at the end."""
    n = scenario_by_key(study, scenario).n
    return n * job_n_blocks(study, scenario, first_block) * study.block_size
