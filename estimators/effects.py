"""Two-arm comparisons: the treatment effect, difference in means treatment - control.

Data: {"y": (reps, n), "arm": (reps, n) of 0/1 with 1 = treatment, and for
``ancova`` "covariate": (reps, n) measured at baseline}. Arm sizes may vary
between replicates. Each function gives estimate, se, a t interval and the
two-sided t-test p-value of effect = ``null_value``; a replicate with too few
patients for its variance estimate gives NaN (Welch needs two per arm,
pooled two in all with one per arm).

| function | estimate | se | df |
|---|---|---|---|
| ``welch`` | difference in means | sqrt(s1^2/n1 + s0^2/n0) | Welch-Satterthwaite |
| ``pooled`` | difference in means | s_p sqrt(1/n1 + 1/n0) | n - 2 |
| ``ancova`` | arm coefficient of OLS on arm and covariate | model or HC sandwich | n - 3 |
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from _inference import check_binary, ols_fields, structured, wald_fields


def welch(data, level=0.95, null_value=0.0):
    """Difference in means with Welch's unequal-variance SE and Welch-Satterthwaite df."""
    diff, (n1, ss1), (n0, ss0) = _arms(data)
    with np.errstate(invalid="ignore", divide="ignore"):
        a1, a0 = ss1 / (n1 - 1) / n1, ss0 / (n0 - 1) / n0
        df = (a1 + a0) ** 2 / (a1 ** 2 / (n1 - 1) + a0 ** 2 / (n0 - 1))
    return wald_fields(diff, np.sqrt(a1 + a0), level, null_value, stats.t, df)


def pooled(data, level=0.95, null_value=0.0):
    """Difference in means with the pooled-variance (Student) SE and n - 2 df."""
    diff, (n1, ss1), (n0, ss0) = _arms(data)
    with np.errstate(invalid="ignore", divide="ignore"):
        df = n1 + n0 - 2
        se = np.sqrt((ss1 + ss0) / df * (1 / n1 + 1 / n0))
    return wald_fields(diff, se, level, null_value, stats.t, df)


def ancova(data, se="model", level=0.95, null_value=0.0):
    """Covariate-adjusted effect: the arm coefficient of OLS of y on (1, arm, covariate).

    ``se`` is ``"model"`` or ``"hc0"``..``"hc3"`` as in ``regression.ols_slope``;
    the interval and test use t(n - 3).
    """
    arrays = structured(data, ("y", "arm", "covariate"))
    check_binary(arrays["arm"], "arm")
    design = np.stack([arrays["arm"], arrays["covariate"]], axis=-1)
    return ols_fields(design, arrays["y"], se, level, null_value)


def _arms(data):
    """Difference in means, and (size, sum of squared deviations) of the treatment and control arms."""
    arrays = structured(data, ("y", "arm"))
    y, treated = arrays["y"], arrays["arm"]
    check_binary(treated, "arm")
    groups = []
    for member in (treated, 1 - treated):
        size = member.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            centre = (member * y).sum(axis=1) / size
        groups.append((centre, size, (member * (y - centre[:, None]) ** 2).sum(axis=1)))
    (m1, n1, ss1), (m0, n0, ss0) = groups
    return m1 - m0, (n1, ss1), (n0, ss0)
