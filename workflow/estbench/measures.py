"""Performance measures with Monte Carlo standard errors (MCSE).

Definitions and MCSE formulas: Morris, White & Crowther (2019), "Using
simulation studies to evaluate statistical methods", Statistics in Medicine
38:2074-2102, Table 6. Let e_i = estimate_i - truth over the n_ok replicates
with status 'ok':

==========  =====================================  ==========================================
measure     value                                  MCSE
==========  =====================================  ==========================================
bias        mean(e)                                sqrt(var(e) / n)
empse       sd(e)                                  empse / sqrt(2 (n - 1))
mse         mean(e^2)                              sqrt(var(e^2) / n)
rmse        sqrt(mse)                              mcse(mse) / (2 rmse)   (delta method)
coverage    share of intervals holding the truth   sqrt(C (1 - C) / n_ci)
==========  =====================================  ==========================================

var() is the sample variance (divisor n - 1). The sums run in DuckDB (one
grouped pass, scales to 10^8 rows); numpy turns them into measures.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Mapping

import duckdb
import numpy as np
import pyarrow as pa


@dataclass(frozen=True)
class Measure:
    """One performance measure: what it needs and how to get value and MCSE."""

    name: str
    label: str
    needs: tuple                   #: estimator outputs it needs besides the estimate
    formula: str                   #: value and MCSE, for the README and report
    compute: Callable              #: aggregates (dict of arrays) -> (value, mcse, n_used)


def _sqrt(x):
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(x)


def _div(a, b):
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(b > 0, a / np.where(b > 0, b, 1), np.nan)


def _bias(a):
    return a["mean_err"], _sqrt(_div(a["var_err"], a["n_ok"])), a["n_ok"]


def _empse(a):
    empse = _sqrt(a["var_err"])
    return empse, _div(empse, _sqrt(2 * (a["n_ok"] - 1.0))), a["n_ok"]


def _mse(a):
    return a["mse"], _sqrt(_div(a["var_sqerr"], a["n_ok"])), a["n_ok"]


def _rmse(a):
    mse, mcse_mse, n = _mse(a)
    rmse = _sqrt(mse)
    return rmse, _div(mcse_mse, 2 * rmse), n


def _coverage(a):
    c, n = a["coverage"], a["n_ci"]
    return c, _sqrt(_div(c * (1 - c), n)), n


MEASURES: tuple[Measure, ...] = (
    Measure("bias", "Bias", (), "mean(θ̂ − θ); MCSE √(var(θ̂)/n)", _bias),
    Measure("empse", "Empirical SE", (), "sd(θ̂); MCSE EmpSE/√(2(n−1))", _empse),
    Measure("mse", "MSE", (), "mean((θ̂ − θ)²); MCSE √(var((θ̂ − θ)²)/n)", _mse),
    Measure("rmse", "RMSE", (), "√MSE; MCSE MCSE(MSE)/(2·RMSE), delta method", _rmse),
    Measure("coverage", "Coverage", ("ci_low", "ci_high"),
            "share of intervals containing θ; MCSE √(C(1−C)/n)", _coverage),
)
MEASURE_NAMES = tuple(m.name for m in MEASURES)

_AGGREGATES_SQL = """
SELECT x.scenario, x.estimator,
       count(*) FILTER (WHERE x.status = 'ok')                      AS n_ok,
       count(*) FILTER (WHERE x.status <> 'ok')                     AS n_failed,
       avg(x.estimate - t.truth) FILTER (WHERE x.status = 'ok')     AS mean_err,
       var_samp(x.estimate - t.truth) FILTER (WHERE x.status = 'ok') AS var_err,
       avg((x.estimate - t.truth) ^ 2) FILTER (WHERE x.status = 'ok') AS mse,
       var_samp((x.estimate - t.truth) ^ 2) FILTER (WHERE x.status = 'ok') AS var_sqerr,
       count(*) FILTER (WHERE x.status = 'ok' AND x.ci_low IS NOT NULL
                        AND x.ci_high IS NOT NULL)                  AS n_ci,
       avg(CASE WHEN x.ci_low <= t.truth AND t.truth <= x.ci_high THEN 1.0 ELSE 0.0 END)
           FILTER (WHERE x.status = 'ok' AND x.ci_low IS NOT NULL
                   AND x.ci_high IS NOT NULL)                       AS coverage
