"""Scale estimators, vectorised over replicates (axis 0 = replicates, axis 1 = observations)."""

from __future__ import annotations

import numpy as np

_DIVISORS = {"n-1": -1, "n": 0, "n+1": 1}


def variance(x, divisor="n-1"):
    """Sum of squared deviations from the sample mean, divided by n-1, n or n+1."""
    if divisor not in _DIVISORS:
        raise ValueError(f"divisor must be one of {', '.join(_DIVISORS)}, got {divisor!r}")
    x = np.asarray(x, dtype=float)
    ss = ((x - x.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return ss / (x.shape[1] + _DIVISORS[divisor])


def sd(x, divisor="n-1"):
    """Square root of ``variance(x, divisor)``."""
    return np.sqrt(variance(x, divisor))
