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
import numpy as np
import yaml

from . import plugins
from .dgms import build_dgm, freeze, scipy_distribution
from .estimator import STATUS_ERROR, apply_to_block, short_message
from .mechanisms import MECHANISMS, check_params
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
    validator = jsonschema.Draft202012Validator(schema)
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


#: Values (block_size x n per block) one job draws when ``blocks_per_job`` is 'auto':
#: several seconds of work for cheap estimators, so start-up stays a few per cent.
AUTO_VALUES_PER_JOB = 50_000_000


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


def _variants(params: Mapping):
    """(key-path suffix, params): every swept value tried once, the others at their first value."""
    base = {k: (v[0] if isinstance(v, list) else v) for k, v in params.items()}
    yield "", base
    for k, values in params.items():
        if isinstance(values, list):
            for i, value in enumerate(values[1:], 1):
                yield f".{k}[{i}]", {**base, k: value}


def _dgm_problems(name: str, spec: Mapping, dirs: list[str]) -> list[str]:
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
    if "distribution" in spec:
        try:
            scipy_distribution(spec["distribution"])
        except ValueError as exc:
            return [f"{where}.distribution`: {exc}"]
        for label, values in _variants(params):
            try:
                freeze(spec["distribution"], values)
            except ValueError as exc:
                problems.append(f"{where}.params{label}`: {exc}")
    elif "mechanism" in spec:
        for label, values in _variants(params):
            problems += [f"{where}.params{label}`: {p}"
                         for p in check_params(MECHANISMS[spec["mechanism"]], values)]
    else:
        for key in ("generator", "truth"):
            try:
                plugins.resolve(spec[key], dirs)
            except (ImportError, AttributeError, TypeError) as exc:
                problems.append(f"{where}.{key}`: cannot use {spec[key]!r}: {exc}")
    return problems


def _probe_n(sample_sizes) -> int:
    """Sample size for check-time trial runs: the largest n <= 100, else the smallest."""
    small = [n for n in sample_sizes if n <= 100]
    return max(small) if small else min(sample_sizes)


def _probe_block(name: str, spec: Mapping, n: int, dirs, seed) -> tuple[Any, list[str]]:
    """Draw a 3-replicate block (and check the truth table) or say what went wrong."""
    where = f"`dgms.{name}"
    first = next(_variants(spec.get("params", {})))[1]
    resolved = {**spec, "params": first} if "params" in spec else dict(spec)
    try:
        dgm = build_dgm(resolved, dirs, seed)
        dgm.estimands()  # runs a user's truth function, so its errors surface here
    except Exception as exc:  # a user's truth function with a bug
        return None, [f"{where}.truth`: failed: {short_message(exc)}"]
    try:
        data = dgm.draw(np.random.default_rng(0), PROBE_REPS, n)
    except Exception as exc:
        return None, [f"{where}`: drawing a block failed: {short_message(exc)}"]
    arrays = data.values() if isinstance(data, Mapping) else [data]
    for arr in arrays:
        shape = np.shape(arr)
        if not shape or shape[0] != PROBE_REPS:
            return None, [f"{where}.generator`: must return an array (or dict of arrays) with one row "
                          f"per replicate; asked for {PROBE_REPS} replicates of n = {n}, got shape {shape}"]
    return data, []


PROBE_REPS = 3