FROM {estimates} AS x
JOIN {truth} AS t ON x.scenario = t.scenario AND x.estimator = t.estimator
GROUP BY x.scenario, x.estimator
ORDER BY x.scenario, x.estimator
"""

PERFORMANCE_SCHEMA = pa.schema([
    ("scenario", pa.string()), ("estimator", pa.string()), ("measure", pa.string()),
    ("value", pa.float64()), ("mcse", pa.float64()),
    ("n_ok", pa.int64()), ("n_failed", pa.int64()),
])


def _needs_met(measure: Measure, agg: Mapping[str, np.ndarray]) -> np.ndarray:
    if "ci_low" in measure.needs:
        return agg["n_ci"] > 0
    return agg["n_ok"] > 0


def compute_performance(con: duckdb.DuckDBPyConnection, estimates: str = "estimates",
                        truth: str = "truth") -> pa.Table:
    """Every applicable measure for every scenario x estimator, long form.

    Parameters
    ----------
    con : duckdb connection holding the two relations below.
    estimates : name of a table/view with the shard columns
        (scenario, estimator, estimate, ci_low, ci_high, status, ...).
    truth : name of a table/view with columns (scenario, estimator, truth).

    Returns
    -------
    pyarrow.Table with columns scenario, estimator, measure, value, mcse,
    n_ok, n_failed. A measure whose inputs the estimator does not provide is
    absent (no row), never zero.
    """
    agg_table = con.execute(_AGGREGATES_SQL.format(estimates=estimates, truth=truth)).to_arrow_table()
    agg = {name: agg_table[name].to_numpy(zero_copy_only=False) for name in agg_table.column_names}
    for name in agg:
        if name not in ("scenario", "estimator"):
            agg[name] = np.array([np.nan if v is None else v for v in agg[name]], dtype=float) \
                if agg[name].dtype == object else agg[name].astype(float)
    rows = {name: [] for name in PERFORMANCE_SCHEMA.names}
    for measure in MEASURES:
        value, mcse, _ = measure.compute(agg)
        keep = _needs_met(measure, agg)
        for i in np.flatnonzero(keep):
            rows["scenario"].append(agg["scenario"][i])
            rows["estimator"].append(agg["estimator"][i])
            rows["measure"].append(measure.name)
            rows["value"].append(float(value[i]))
            rows["mcse"].append(float(mcse[i]))
            rows["n_ok"].append(int(agg["n_ok"][i]))
            rows["n_failed"].append(int(agg["n_failed"][i]))
    table = pa.table(rows, schema=PERFORMANCE_SCHEMA)
    return table.sort_by([("scenario", "ascending"), ("estimator", "ascending")])


def performance_table(estimates: pa.Table, truth: Mapping[tuple[str, str], float] | pa.Table) -> pa.Table:
    """Measures from in-memory estimates, without Snakemake or a store.

    Parameters
    ----------
    estimates : Arrow table with at least scenario, estimator, estimate,
        status (and ci_low, ci_high for coverage).
    truth : Arrow table (scenario, estimator, truth), or a mapping
        ``{(scenario, estimator): truth}``.
    """
    if not isinstance(truth, pa.Table):
        keys = list(truth)
        truth = pa.table({"scenario": [k[0] for k in keys], "estimator": [k[1] for k in keys],
                          "truth": [float(truth[k]) for k in keys]})
    for col in ("ci_low", "ci_high"):
        if col not in estimates.column_names:
            estimates = estimates.append_column(col, pa.nulls(estimates.num_rows, pa.float64()))
    con = duckdb.connect()
    try:
        con.register("estimates_in", estimates)
        con.register("truth_in", truth)
        return compute_performance(con, "estimates_in", "truth_in")
    finally:
        con.close()
