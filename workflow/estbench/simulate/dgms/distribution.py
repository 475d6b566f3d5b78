"""DGM kind ``distribution``: IID draws from any ``scipy.stats`` distribution.

Spec: ``distribution: NAME`` with optional ``params`` (loc, scale and the shape
names). Truths of ``mean``, ``median``, ``sd``, ``var`` come from the frozen
distribution (NaN where infinite or undefined), plus ``rate``/``p`` for a few
families, and the Cramér–Rao bound where the Fisher information is standard.
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from typing import Mapping

import numpy as np
from scipy import stats

from estbench.simulate.dgms.common import params_text, variants

#: The spec key that selects this kind.
KEY = "distribution"
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
    if any(np.isnan(bound) for bound in frozen.support()):  # scipy's sign of invalid parameters
        raise ValueError(f"scipy.stats.{name} rejects the parameters {dict(params)}")
    return frozen


# Estimands beyond mean/median/sd/var for a few families (rate, p).
_EXTRA_ESTIMANDS = {
    "expon": {"rate": lambda f: 1 / f.std() if f.kwds.get("loc", 0) == 0 else math.nan},
    "poisson": {"rate": lambda f: f.mean()},
    "bernoulli": {"p": lambda f: f.mean()},
}

# n x Cramér–Rao bound, i.e. 1 / (Fisher information of one observation), for
# (distribution, estimand); standard results (e.g. Casella & Berger 2002, ch. 7).
_CRB = {
    ("norm", "mean"): lambda f: f.var(),
    ("norm", "var"): lambda f: 2 * f.var() ** 2,
    ("norm", "sd"): lambda f: f.var() / 2,
    ("poisson", "mean"): lambda f: f.var(),
    ("poisson", "rate"): lambda f: f.var(),
    ("bernoulli", "mean"): lambda f: f.var(),
    ("bernoulli", "p"): lambda f: f.var(),
    ("expon", "mean"): lambda f: f.var(),
    ("expon", "rate"): lambda f: 1 / f.var(),
}


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

    def estimands(self) -> tuple:
        return DISTRIBUTION_ESTIMANDS + tuple(_EXTRA_ESTIMANDS.get(self.distribution, {}))

    def truth(self, estimand: str) -> float:
        """True value of *estimand*; NaN when the distribution has none."""
        f = self._frozen
        value = {"mean": f.mean, "median": f.median, "sd": f.std, "var": f.var}.get(estimand)
        if value is not None:
            return float(value())
        extra = _EXTRA_ESTIMANDS.get(self.distribution, {}).get(estimand)
        return float(extra(f)) if extra is not None else math.nan

    def truth_mcse(self, estimand: str) -> float:
        return 0.0

    def crb(self, estimand: str, n: int) -> float:
        """Cramér–Rao bound 1/(n I) for an unbiased estimator of *estimand*; NaN if unknown."""
        rule = _CRB.get((self.distribution, estimand))
        if rule is None or (self.distribution == "expon" and self._frozen.kwds.get("loc", 0) != 0):
            return math.nan
        return float(rule(self._frozen)) / n


def build(spec: Mapping, search_dirs=(), seed: int = 0) -> DistributionDGM:
    return DistributionDGM(spec["distribution"], dict(spec.get("params", {})))


def describe(spec: Mapping) -> str:
    return f"{spec['distribution']}({params_text(spec.get('params'))})"


def problems(where: str, spec: Mapping, search_dirs) -> list[str]:
    """The distribution exists and accepts every swept combination of parameters."""
    try:
        scipy_distribution(spec["distribution"])
    except ValueError as exc:
        return [f"{where}.distribution`: {exc}"]
    found = []
    for label, values in variants(spec.get("params", {})):
        try:
            freeze(spec["distribution"], values)
        except ValueError as exc:
            found.append(f"{where}.params{label}`: {exc}")
    return found
