"""Structured data-generating mechanisms: two-arm trials, regression, proportions, counts.

Each mechanism draws a whole seed block in a fixed order of calls, so its data
depend only on the block's stream. Parameters are checked before anything is
drawn; ``PARAMS`` lists each one with its default (``REQUIRED`` if none) and rule.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable, ClassVar, Mapping

import numpy as np

from estbench.simulate.dgms.common import params_text, variants

REQUIRED = object()


@dataclass(frozen=True)
class Param:
    """One mechanism parameter: default and the rule its value must meet."""

    default: object
    rule: str
    ok: Callable[[float], bool]


_ANY = Param(0.0, "any number", lambda v: math.isfinite(v))


def _positive(default=REQUIRED):
    return Param(default, "> 0", lambda v: v > 0)


class Mechanism:
    """Base: validated parameters in ``self.p``; subclasses draw and know the truth."""

    PARAMS: ClassVar[Mapping[str, Param]] = {}
    ESTIMANDS: ClassVar[tuple] = ()

    def __init__(self, params: Mapping[str, float]):
        problems = check_params(type(self), params)
        if problems:
            raise ValueError("; ".join(problems))
        self.p = {k: (params[k] if k in params else spec.default) for k, spec in self.PARAMS.items()}

    def truth(self, estimand: str) -> float:
        return float(self._truths().get(estimand, math.nan))

    def truth_mcse(self, estimand: str) -> float:
        return 0.0

    def crb(self, estimand: str, n: int) -> float:
        """Cramér–Rao lower bound on the variance of an unbiased estimator; NaN if unknown."""
        return math.nan

    def estimands(self) -> tuple:
        return self.ESTIMANDS

    def _truths(self) -> dict:
        raise NotImplementedError


def check_params(cls, params: Mapping) -> list[str]:
    """Problems with *params* for mechanism *cls*, one line each (key relative to params)."""
    problems = []
    for name in params:
        if name not in cls.PARAMS:
            problems.append(f"unknown parameter {name!r} (allowed: {', '.join(cls.PARAMS)})")
    for name, spec in cls.PARAMS.items():
        if name not in params:
            if spec.default is REQUIRED:
                problems.append(f"parameter {name!r} is required")
            continue
        value = params[name]
        if spec.default is None and value is None:
            continue
        if not isinstance(value, (int, float)) or isinstance(value, bool) or not spec.ok(value):
            problems.append(f"parameter {name!r} must be {spec.rule}, got {value!r}")
    return problems


class TwoArm(Mechanism):
    """Two-arm comparison: y = control_mean + effect * arm + covariate_effect * z + e.

    round(allocation * n) participants are treated (arm = 1), the rest are
    controls; z ~ N(0, covariate_sd^2) is a baseline covariate; e ~ N(0, sd^2)
    in controls and N(0, sd_treatment^2) in the treated (default: sd).
    Data: {"y", "arm", "covariate"}, each (reps, n). Estimand: ``effect``.
    """

    PARAMS = {"effect": Param(REQUIRED, "any number", math.isfinite),
              "control_mean": _ANY, "sd": _positive(1.0),
              "sd_treatment": Param(None, "> 0", lambda v: v > 0),
              "allocation": Param(0.5, "in (0, 1)", lambda v: 0 < v < 1),
              "covariate_effect": _ANY, "covariate_sd": _positive(1.0)}
    ESTIMANDS = ("effect",)

    def draw(self, rng, reps, n):
        p = self.p
        n1 = int(round(p["allocation"] * n))
        arm = np.zeros((reps, n))
        arm[:, :n1] = 1.0
        z = rng.normal(0.0, p["covariate_sd"], size=(reps, n))
        sd = np.where(arm == 1, p["sd_treatment"] or p["sd"], p["sd"])
        e = rng.standard_normal((reps, n)) * sd
        y = p["control_mean"] + p["effect"] * arm + p["covariate_effect"] * z + e
        return {"y": y, "arm": arm, "covariate": z}

    def _truths(self):
        return {"effect": self.p["effect"]}


class Regression(Mechanism):
    """Simple linear regression: y = intercept + slope * x + e, x ~ N(x_mean, x_sd^2).

    The error SD is sd * (1 + heteroskedasticity * |x - x_mean| / x_sd), so 0
    gives homoskedastic errors. Data: {"x", "y"}. Estimands: ``slope``, ``intercept``.
    """

    PARAMS = {"slope": Param(REQUIRED, "any number", math.isfinite), "intercept": _ANY,
              "x_mean": _ANY, "x_sd": _positive(1.0), "sd": _positive(1.0),
              "heteroskedasticity": Param(0.0, ">= 0", lambda v: v >= 0)}
    ESTIMANDS = ("slope", "intercept")

    def draw(self, rng, reps, n):
        p = self.p
        x = rng.normal(p["x_mean"], p["x_sd"], size=(reps, n))
        scale = p["sd"] * (1 + p["heteroskedasticity"] * np.abs(x - p["x_mean"]) / p["x_sd"])
        y = p["intercept"] + p["slope"] * x + rng.standard_normal((reps, n)) * scale
        return {"x": x, "y": y}

    def _truths(self):
        return {"slope": self.p["slope"], "intercept": self.p["intercept"]}


class Proportion(Mechanism):
    """Bernoulli(p) outcomes as 0/1, shape (reps, n). Estimands: ``p`` (= ``mean``), ``var``."""

    PARAMS = {"p": Param(REQUIRED, "in (0, 1)", lambda v: 0 < v < 1)}
    ESTIMANDS = ("p", "mean", "var")

    def draw(self, rng, reps, n):
        return (rng.random((reps, n)) < self.p["p"]).astype(float)

    def _truths(self):
        p = self.p["p"]
        return {"p": p, "mean": p, "var": p * (1 - p)}

    def crb(self, estimand, n):
        # Fisher information of one Bernoulli trial is 1 / (p (1 - p)) (common practice).
        p = self.p["p"]
        return p * (1 - p) / n if estimand in ("p", "mean") else math.nan


class Counts(Mechanism):
    """Poisson(rate) counts, shape (reps, n). Estimands: ``rate`` (= ``mean``), ``var``."""

    PARAMS = {"rate": _positive()}
    ESTIMANDS = ("rate", "mean", "var")

    def draw(self, rng, reps, n):
        return rng.poisson(self.p["rate"], size=(reps, n)).astype(float)

    def _truths(self):
        lam = self.p["rate"]
        return {"rate": lam, "mean": lam, "var": lam}

    def crb(self, estimand, n):
        # Fisher information of one Poisson count is 1 / rate (common practice).
        return self.p["rate"] / n if estimand in ("rate", "mean") else math.nan


MECHANISMS: Mapping[str, type[Mechanism]] = {
    "two_arm": TwoArm, "regression": Regression, "proportion": Proportion, "counts": Counts}


# ------------------------------------------------------------ the DGM kind --

#: The spec key that selects this kind.
KEY = "mechanism"


def build(spec: Mapping, search_dirs=(), seed: int = 0) -> Mechanism:
    return MECHANISMS[spec["mechanism"]](dict(spec.get("params", {})))


def describe(spec: Mapping) -> str:
    return f"{spec['mechanism']}({params_text(spec.get('params'))})"


def problems(where: str, spec: Mapping, search_dirs) -> list[str]:
    """Every swept combination of parameters meets the mechanism's rules."""
    cls = MECHANISMS[spec["mechanism"]]
    return [f"{where}.params{label}`: {p}"
            for label, values in variants(spec.get("params", {})) for p in check_params(cls, values)]
