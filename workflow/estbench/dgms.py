"""Data-generating mechanisms: draw a whole seed block at once, and know the truth.

A DGM is built from one scenario's resolved spec (no swept lists left). It
draws ``(reps, n)`` data from a ``numpy.random.Generator`` in one vectorised
call and returns the true value of each estimand it knows.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np
from scipy import optimize, stats

#: Estimands every distribution-based DGM can supply (when finite).
DISTRIBUTION_ESTIMANDS = ("mean", "median", "sd", "var")


def scipy_distribution(name: str):
    """Return the ``scipy.stats`` distribution called *name*.

    Raises ``ValueError`` with close matches when there is none.
    """
    dist = getattr(stats, name, None)
    if isinstance(dist, (stats.rv_continuous, stats.rv_discrete)):
        return dist
    known = [k for k, v in vars(stats).items()
             if isinstance(v, (stats.rv_continuous, stats.rv_discrete))]
    close = difflib.get_close_matches(name, known, n=3)
    hint = f" (did you mean {', '.join(close)}?)" if close else ""
    raise ValueError(f"scipy.stats has no distribution {name!r}{hint}")


def freeze(name: str, params: Mapping[str, float]):
    """Freeze distribution *name* at *params*; ``ValueError`` if scipy rejects them."""
    dist = scipy_distribution(name)
    try:
        frozen = dist(**params)
    except TypeError as exc:
        shapes = dist.shapes or "no shape parameters"
        raise ValueError(f"scipy.stats.{name} takes loc, scale and {shapes}: {exc}") from None
    if not bool(np.all(frozen.dist._argcheck(*frozen.args))) or frozen.kwds.get("scale", 1) <= 0:
        raise ValueError(f"scipy.stats.{name} rejects the parameters {dict(params)}")
    return frozen


@dataclass(frozen=True)
class DistributionDGM:
    """IID draws from one ``scipy.stats`` distribution."""

    distribution: str
    params: Mapping[str, float]

    def __post_init__(self):
        object.__setattr__(self, "_frozen", freeze(self.distribution, self.params))

    def draw(self, rng: np.random.Generator, reps: int, n: int) -> np.ndarray:
        """Draw a ``(reps, n)`` array in one call."""
        return np.asarray(self._frozen.rvs(size=(reps, n), random_state=rng), dtype=float)

    def truth(self, estimand: str) -> float:
        """True value of *estimand*; NaN when the distribution has none."""
        f = self._frozen
        value = {"mean": f.mean, "median": f.median, "sd": f.std, "var": f.var}.get(estimand)
        return float(value()) if value is not None else math.nan


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

    def _cdf(self, x: float) -> float:
        return float(sum(wk * c.cdf(x) for wk, c in zip(self._weights, self._frozen)))

    def _median(self) -> float:
        lo = min(float(c.ppf(0.5)) for c in self._frozen)
        hi = max(float(c.ppf(0.5)) for c in self._frozen)
        if lo == hi:
            return lo
        return float(optimize.brentq(lambda x: self._cdf(x) - 0.5, lo, hi, xtol=1e-14, rtol=4e-16))


def build_dgm(spec: Mapping) -> DistributionDGM | MixtureDGM:
    """Build the DGM of one scenario from its resolved (sweep-free) spec."""
    if "mixture" in spec:
        return MixtureDGM(tuple((c["weight"], c["distribution"], dict(c.get("params", {})))
                                for c in spec["mixture"]))
    return DistributionDGM(spec["distribution"], dict(spec.get("params", {})))
