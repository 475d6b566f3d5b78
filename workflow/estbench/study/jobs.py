"""What the workflow runs: simulation jobs, their shards, and each job's own spec.

A job is a run of pieces (scenario x range of seed blocks, see
``estbench.study.packing``), for every estimator of the study: it draws each
block once and writes one shard per estimator and piece. Its spec holds only
what decides its numbers (seed, block size, each piece's scenario and blocks,
each estimator's function and args, the level for those that take one), and
is written to a file the job reads. Snakemake reruns a job when its spec or an
estimator's code changes; the job then recomputes only the shards whose own
spec or code changed, and leaves every other shard untouched (see
``estbench.simulate.job.run_job``).

Used by ``workflow/rules/common.smk``, by the runner and by ``estbench status``.
"""

from __future__ import annotations

import json
from functools import lru_cache
from pathlib import Path

from estbench.core.files import write_text_atomically
from estbench.core.layout import ResultsLayout
from estbench.simulate import plugins
from estbench.simulate.job import piece_specs
from estbench.study.model import Study
from estbench.study.packing import Job, Piece


def job_keys(study: Study) -> list[tuple[str, int]]:
    """(scenario key, first block) of every job's first piece: the job's name."""
    return [job.key for job in study.jobs]


def job_by_key(study: Study, scenario: str, first_block: int) -> Job:
    """The job named (*scenario*, *first_block*)."""
    try:
        return study.jobs_by_key[(scenario, int(first_block))]
    except KeyError:
        raise KeyError(f"study {study.name!r} has no job starting at scenario {scenario!r}, "
                       f"block {first_block}") from None


def job_of_piece(study: Study) -> dict[tuple[str, int], tuple[str, int]]:
    """(scenario, first block) of every piece -> the key of the job computing it."""
    return {piece.key: job.key for job in study.jobs for piece in job.pieces}


def job_record_paths(study: Study, layout: ResultsLayout) -> list[Path]:
    """The record every job writes when all its shards are in place."""
    return [layout.job_record(s, b) for s, b in job_keys(study)]


def shard_paths(study: Study, layout: ResultsLayout) -> list[Path]:
    """Every shard the study needs, scenario by scenario."""
    return [layout.shard(p.scenario, e, p.first_block) for p in study.pieces for e in study.estimators]


def scenario_by_key(study: Study, key: str):
    try:
        return study.scenarios_by_key[key]
    except KeyError:
        raise KeyError(f"study {study.name!r} has no scenario {key!r}") from None


def _estimator_entries(study: Study) -> list[dict]:
    entries = []
    for e in study.estimators.values():
        entry = {"estimator": {"name": e.name, "function": e.function, "args": dict(e.args)}}
        if plugins.accepts(plugins.resolve(e.function, study.search_dirs), "level"):
            entry["level"] = study.level
        entries.append(entry)
    return entries


def _piece_entry(study: Study, piece: Piece) -> dict:
    s = scenario_by_key(study, piece.scenario)
    return {"scenario": {"key": s.key, "spawn_key": s.spawn_key, "dgm": s.spec, "n": s.n},
            "first_block": piece.first_block, "n_blocks": piece.n_blocks}


def job_spec(study: Study, scenario: str, first_block: int) -> dict:
    """The JSON-able spec of one job: every estimator, and its pieces in order."""
    job = job_by_key(study, scenario, first_block)
    return {
        "seed": study.seed,
        "block_size": study.block_size,
        "estimators": _estimator_entries(study),
        "pieces": [_piece_entry(study, p) for p in job.pieces],
    }


def job_spec_json(study: Study, scenario: str, first_block: int) -> str:
    return json.dumps(job_spec(study, scenario, first_block), sort_keys=True)


def write_job_spec(study: Study, layout: ResultsLayout, scenario: str, first_block: int) -> Path:
    """Write the spec file of job (*scenario*, *first_block*) unless it already holds that
    spec (then its mtime stays: Snakemake reruns a job whose spec file is newer than its
    record). Returns its path."""
    path, text = layout.job_spec(scenario, first_block), job_spec_json(study, scenario, first_block) + "\n"
    try:
        if path.read_text() == text:
            return path
    except (OSError, UnicodeDecodeError):
        pass
    write_text_atomically(path, text)
    return path


def write_job_specs(study: Study, layout: ResultsLayout) -> list[Path]:
    """Write (or leave, if right) the spec file of every job."""
    return [write_job_spec(study, layout, scenario, first) for scenario, first in job_keys(study)]


def piece_spec(study: Study, scenario: str, first_block: int) -> dict:
    """The spec of the piece (scenario, first block) as a job of its own."""
    entry = _piece_entry(study, study.pieces_by_key[(scenario, first_block)])
    return piece_specs({"seed": study.seed, "block_size": study.block_size,
                        "estimators": _estimator_entries(study), "pieces": [entry]})[0]


def shard_spec(study: Study, scenario: str, estimator: str, first_block: int) -> dict:
    """The spec of one shard: one estimator's part of its piece."""
    from estbench.simulate.job import estimator_specs
    names = list(study.estimators)
    return estimator_specs(piece_spec(study, scenario, first_block))[names.index(estimator)]


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
    return job_by_key(study, scenario, first_block).values
