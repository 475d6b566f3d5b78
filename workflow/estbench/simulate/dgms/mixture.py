"""DGM kind ``mixture``: IID draws from a finite mixture of ``scipy.stats`` distributions.

Spec: ``mixture: [{weight, distribution, params}, ...]``, weights summing to 1.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np

from estbench.simulate.dgms.common import params_text
from estbench.simulate.dgms.distribution import DISTRIBUTION_ESTIMANDS, freeze

#: The spec key that selects this kind.
KEY = "mixture"


@dataclass(frozen=True)
class MixtureDGM:
    """IID draws from a finite mixture of ``scipy.stats`` distributions.

    Mean and variance are exact (law of total variance); the median is the root
    of the mixture CDF minus 1/2, found by Brent's method.
    """

    components: tuple  # of (weight, distribution name, params)

    def __post_init__(self):
        frozen = tuple(freeze(d, p) for _, d, p in self.components)
        weights = np.array([w for w, _, _ in self.components], dtype=float)
        if not math.isclose(weights.sum(), 1.0, rel_tol=0, abs_tol=1e-9):
            raise ValueError(f"mixture weights must sum to 1, got {weights.sum():g}")
        object.__setattr__(self, "_frozen", frozen)
        object.__setattr__(self, "_weights", weights)

    def draw(self, rng: np.random.Generator, reps: int, n: int) -> np.ndarray:
        """Draw component labels, then each component's values, in a fixed order."""
        labels = np.searchsorted(np.cumsum(self._weights), rng.random((reps, n)), side="right")
        labels = np.minimum(labels, len(self._frozen) - 1)
        out = np.empty((reps, n), dtype=float)
        for k, comp in enumerate(self._frozen):
            mask = labels == k
            out[mask] = comp.rvs(size=int(mask.sum()), random_state=rng)
        return out

    def truth(self, estimand: str) -> float:
        """True value of *estimand*; NaN when a component lacks a finite moment."""
        w = self._weights
        means = np.array([c.mean() for c in self._frozen])
        if estimand == "median":
            return self._median()
        mean = float(w @ means)
        if estimand == "mean":
            return mean
        second = float(w @ (np.array([c.var() for c in self._frozen]) + means**2))
        var = second - mean**2
        return {"var": var, "sd": math.sqrt(var) if var >= 0 else math.nan}.get(estimand, math.nan)

    def estimands(self) -> tuple:
        return DISTRIBUTION_ESTIMANDS

    def truth_mcse(self, estimand: str) -> float:
        return 0.0

    def crb(self, estimand: str, n: int) -> float:
        return math.nan

    def _cdf(self, x: float) -> float:
        return float(sum(wk * c.cdf(x) for wk, c in zip(self._weights, self._frozen)))

    def _median(self) -> float:
        lo = min(float(c.ppf(0.5)) for c in self._frozen)
        hi = max(float(c.ppf(0.5)) for c in self._frozen)
        if lo == hi:
            return lo
        from scipy import optimize  # only mixtures need it; keeps shard start-up lean
        return float(optimize.brentq(lambda x: self._cdf(x) - 0.5, lo, hi, xtol=1e-14, rtol=1e-15))


def build(spec: Mapping, search_dirs=(), seed: int = 0) -> MixtureDGM:
    return MixtureDGM(tuple((c["weight"], c["distribution"], dict(c.get("params", {})))
                            for c in spec["mixture"]))


def describe(spec: Mapping) -> str:
    return " + ".join(f"{c['weight']:g} × {c['distribution']}({params_text(c.get('params'))})"
                      for c in spec["mixture"])


def problems(where: str, spec: Mapping, search_dirs) -> list[str]:
    """Every component exists with its parameters, and the weights sum to 1."""
    found = []
    for i, c in enumerate(spec["mixture"]):
        try:
            freeze(c["distribution"], c.get("params", {}))
        except ValueError as exc:
            found.append(f"{where}.mixture[{i}]`: {exc}")
    total = sum(c["weight"] for c in spec["mixture"])
    if not math.isclose(total, 1.0, abs_tol=1e-9):
        found.append(f"{where}.mixture`: weights must sum to 1, got {total:g}")
    return found
