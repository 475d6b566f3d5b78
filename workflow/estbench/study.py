"""Load and validate a study file: schema first, then meaning, every problem at once.

Each problem is one line naming the key path and the rule, e.g.
"`sample_sizes[1]`: must be >= 1, got 0".
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any, Mapping

import jsonschema
import yaml

from . import plugins
from .dgms import DISTRIBUTION_ESTIMANDS, build_dgm, freeze
from .errors import StudyError
from .paths import SCHEMA_FILE
from .scenarios import Scenario, expand_study


# --------------------------------------------------------------------- YAML --

class _StrictLoader(yaml.SafeLoader):
    """SafeLoader that refuses duplicate keys instead of keeping the last one."""


def _construct_mapping(loader, node, deep=False):
    seen = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        if key in seen:
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key {key!r}", key_node.start_mark)
        seen.add(key)
    return loader.construct_mapping(node, deep)


_StrictLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def read_yaml(path: Path | str) -> Any:
    """Parse a YAML file, turning syntax errors into one-line ``StudyError``s."""
    path = Path(path)
    try:
        text = path.read_text()
    except OSError as exc:
        raise StudyError(f"cannot read study file {path}: {exc.strerror}") from None
    try:
        data = yaml.load(text, Loader=_StrictLoader)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        problem = getattr(exc, "problem", None) or str(exc)
        raise StudyError(f"study file {path} is not valid YAML{where}: {problem}") from None
    if data is None:
        raise StudyError(f"study file {path} is empty")
    return data


def load_schema() -> dict:
    """The study-file JSON Schema (shared with Snakemake's ``validate``)."""
    return yaml.safe_load(SCHEMA_FILE.read_text())


# ------------------------------------------------------------------- schema --

def key_path(parts) -> str:
    """``['dgms', 'a', 'params']`` -> ``dgms.a.params``; list indices in brackets."""
    out = ""
    for p in parts:
        out += f"[{p}]" if isinstance(p, int) else (f".{p}" if out else str(p))
    return out or "(top level)"


def _rule_text(err: jsonschema.ValidationError) -> str:
    v, s, inst = err.validator, err.schema, err.instance
    if "x-rule" in s:
        return f"{s['x-rule']}, got {inst!r}"
    if v == "type":
        want = s["type"] if isinstance(s["type"], str) else " or ".join(s["type"])
        article = "an" if want[0] in "aeiou" else "a"
        return f"must be {article} {want}, got {inst!r}"
    bounds = {"minimum": ">=", "maximum": "<=", "exclusiveMinimum": ">", "exclusiveMaximum": "<"}
    if v in bounds:
        return f"must be {bounds[v]} {err.validator_value}, got {inst!r}"
    if v == "minItems":
        return f"must have at least {err.validator_value} item(s)"
    if v == "minProperties":
        return f"must have at least {err.validator_value} entry"
    if v == "uniqueItems":
        return f"must not repeat a value, got {inst!r}"
    if v == "enum":
        return f"must be one of {', '.join(map(str, err.validator_value))}, got {inst!r}"
    return err.message


def schema_problems(raw: Any, schema: dict | None = None) -> list[str]:
    """Every schema violation of *raw* as one line each, sorted by key path."""
    schema = schema or load_schema()
    validator = jsonschema.Draft7Validator(schema)
    problems = []
    for err in validator.iter_errors(raw):
        path = list(err.absolute_path)
        if err.validator == "additionalProperties":
            allowed = set(err.schema.get("properties", {}))
            for extra in sorted(set(err.instance) - allowed):
                hint = f"; allowed keys: {', '.join(sorted(allowed))}" if allowed else ""
                problems.append(f"`{key_path(path + [extra])}`: unknown key{hint}")
        elif err.validator == "required":
            missing = err.message.split("'")[1]
            problems.append(f"`{key_path(path + [missing])}`: required key is missing")
        elif "propertyNames" in err.schema_path:
            rule = err.schema.get("x-rule", "is not an allowed name")
            problems.append(f"`{key_path(path)}`: key {err.instance!r} {rule}")
        else:
            problems.append(f"`{key_path(path)}`: {_rule_text(err)}")
    return sorted(set(problems))


# ---------------------------------------------------------------- the study --

@dataclass(frozen=True)
class EstimatorSpec:
    """One estimator as the study names it."""

    name: str
    function: str
    target: str
    args: Mapping = field(default_factory=dict)
    description: str = ""


@dataclass(frozen=True)
class Study:
    """A validated study, with defaults applied."""

    name: str
    description: str
    seed: int
    replicates: int
    block_size: int
    blocks_per_job: int
    level: float
    sample_sizes: tuple
    dgms: Mapping[str, Mapping]
    estimators: Mapping[str, EstimatorSpec]
    reference: str | None
    targets: Mapping[str, float]
    source: Path | None          #: the study file, when loaded from one
    raw: Mapping                 #: the mapping as written, for the report appendix

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

    @cached_property
    def scenarios(self) -> list[Scenario]:
        return expand_study(self.dgms, self.sample_sizes)

    def job_first_blocks(self) -> list[int]:
        """First seed block of every shard of a scenario x estimator."""
        return list(range(0, self.n_blocks, self.blocks_per_job))


def _dgm_problems(name: str, spec: Mapping) -> list[str]:
    where = f"`dgms.{name}"
    problems = []
    if "mixture" in spec:
        comps = spec["mixture"]
        for i, c in enumerate(comps):
            try:
                freeze(c["distribution"], c.get("params", {}))
            except ValueError as exc:
                problems.append(f"{where}.mixture[{i}]`: {exc}")
        total = sum(c["weight"] for c in comps)
        if not math.isclose(total, 1.0, abs_tol=1e-9):
            problems.append(f"{where}.mixture`: weights must sum to 1, got {total:g}")
        return problems
    params = spec.get("params", {})
    lists = {k: v for k, v in params.items() if isinstance(v, list)}
    # Check each swept value on its own, with the other params at their first value.
    base = {k: (v[0] if isinstance(v, list) else v) for k, v in params.items()}
    try:
        freeze(spec["distribution"], base)
    except ValueError as exc:
        return [f"{where}.distribution`: {exc}" if "no distribution" in str(exc)
                else f"{where}.params`: {exc}"]
    for k, values in lists.items():
        for i, value in enumerate(values):
            try:
                freeze(spec["distribution"], {**base, k: value})
            except ValueError as exc:
                problems.append(f"{where}.params.{k}[{i}]`: {exc}")
    return problems


def _estimator_problems(raw: Mapping, scenarios: list[Scenario], dirs: list[str]) -> list[str]:
    problems = []
    truths: dict[str, dict[str, float]] = {}
    for s in scenarios:
        dgm = build_dgm(s.spec)
        truths.setdefault(s.dgm, {})
        for estimand in DISTRIBUTION_ESTIMANDS:
            value = dgm.truth(estimand)
            ok = math.isfinite(value)
            truths[s.dgm][estimand] = truths[s.dgm].get(estimand, True) and ok
    for name, spec in raw.get("estimators", {}).items():
        try:
            plugins.resolve(spec["function"], dirs)
        except (ImportError, AttributeError, TypeError) as exc:
            problems.append(f"`estimators.{name}.function`: cannot use {spec['function']!r}: {exc}")
        target = spec["target"]
        for dgm, avail in truths.items():
            if not avail.get(target, False):
                have = [e for e, ok in avail.items() if ok]
                problems.append(
                    f"`estimators.{name}.target`: DGM {dgm!r} cannot supply the estimand "
                    f"{target!r} (it supplies: {', '.join(have) or 'none'})")
    return problems


def semantic_problems(raw: Mapping, base_dir: Path | None) -> list[str]:
    """Problems the schema cannot see: scipy names and parameters, imports, targets."""
    problems = []
    for name, spec in raw.get("dgms", {}).items():
        problems += _dgm_problems(name, spec)
    if problems:
        return problems
    scenarios = expand_study(raw["dgms"], raw["sample_sizes"])
    seen: dict[str, Scenario] = {}
    for s in scenarios:
        if s.key in seen and seen[s.key].dgm != s.dgm:
            problems.append(f"`dgms.{s.dgm}`: draws the same data as `dgms.{seen[s.key].dgm}` "
                            f"(identical spec); remove one of them")
        seen.setdefault(s.key, s)
    problems += _estimator_problems(raw, scenarios, plugins.search_path(base_dir))
    ref = raw.get("reference")
    if ref is not None and ref not in raw["estimators"]:
        problems.append(f"`reference`: {ref!r} is not one of the estimators "
                        f"({', '.join(raw['estimators'])})")
    return sorted(set(problems))


def study_from_mapping(raw: Any, source: Path | None = None) -> Study:
    """Validate *raw* (schema, then semantics) and build a ``Study``.

    Raises ``StudyError`` listing every problem found.
    """
    if not isinstance(raw, Mapping):
        raise StudyError(f"`(top level)`: the study must be a mapping of keys, got {type(raw).__name__}")
    problems = schema_problems(raw)
    if problems:
        raise StudyError(problems)
    base_dir = source.parent if source else None
    problems = semantic_problems(raw, base_dir)
    if problems:
        raise StudyError(problems)
    estimators = {name: EstimatorSpec(name, e["function"], e["target"], dict(e.get("args", {})),
                                      e.get("description", ""))
                  for name, e in raw["estimators"].items()}
    return Study(
        name=raw["study"], description=raw.get("description", ""), seed=int(raw["seed"]),
        replicates=int(raw["replicates"]), block_size=int(raw.get("block_size", 1000)),
        blocks_per_job=int(raw.get("blocks_per_job", 10)), level=float(raw.get("level", 0.95)),
        sample_sizes=tuple(int(n) for n in raw["sample_sizes"]), dgms=dict(raw["dgms"]),
        estimators=estimators, reference=raw.get("reference"),
        targets=dict(raw.get("targets", {})), source=source, raw=raw)


def load_study(path: Path | str) -> Study:
    """Read, validate and build the study in the YAML file at *path*."""
    path = Path(path).resolve()
    return study_from_mapping(read_yaml(path), source=path)
