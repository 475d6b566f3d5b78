"""Data-generating mechanisms: draw a whole seed block at once, and know the truth.

A DGM is built from one scenario's resolved spec (no swept lists left). It
draws a block of data (leading axis = replicates) from a
``numpy.random.Generator`` in one vectorised call, and answers, for each
estimand it knows: the true value, the Monte Carlo SE of that value (0 unless
the truth itself was simulated) and, where known, the Cramér–Rao bound.

Four kinds of spec: ``distribution`` (any scipy.stats distribution),
``mixture`` (of scipy.stats distributions), ``mechanism`` (two_arm,
regression, proportion, counts; see ``mechanisms``) and ``generator``
(a user's ``module:function`` with a ``truth`` companion).
"""

from __future__ import annotations

import difflib
import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Mapping

import numpy as np
from scipy import stats

from . import plugins
from .mechanisms import MECHANISMS
from .scenarios import canonical_json

#: Estimands every distribution-based DGM can supply (when finite).
DISTRIBUTION_ESTIMANDS = ("mean", "median", "sd", "var")
#: Spawn-key slot of a simulated truth's own stream: never a seed-block index.
TRUTH_STREAM = 2**64


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


@dataclass(frozen=True)
class CustomDGM:
    """A user's generator ``module:function`` with its ``truth`` companion.

    ``generator(rng, reps, n, **params)`` returns the block's data: an array
    with leading axis ``reps``, or a dict of such arrays. ``truth(**params)``
    returns ``{estimand: value}`` or ``{estimand: (value, mcse)}``; if it
    declares ``rng`` it gets a stream of its own (seed, spawn_key=(DGM key,
    2**64)), independent of every seed block, so a simulated truth reproduces.
    """

    generator: str
    truth_function: str
    params: Mapping
    search_dirs: tuple = ()
    seed: int = 0

    def draw(self, rng: np.random.Generator, reps: int, n: int):
        fn = plugins.resolve(self.generator, self.search_dirs)
        return fn(rng, reps, n, **self.params)

    def _table(self) -> dict:
        return _custom_truth(self.truth_function, canonical_json(self.params), self.search_dirs, self.seed)

    def estimands(self) -> tuple:
        return tuple(self._table())

    def truth(self, estimand: str) -> float:
        return self._table().get(estimand, (math.nan, math.nan))[0]

    def truth_mcse(self, estimand: str) -> float:
        return self._table().get(estimand, (math.nan, math.nan))[1]

    def crb(self, estimand: str, n: int) -> float:
        return math.nan


@lru_cache(maxsize=256)
def _custom_truth(ref: str, params_json: str, search_dirs: tuple, seed: int) -> dict:
    """Call a truth function once per (function, params, seed) in this process."""
    import hashlib
    import json
    params = json.loads(params_json)
    fn = plugins.resolve(ref, search_dirs)
    kwargs = dict(params)
    if plugins.accepts(fn, "rng"):
        key = int(hashlib.sha256(canonical_json({"truth": ref, "params": params}).encode()).hexdigest()[:16], 16)
        ss = np.random.SeedSequence(entropy=seed, spawn_key=(key, TRUTH_STREAM))
        kwargs["rng"] = np.random.Generator(np.random.PCG64DXSM(ss))
    out = fn(**kwargs)
    if not isinstance(out, Mapping):
        raise TypeError(f"{ref} must return a mapping estimand -> value or (value, mcse), "
                        f"got {type(out).__name__}")
    table = {}
    for estimand, value in out.items():
        v, m = (value if isinstance(value, (tuple, list)) else (value, 0.0))
        table[str(estimand)] = (float(v), float(m))
    return table


def build_dgm(spec: Mapping, search_dirs=(), seed: int = 0):
    """Build the DGM of one scenario from its resolved (sweep-free) spec.

    *search_dirs* and *seed* matter only for user generators (module lookup and
    the stream of a simulated truth).
    """
    params = dict(spec.get("params", {}))
    if "mixture" in spec:
        return MixtureDGM(tuple((c["weight"], c["distribution"], dict(c.get("params", {})))
                                for c in spec["mixture"]))
    if "mechanism" in spec:
        return MECHANISMS[spec["mechanism"]](params)
    if "generator" in spec:
        return CustomDGM(spec["generator"], spec["truth"], params, tuple(search_dirs), int(seed))
    return DistributionDGM(spec["distribution"], params)
