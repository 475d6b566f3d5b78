"""Binomial proportion: the sample proportion with five classic intervals.

Data: array (reps, n) of 0/1 outcomes; x = number of ones. Every function
returns the sample proportion x/n as ``estimate``, se = sqrt(p(1-p)/n), its
interval and the two-sided p-value of the test that interval inverts, for
H0: p = ``null_value``. ``null_value`` defaults to 0.5 (as in ``scipy.stats.binomtest``):
p = 0 is not a testable null. Formulas: Brown, Cai & DasGupta (2001),
Statistical Science 16:101-133 (BCD below).

| function | interval | p-value |
|---|---|---|
| ``wald`` | p ± z se | Wald z-test |
| ``wilson`` | score interval | score z-test |
| ``agresti_coull`` | p~ ± z sqrt(p~(1-p~)/n~), n~ = n + z^2, p~ = (x + z^2/2)/n~ | the same z on p~ |
| ``clopper_pearson`` | beta quantiles ("exact") | exact binomial, central (doubled smaller tail) |
| ``jeffreys`` | Beta(x+1/2, n-x+1/2) quantiles, BCD's ends at x = 0, n | doubled smaller posterior tail |

The Wald interval is not clipped to [0, 1] (BCD's definition). The exact
p-value doubles the smaller tail: that is the test Clopper-Pearson inverts;
``scipy.stats.binomtest``'s two-sided p-value orders outcomes by likelihood
instead and can be smaller.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from _inference import check_binary, check_level, replicates, wald_fields


def wald(data, level=0.95, null_value=0.5):
    """Wald interval p ± z sqrt(p(1-p)/n) and z-test with the estimated SE."""
    x, n, null_value = _counts(data, level, null_value)
    p = x / n
    return wald_fields(p, _se(p, n), level, null_value, stats.norm)


def wilson(data, level=0.95, null_value=0.5):
    """Wilson score interval and the score test z = (p - null_value)/sqrt(null_value(1-null_value)/n) it inverts."""
    x, n, null_value = _counts(data, level, null_value)
    p, z = x / n, _z(level)
    centre = (x + z ** 2 / 2) / (n + z ** 2)
    half = z * np.sqrt(n) / (n + z ** 2) * np.sqrt(p * (1 - p) + z ** 2 / (4 * n))
    score = (p - null_value) / np.sqrt(null_value * (1 - null_value) / n)
    return {"estimate": p, "se": _se(p, n), "ci_low": centre - half, "ci_high": centre + half,
            "p_value": 2 * stats.norm.sf(np.abs(score))}


def agresti_coull(data, level=0.95, null_value=0.5):
    """Agresti-Coull interval (BCD's form with z^2 added trials) and the z-test on p~ it inverts."""
    x, n, null_value = _counts(data, level, null_value)
    z = _z(level)
    n_tilde = n + z ** 2
    p_tilde = (x + z ** 2 / 2) / n_tilde
    out = wald_fields(p_tilde, _se(p_tilde, n_tilde), level, null_value, stats.norm)
    return {**out, "estimate": x / n, "se": _se(x / n, n)}


def clopper_pearson(data, level=0.95, null_value=0.5):
    """Clopper-Pearson interval from beta quantiles and the central exact binomial test."""
    x, n, null_value = _counts(data, level, null_value)
    tail = (1 - level) / 2
    with np.errstate(invalid="ignore"):
        low = np.where(x > 0, stats.beta.ppf(tail, x, n - x + 1), 0.0)
        high = np.where(x < n, stats.beta.ppf(1 - tail, x + 1, n - x), 1.0)
    below, above = stats.binom.cdf(x, n, null_value), stats.binom.sf(x - 1, n, null_value)
    return _result(x, n, low, high, below, above)


def jeffreys(data, level=0.95, null_value=0.5):
    """Jeffreys interval: equal tails of the Beta(x+1/2, n-x+1/2) posterior.

    As in BCD section 4.1.3 the lower end is 0 at x = 0 and the upper end 1 at
    x = n. The p-value, 2 min(P(p <= null_value | x), P(p >= null_value | x)) capped at 1
    with the tail cut off at x = 0 or n taken as 1, is the one this interval
    inverts: a posterior tail, not a frequentist test.
    """
    x, n, null_value = _counts(data, level, null_value)
    tail = (1 - level) / 2
    posterior = stats.beta(x + 0.5, n - x + 0.5)
    low = np.where(x > 0, posterior.ppf(tail), 0.0)
    high = np.where(x < n, posterior.ppf(1 - tail), 1.0)
    below_low = np.where(x > 0, posterior.cdf(null_value), 1.0)   # < tail iff null_value < ci_low
    above_high = np.where(x < n, posterior.sf(null_value), 1.0)   # < tail iff null_value > ci_high
    return _result(x, n, low, high, below_low, above_high)


def _counts(data, level, null_value):
    """Number of ones per replicate, n, and the checked ``null_value``."""
    check_level(level)
    if not 0 < null_value < 1:
        raise ValueError(f"`null_value` must be strictly between 0 and 1, got {null_value!r}.")
    data = replicates(data, "data")
    check_binary(data, "data")
    return data.sum(axis=1), data.shape[1], null_value


def _z(level):
    return stats.norm.ppf(0.5 + level / 2)


def _se(p, n):
    return np.sqrt(p * (1 - p) / n)


def _result(x, n, low, high, tail_one, tail_other):
    """The fields, with the p-value doubling the smaller of two one-sided tails."""
    p = x / n
    return {"estimate": p, "se": _se(p, n), "ci_low": low, "ci_high": high,
            "p_value": np.minimum(1.0, 2 * np.minimum(tail_one, tail_other))}
