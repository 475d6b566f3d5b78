"""Load a study file: schema first, then meaning, every problem at once, then the ``Study``."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Mapping

from estbench.core.errors import StudyError
from estbench.study.checks import checkable_part, semantic_problems
from estbench.study.model import DEFAULT_MAX_FAILED_SHARE, EstimatorSpec, Study
from estbench.study.schema import read_yaml, schema_errors


def _auto_or_int(value) -> int | None:
    return None if value == "auto" else int(value)


def study_from_mapping(raw: Any, source: Path | None = None) -> Study:
    """Validate *raw* (schema, then semantics) and build a ``Study``.

    Raises ``StudyError`` listing every problem found.
    """
    if not isinstance(raw, Mapping):
        raise StudyError(f"`(top level)`: the study must be a mapping of keys, got {type(raw).__name__}",
                         source)
    errors = schema_errors(raw)
    base_dir = source.parent if source else None
    problems = [text for _, text in errors]
    problems += semantic_problems(checkable_part(raw, {path for path, _ in errors}), base_dir)
    if problems:
        raise StudyError(sorted(set(problems)), source)
    estimators = {name: EstimatorSpec(name, e["function"], e["target"], dict(e.get("args", {})),
                                      e.get("description", ""))
                  for name, e in raw["estimators"].items()}
    return Study(
        name=raw["study"], description=raw.get("description", ""), seed=int(raw["seed"]),
        replicates=int(raw["replicates"]), block_size=int(raw.get("block_size", 1000)),
        blocks_per_job=_auto_or_int(raw.get("blocks_per_job", "auto")),
        values_per_job=_auto_or_int(raw.get("values_per_job", "auto")), level=float(raw.get("level", 0.95)),
        sample_sizes=tuple(int(n) for n in raw["sample_sizes"]), dgms=dict(raw["dgms"]),
        estimators=estimators, reference=raw.get("reference"),
        targets=dict(raw.get("targets", {})),
        max_failed_share=float(raw.get("max_failed_share", DEFAULT_MAX_FAILED_SHARE)),
        report=dict(raw.get("report", {})),
        source=source, raw=raw)


def load_study(path: Path | str) -> Study:
    """Read, validate and build the study in the YAML file at *path*."""
    path = Path(path).resolve()
    return study_from_mapping(read_yaml(path), source=path)
