"""Check a schema-valid study for meaning: DGM parameters, duplicate scenarios,
estimator imports and targets, trial runs on a 3-replicate block, report options.

Each problem is one line naming the key path and the rule; all are returned at once.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from estbench.simulate import plugins
from estbench.simulate.dgms import build_dgm, spec_problems
from estbench.simulate.dgms.common import variants
from estbench.simulate.estimator import STATUS_ERROR, apply_in_child, short_message
from estbench.study.scenarios import Scenario, expand_study


def _probe_n(sample_sizes) -> int:
    """Sample size for check-time trial runs: the largest n <= 100, else the smallest."""
    small = [n for n in sample_sizes if n <= 100]
    return max(small) if small else min(sample_sizes)


def _probe_block(name: str, spec: Mapping, n: int, dirs, seed) -> tuple[Any, list[str]]:
    """Draw a 3-replicate block (and check the truth table) or say what went wrong."""
    where = f"`dgms.{name}"
    first = next(variants(spec.get("params", {})))[1]
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
            # in a child process: an estimator that crashes its process fails its trial
            result = apply_in_child(fn, data, PROBE_REPS, kwargs)
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


#: What the meaning checks use in place of a top-level value the schema refused.
_STAND_INS = {"seed": 0, "sample_sizes": [10], "level": 0.95}


def checkable_part(raw: Mapping, bad_paths) -> dict:
    """The part of *raw* the meaning checks can still examine when the schema refused
    the keys at *bad_paths* (tuples of keys), so one pass reports every problem.

    A refused DGM or estimator is left out; a refused value the checks need gets a
    neutral stand-in; a reference or report options that could only repeat a
    schema problem (naming what was left out, or sample sizes that were refused)
    are dropped.
    """
    bad_top = {p[0] for p in bad_paths if p}
    part = {k: v for k, v in raw.items() if k not in bad_top or k in ("dgms", "estimators")}
    part.update({k: v for k, v in _STAND_INS.items() if k in bad_top or k not in part})
    gone = set()
    for section in ("dgms", "estimators"):
        given = part.get(section)
        given = given if isinstance(given, Mapping) and (section,) not in bad_paths else {}
        bad = {p[1] for p in bad_paths if len(p) > 1 and p[0] == section}
        part[section] = {name: spec for name, spec in given.items() if name not in bad}
        if isinstance(raw.get(section), Mapping):
            gone |= set(raw[section]) - set(part[section])
    if part.get("reference") in gone:
        part.pop("reference")
    if gone or "sample_sizes" in bad_top:
        part.pop("report", None)
    return part


def semantic_problems(raw: Mapping, base_dir: Path | None) -> list[str]:
    """Problems the schema cannot see: names and parameters, imports, targets, trial runs.

    A DGM with a problem of its own is left out of the checks that draw from it,
    so the estimators are still checked on the others.
    """
    dirs = plugins.search_path(base_dir)
    problems, usable = [], {}
    for name, spec in raw.get("dgms", {}).items():
        found = spec_problems(name, spec, dirs)
        problems += found
        if not found:
            usable[name] = spec
    study_raw, raw = raw, {**raw, "dgms": usable}
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
    problems += _report_problems(study_raw)
    ref = raw.get("reference")
    if ref is not None and ref not in raw["estimators"]:
        problems.append(f"`reference`: {ref!r} is not one of the estimators "
                        f"({', '.join(raw['estimators'])})")
    return sorted(set(problems))
