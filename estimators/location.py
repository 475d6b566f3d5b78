"""Location estimators, vectorised over replicates (axis 0 = replicates, axis 1 = observations)."""

from __future__ import annotations

import numpy as np
from scipy import stats


def mean(x, level=0.95, null=0.0):
    """Sample mean with its standard error, t interval and two-sided t-test p-value.

    Parameters
    ----------
    x : array (reps, n)
    level : confidence level of the interval.
    null : value of the mean under the null hypothesis of the t-test.
    """
    x = np.asarray(x, dtype=float)
    n = x.shape[1]
    est = x.mean(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        se = x.std(axis=1, ddof=1) / np.sqrt(n)
        q = stats.t.ppf(0.5 + level / 2, df=n - 1) if n > 1 else np.nan
        t = (est - null) / se
    return {"estimate": est, "se": se, "ci_low": est - q * se, "ci_high": est + q * se,
            "p_value": 2 * stats.t.sf(np.abs(t), df=max(n - 1, 1)) if n > 1 else np.full(len(est), np.nan)}


def median(x):
    """Sample median."""
    return np.median(np.asarray(x, dtype=float), axis=1)


def trimmed_mean(x, proportion=0.1):
    """Mean after cutting ``proportion`` of the observations from each end."""
    if not 0 <= proportion < 0.5:
        raise ValueError(f"proportion must be in [0, 0.5), got {proportion}")
    return stats.trim_mean(np.asarray(x, dtype=float), proportion, axis=1)
