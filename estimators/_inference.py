"""Pieces shared by the built-in estimator modules; not an estimator module itself.

Input checks that name the bad argument, row sums of squared deviations,
Wald-type intervals and p-values from an estimate, its SE and a reference
distribution, and ordinary least squares on a whole seed block at once (one
small linear system per replicate).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from scipy import special, stats

#: Weights of e_i**2 in the heteroskedasticity-consistent (HC) sandwich, by name.
SE_TYPES = ("model", "hc0", "hc1", "hc2", "hc3")
#: Quantile and upper tail, as functions of (value, *shape), of the reference
#: distributions the built-ins use: the scipy.special functions that scipy.stats
#: itself calls inside ``ppf`` and ``sf`` (so the same numbers, bit for bit),
#: without its per-call argument handling (about 0.1 ms a call, more than the
#: arithmetic of a small block). Any other distribution goes through its own
#: ``ppf`` and ``sf``.
_DIRECT = {
    stats.t: (lambda q, df: special.stdtrit(df, q), lambda z, df: special.stdtr(df, -z)),
    stats.norm: (special.ndtri, lambda z: special.ndtr(-z)),
}


def replicates(x, name="x"):
    """``x`` as a float array (reps, n), or a ValueError naming the rule."""
    arr = np.asarray(x, dtype=float)
    if arr.ndim != 2:
        raise ValueError(f"`{name}` must be a 2-D array (replicates, observations), "
                         f"got shape {arr.shape}.")
    return arr


def structured(data, required, optional=()):
    """The arrays of a structured dataset (a mapping of equal-shape (reps, n) arrays)."""
    if not isinstance(data, Mapping):
        raise ValueError(f"data must be a mapping with keys {list(required)}, "
                         f"got {type(data).__name__}.")
    missing = [key for key in required if key not in data]
    if missing:
        raise ValueError(f"data has no {missing}; it has {sorted(data)}.")
    out = {key: replicates(data[key], key) for key in (*required, *optional) if key in data}
    shape = out[required[0]].shape
    for key, arr in out.items():
        if arr.shape != shape:
            raise ValueError(f"data[{key!r}] has shape {arr.shape}; expected {shape} "
                             f"like data[{required[0]!r}].")
    return out


def check_level(level):
    """Raise unless 0 < level < 1."""
    if not 0 < level < 1:
        raise ValueError(f"`level` must be strictly between 0 and 1, got {level!r}.")


def check_binary(arr, name):
    """Raise unless every entry of ``arr`` is 0 or 1."""
    if not np.all((arr == 0) | (arr == 1)):
        bad = arr[(arr != 0) & (arr != 1)].flat[0]
        raise ValueError(f"`{name}` must hold only 0 and 1, found {bad!r}.")


def sum_of_squares(x, centre, overwrite=False):
    """Row sums of squared deviations, sum_j (x_ij - centre_i)^2.

    One subtraction into a work array, squared in place and summed: the steps
    (and so the rounding) of ``np.var``, whose mean is ``x.mean(axis=1)``.

    Parameters
    ----------
    x : array (reps, n)
    centre : array (reps,)
    overwrite : bool
        Work in ``x`` itself (which then holds the squared deviations) instead
        of a new array.
    """
    work = np.subtract(x, centre[:, None], out=x if overwrite else None)
    np.multiply(work, work, out=work)
    return work.sum(axis=1)


def wald_fields(estimate, se, level, null_value, dist, *shape):
    """estimate ± q·se and the two-sided p-value of (estimate − null_value)/se.

    Parameters
    ----------
    estimate, se : arrays (reps,)
    level : confidence level; ``q`` is the ``(1 + level)/2`` quantile of ``dist``.
    null_value : value of the parameter under the null hypothesis.
    dist : scipy.stats distribution of the standardised estimate, e.g.
        ``scipy.stats.t`` with ``shape`` = (df,) (df may be an array, one per
        replicate) or ``scipy.stats.norm``; a frozen distribution such as
        ``scipy.stats.t(df)`` works too, with no ``shape``. The quantile is
        computed once per call; for ``t`` and ``norm`` quantile and tail come
        straight from scipy.special (see ``_DIRECT``).
    *shape : the shape arguments of ``dist``.

    Returns
    -------
    dict of estimate, se, ci_low, ci_high, p_value.
    """
    check_level(level)
    quantile, upper_tail = _DIRECT.get(dist, (dist.ppf, dist.sf))
    with np.errstate(invalid="ignore", divide="ignore"):
        q = quantile(0.5 + level / 2, *shape)
        z = (estimate - null_value) / se
        p = 2 * upper_tail(np.abs(z), *shape)
    return {"estimate": estimate, "se": se, "ci_low": estimate - q * se,
            "ci_high": estimate + q * se, "p_value": p}


def ols_fields(z, y, se="model", level=0.95, null_value=0.0):
    """OLS of ``y`` on an intercept and the columns of ``z``; inference on the first column.

    Parameters
    ----------
    z : array (reps, n, k) of regressors (no intercept column; one is always fitted).
    y : array (reps, n) of responses.
    se : ``"model"`` (s^2 (X'X)^-1) or ``"hc0"``..``"hc3"``, the sandwich
        (X'X)^-1 X' diag(w_i e_i^2) X (X'X)^-1 with w_i = 1, n/(n-p), 1/(1-h_i),
        1/(1-h_i)^2 (MacKinnon & White 1985; p = k + 1 coefficients, h_i the
        leverage).
    level, null_value : interval level and the value of the coefficient under H0.

    Returns
    -------
    dict of estimate, se, ci_low, ci_high, p_value; the interval and test use
    t(n - p). Replicates whose centred regressors are rank deficient give NaN.

    Notes
    -----
    Regressors and response are centred first (Frisch-Waugh), so each replicate
    solves a k x k system ``np.linalg.solve`` handles for the whole stack.
    """
    if se not in SE_TYPES:
        raise ValueError(f"`se` must be one of {', '.join(SE_TYPES)}, got {se!r}.")
    reps, n, k = z.shape
    zc = z - z.mean(axis=1, keepdims=True)
    yc = y - y.mean(axis=1, keepdims=True)
    ztz = np.einsum("rik,ril->rkl", zc, zc)
    singular = np.linalg.matrix_rank(zc) < k
    ztz[singular] = np.eye(k)                      # solvable stand-in; reported as NaN below
    inverse = np.linalg.solve(ztz, np.broadcast_to(np.eye(k), ztz.shape))
    beta = np.einsum("rkl,ril,ri->rk", inverse, zc, yc)
    resid = yc - np.einsum("rik,rk->ri", zc, beta)
    df = n - k - 1
    with np.errstate(invalid="ignore", divide="ignore"):
        if se == "model":
            var = (resid ** 2).sum(axis=1) / df * inverse[:, 0, 0]
        else:
            weights = zc @ inverse[:, :, :1]         # row 0 of (Z'Z)^-1 Z', as (reps, n, 1)
            leverage = 1 / n + np.einsum("rik,rkl,ril->ri", zc, inverse, zc)
            scale = {"hc0": 1.0, "hc1": n / df, "hc2": 1 / (1 - leverage),
                     "hc3": 1 / (1 - leverage) ** 2}[se]
            var = (weights[..., 0] ** 2 * resid ** 2 * scale).sum(axis=1)
        out = wald_fields(beta[:, 0], np.sqrt(var), level, null_value, stats.t, df)
    for value in out.values():
        value[singular] = np.nan
    return out

