"""Simple linear regression y = a + b x + e: the OLS slope b.

Data: {"x": (reps, n), "y": (reps, n)}.
"""

from __future__ import annotations

from _inference import ols_fields, structured


def ols_slope(data, se="model", level=0.95, null_value=0.0):
    """OLS slope with a t(n-2) interval and two-sided t-test of b = ``null_value``.

    Parameters
    ----------
    data : {"x": (reps, n), "y": (reps, n)}
    se : ``"model"`` (homoskedastic, sqrt(s^2 / Sxx)) or a heteroskedasticity-
        consistent sandwich ``"hc0"``, ``"hc1"``, ``"hc2"``, ``"hc3"``
        (MacKinnon & White 1985; HC3 weights e_i^2 by 1/(1-h_i)^2).
    level, null_value : interval level and the slope under H0.

    A replicate whose x values are all equal gives NaN.
    """
    arrays = structured(data, ("x", "y"))
    return ols_fields(arrays["x"][..., None], arrays["y"], se, level, null_value)
