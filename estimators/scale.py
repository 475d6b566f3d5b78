"""Scale estimators, vectorised over replicates (axis 0 = replicates, axis 1 = observations).

| function | estimate | interval | p-value |
|---|---|---|---|
| ``variance`` | SS / (n-1), SS / n or SS / (n+1) | chi-square (normal theory) for sigma^2 | chi-square test of sigma^2 = ``null_value``, if given |
| ``sd`` | sqrt of ``variance`` | square root of the variance interval | the same test for sigma = ``null_value`` |
| ``mad`` | median absolute deviation / Phi^-1(3/4) | — | — |
| ``iqr_sd`` | interquartile range / (2 Phi^-1(3/4)) | — | — |

A scale of 0 is not a testable null_value, so these take ``null_value=None`` (no p-value)
rather than the library's usual 0. MAD and IQR have no SE here: the standard
ones need a density estimate at quantiles.
"""

from __future__ import annotations

import numpy as np
from scipy import special, stats

from _inference import check_level, replicates, sum_of_squares

_DIVISORS = {"n-1": -1, "n": 0, "n+1": 1}
#: Phi^-1(3/4): the MAD, and half the IQR, of a standard normal distribution.
_NORMAL_QUARTILE = stats.norm.ppf(0.75)


def variance(x, divisor="n-1", level=0.95, null_value=None):
    """Sum of squared deviations from the sample mean, divided by n-1, n or n+1.

    The interval [SS / chi2_{(1+level)/2}, SS / chi2_{(1-level)/2}] on n-1
    degrees of freedom is exact for normal data whatever the divisor; with a
    positive ``null_value`` the p-value is the two-sided (doubled tail) chi-square
    test of sigma^2 = ``null_value``.

    Parameters
    ----------
    x : array (reps, n)
    divisor : ``"n-1"``, ``"n"`` or ``"n+1"``.
    level : confidence level of the interval.
    null_value : variance under the null hypothesis, or None for no p-value.

    Returns
    -------
    dict of estimate, ci_low, ci_high and, with a ``null_value``, p_value.

    Notes
    -----
    One pass for SS (``np.var``'s steps). The chi-square quantiles and tails
    come straight from scipy.special, as scipy.stats.chi2 computes them
    (ppf = 2 gammaincinv(df/2, p), cdf = chdtr, sf = chdtrc), without building
    a distribution object each call.
    """
    if divisor not in _DIVISORS:
        raise ValueError(f"divisor must be one of {', '.join(_DIVISORS)}, got {divisor!r}")
    check_level(level)
    if null_value is not None and not null_value > 0:
        raise ValueError(f"`null_value` must be a positive variance or None, got {null_value!r}.")
    x = replicates(x)
    n = x.shape[1]
    ss = sum_of_squares(x, x.mean(axis=1))
    df = n - 1
    with np.errstate(invalid="ignore", divide="ignore"):
        upper, lower = 2 * special.gammaincinv(df / 2, [0.5 + level / 2, 0.5 - level / 2])
        out = {"estimate": ss / (n + _DIVISORS[divisor]), "ci_low": ss / upper, "ci_high": ss / lower}
        if null_value is not None:
            statistic = ss / null_value
            out["p_value"] = np.minimum(1, 2 * np.minimum(special.chdtr(df, statistic),
                                                          special.chdtrc(df, statistic)))
    return out


def sd(x, divisor="n-1", level=0.95, null_value=None):
    """Square root of ``variance(x, divisor)``, its interval and its test (of sigma = ``null_value``)."""
    if null_value is not None and not null_value > 0:
        raise ValueError(f"`null_value` must be a positive standard deviation or None, got {null_value!r}.")
    out = variance(x, divisor, level, None if null_value is None else null_value ** 2)
    return {name: (value if name == "p_value" else np.sqrt(value)) for name, value in out.items()}


def mad(x):
    """Median absolute deviation from the median, divided by Phi^-1(3/4) to estimate sigma at the normal."""
    x = replicates(x)
    return np.median(np.abs(x - np.median(x, axis=1, keepdims=True)), axis=1) / _NORMAL_QUARTILE


def iqr_sd(x):
    """Interquartile range (numpy's linear quantiles) divided by 2 Phi^-1(3/4) to estimate sigma at the normal."""
    x = replicates(x)
    q1, q3 = np.quantile(x, [0.25, 0.75], axis=1)
    return (q3 - q1) / (2 * _NORMAL_QUARTILE)