def _estimator_problems(raw: Mapping, scenarios: list[Scenario], dirs: list[str], seed: int) -> list[str]:
    problems = []
    available: dict[str, dict[str, bool]] = {}
    for s in scenarios:
        dgm = build_dgm(s.spec, dirs, seed)
        avail = available.setdefault(s.dgm, {})
        for estimand in dgm.estimands():
            avail[estimand] = avail.get(estimand, True) and math.isfinite(dgm.truth(estimand))
    n = _probe_n(raw["sample_sizes"])
    blocks = {}
    for dgm_name, spec in raw["dgms"].items():
        blocks[dgm_name], found = _probe_block(dgm_name, spec, n, dirs, seed)
        problems += found
    level = raw.get("level", 0.95)
    for name, spec in raw.get("estimators", {}).items():
        where = f"`estimators.{name}"
        try:
            fn = plugins.resolve(spec["function"], dirs)
        except (ImportError, AttributeError, TypeError) as exc:
            problems.append(f"{where}.function`: cannot use {spec['function']!r}: {exc}")
            fn = None
        target = spec["target"]
        for dgm_name, avail in available.items():
            if not avail.get(target, False):
                have = [e for e, ok in avail.items() if ok]
                problems.append(
                    f"{where}.target`: DGM {dgm_name!r} cannot supply the estimand "
                    f"{target!r} (it supplies: {', '.join(have) or 'none'})")
        if fn is None:
            continue
        for dgm_name, data in blocks.items():
            if data is None:
                continue
            kwargs = dict(spec.get("args", {}))
            if plugins.accepts(fn, "level"):
                kwargs["level"] = level
            if plugins.accepts(fn, "rng"):
                kwargs["rng"] = np.random.default_rng(0)
            result = apply_to_block(fn, data, PROBE_REPS, kwargs)
            if all(result.status == STATUS_ERROR):
                problems.append(f"{where}.function`: a trial run on DGM {dgm_name!r} (n = {n}) failed: "
                                f"{result.message[0]} (check its signature f(data, **args) -> "
                                f"estimates, and that it suits this DGM's data)")
    return problems


def _report_problems(raw: Mapping) -> list[str]:
    """Report options must name DGMs, sample sizes and estimators the study has."""
    report, problems = raw.get("report", {}), []
    zip_spec = report.get("zip")
    if zip_spec:
        if zip_spec["dgm"] not in raw["dgms"]:
            problems.append(f"`report.zip.dgm`: {zip_spec['dgm']!r} is not one of the DGMs "
                            f"({', '.join(raw['dgms'])})")
        if zip_spec["n"] not in raw["sample_sizes"]:
            problems.append(f"`report.zip.n`: {zip_spec['n']} is not one of the sample sizes")
    for est, per_dgm in report.get("asymptotic_efficiency", {}).items():
        if est not in raw["estimators"]:
            problems.append(f"`report.asymptotic_efficiency.{est}`: not one of the estimators")
        for dgm in per_dgm:
            if dgm not in raw["dgms"]:
                problems.append(f"`report.asymptotic_efficiency.{est}.{dgm}`: not one of the DGMs")
    return problems


def semantic_problems(raw: Mapping, base_dir: Path | None) -> list[str]:
    """Problems the schema cannot see: names and parameters, imports, targets, trial runs."""
    dirs = plugins.search_path(base_dir)
    problems = []
    for name, spec in raw.get("dgms", {}).items():
        problems += _dgm_problems(name, spec, dirs)
    if problems:
        return sorted(set(problems))
    scenarios = expand_study(raw["dgms"], raw["sample_sizes"])
    seen: dict[str, Scenario] = {}
    for s in scenarios:
        if s.key in seen and seen[s.key].dgm != s.dgm:
            problems.append(f"`dgms.{s.dgm}`: draws the same data as `dgms.{seen[s.key].dgm}` "
                            f"(identical spec); remove one of them")
        seen.setdefault(s.key, s)
    try:
        problems += _estimator_problems(raw, scenarios, dirs, int(raw["seed"]))
    except Exception as exc:  # a user's truth function failing on some swept value
        problems.append(f"`dgms`: computing the true values failed: {short_message(exc)}")
    problems += _report_problems(raw)
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
        blocks_per_job=None if raw.get("blocks_per_job", "auto") == "auto" else int(raw["blocks_per_job"]), level=float(raw.get("level", 0.95)),
        sample_sizes=tuple(int(n) for n in raw["sample_sizes"]), dgms=dict(raw["dgms"]),
        estimators=estimators, reference=raw.get("reference"),
        targets=dict(raw.get("targets", {})), report=dict(raw.get("report", {})),
        source=source, raw=raw)


def load_study(path: Path | str) -> Study:
    """Read, validate and build the study in the YAML file at *path*."""
    path = Path(path).resolve()
    return study_from_mapping(read_yaml(path), source=path)
