"""Performance measures with Monte Carlo standard errors (MCSE).

Definitions and MCSE formulas: Morris, White & Crowther (2019), "Using
simulation studies to evaluate statistical methods", Statistics in Medicine
38:2074-2102, Table 6. For each scenario x estimator, n is the number of
replicates the measure uses: status 'ok' and the outputs it needs present.
e = θ̂ − θ is the error against the truth θ, var() the sample variance.

Single-estimator measures (n_ok = replicates used, n_failed = replicates of
the estimator not used: failed, or missing a needed output):

========================  =======  ======================  =======================================
measure                   needs    value                   MCSE
========================  =======  ======================  =======================================
bias                      —        mean(e)                 √(var(θ̂)/n)
relative_bias             θ ≠ 0    bias/θ                  MCSE(bias)/|θ|
empirical_se              —        sd(θ̂)                   EmpSE/√(2(n−1))
model_se                  se       √mean(se²)              √(var(se²)/(4n·mean(se²)))
model_se_relative_error   se       100(ModSE/EmpSE − 1)    100(ModSE/EmpSE)·√(var(se²)/(4n·ModSE⁴)
                                                           + 1/(2(n−1)))
mse                       —        mean(e²)                √(var(e²)/n)
rmse                      —        √MSE                    seed-block jackknife
coverage                  ci       share lo ≤ θ ≤ hi       √(C(1−C)/n)
bias_eliminated_coverage  ci       share lo ≤ mean(θ̂) ≤ hi √(C(1−C)/n)
ci_width                  ci       mean(hi − lo)           sd(hi − lo)/√n
rejection_rate            p_value  share p < 1 − level     √(P(1−P)/n)
crb_efficiency            crb      CRB/var(θ̂)              eff·√(2/(n−1))
========================  =======  ======================  =======================================

model_se_relative_error uses EmpSE of the replicates that have a model SE.
crb_efficiency compares with a Cramér-Rao bound CRB = 1/(n_obs·I) supplied
per scenario x estimator (see :func:`cramer_rao_bound`); for a biased
estimator the bound is not a floor, so values above 1 can occur. Its MCSE,
like EmpSE's, assumes roughly normal estimates.

Paired measures compare an estimator j with the *reference* r on the
replicates where both are 'ok' (same (scenario, rep) = same dataset). Here
n_ok = pairs used and n_failed = replicates of either estimator that could
not be paired (either one failed or is missing, or, for coverage_diff, lacks
an interval). The reference itself gets no paired rows: a comparison with
itself carries no information, and a constant 1 or 0 would read as a result.

=====================  ========================  =======================================
measure                value                     MCSE
=====================  ========================  =======================================
relative_efficiency    var(θ̂_r)/var(θ̂_j)         2·RE·√((1 − ρ²)/(n − 1)), ρ = corr(θ̂_j, θ̂_r)
relative_mse           MSE_r/MSE_j               seed-block jackknife
bias_diff              mean(e_j − e_r)           sd(e_j − e_r)/√n
mse_diff               mean(e_j² − e_r²)         sd(e_j² − e_r²)/√n
coverage_diff          C_j − C_r (both with ci)  sd(cover_j − cover_r)/√n
=====================  ========================  =======================================

A measure whose inputs are missing is absent (no row), never zero; an
estimator with no 'ok' replicate in a scenario has no rows there. A row
whose inputs are present but too few (e.g. one replicate) has a null value
or MCSE. An MCSE below 1e-12·|value| is float rounding of a zero spread and
is reported as 0; likewise 1 − ρ² below 64 machine epsilons (≈ 1.4e-14) in
the MCSE of relative_efficiency, the rounding of a perfect correlation.

The seed-block jackknife (Koehler, Brown & Haneuse 2009, The American
Statistician 63:155-162) leaves out one seed block at a time; every
leave-one-out estimate comes from the per-block sums, so it costs no
further pass over the replicates. With K blocks it has
K − 1 degrees of freedom (see :func:`estbench.mcse.jackknife_se`).

Every sum is taken by :mod:`estbench.analyse.block_sums`: DuckDB streams the
estimates sorted by seed block and replicate, numpy sums each seed block in
replicate order and combines the blocks in block order. So every number here
is a function of the set of estimates alone: the same to the last bit
whatever the ingest order, sharding, thread count, interruptions or executor,
and a comparison of two identical estimators gives relative efficiency and
relative MSE of exactly 1 with MCSE 0, and differences of exactly 0 ± 0.
"""

from __future__ import annotations

import contextlib
import numbers
from dataclasses import dataclass
from typing import Callable, Mapping

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from estbench.analyse.block_sums import Sums, block_sums, centre_hits, safe_ratio
from estbench.analyse.mcse import (Blocks, block_heterogeneity, is_open_unit, is_positive_number, jackknife_se,
                   replicates_for_target, round_up)


@dataclass(frozen=True)
class Values:
    """What a measure computes for every group: arrays of equal length."""

    value: np.ndarray
    mcse: np.ndarray
    n_used: np.ndarray
    present: np.ndarray | None = None   #: extra condition for a row; None = n_used > 0


@dataclass(frozen=True)
class Measure:
    """One performance measure: what it needs and how to get value and MCSE."""

    name: str
    label: str
    needs: tuple                   #: inputs it needs besides the estimate and the truth
    formula: str                   #: value and MCSE, for the README and report
    compute: Callable              #: aggregates (dict of arrays) -> Values
    paired: bool = False           #: compares with the reference on paired replicates
    heading: str = ""              #: short column heading in the report's tables (default: label)

    @property
    def short(self) -> str:
        """The column heading of the measure in the report's tables."""
        return self.heading or self.label


def _sqrt(x):
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(x)


def _mean_of(mean, var, n):
    """A mean over n replicates and its MCSE √(var/n)."""
    return Values(mean, _sqrt(safe_ratio(var, n)), n)


def _share_of(share, n):
    """A share of n replicates and its binomial MCSE √(P(1 − P)/n)."""
    return Values(share, _sqrt(safe_ratio(share * (1 - share), n)), n)


def _bias(a):
    return _mean_of(a["mean_err"], a["var_err"], a["n_ok"])


def _relative_bias(a):
    bias = _bias(a)
    truth = a["truth"]
    nonzero = np.isfinite(truth) & (truth != 0)
    safe = np.where(nonzero, truth, 1.0)
    return Values(bias.value / safe, bias.mcse / np.abs(safe), bias.n_used, nonzero)


def _empirical_se(a):
    empirical_se = _sqrt(a["var_err"])
    return Values(empirical_se, safe_ratio(empirical_se, _sqrt(2 * (a["n_ok"] - 1.0))), a["n_ok"])


def _model_se(a):
    n, mean_se2 = a["n_se"], a["mean_se2"]
    return Values(_sqrt(mean_se2), _sqrt(safe_ratio(a["var_se2"], 4 * n * mean_se2)), n)


def _model_se_relative_error(a):
    n, model_se2 = a["n_se"], a["mean_se2"]
    ratio = _sqrt(safe_ratio(model_se2, a["var_est_se"]))
    mcse = 100 * ratio * _sqrt(safe_ratio(a["var_se2"], 4 * n * model_se2 ** 2) + safe_ratio(1.0, 2 * (n - 1)))
    return Values(100 * (ratio - 1), mcse, n)


def _mse(a):
    return _mean_of(a["mse"], a["var_sqerr"], a["n_ok"])


def _rmse(a):
    return Values(_sqrt(a["mse"]), a["jackknife_rmse"], a["n_ok"])


def _coverage(a):
    return _share_of(a["coverage"], a["n_ci"])


def _bias_eliminated_coverage(a):
    return _share_of(a["be_coverage"], a["n_ci"])


def _ci_width(a):
    return _mean_of(a["mean_width"], a["var_width"], a["n_ci"])


def _rejection_rate(a):
    return _share_of(a["rejection"], a["n_p"])


def _crb_efficiency(a):
    n = a["n_ok"]
    efficiency = safe_ratio(a["crb"], a["var_err"])
    return Values(efficiency, efficiency * _sqrt(safe_ratio(2.0, n - 1)), n, np.isfinite(a["crb"]))


#: 1 − ρ² below this is float rounding of a perfect correlation: two estimators that
#: agree up to the last bits of each estimate (e.g. a mean and a trimmed mean that trims
#: nothing but adds in another order) reach about 1e-15.
_ROUNDING_OF_PERFECT_CORRELATION = 64 * np.finfo(float).eps


def _relative_efficiency(a):
    n = a["n_pairs"]
    ratio = safe_ratio(a["var_r"], a["var_j"])
    unexplained = a["unexplained_jr"]     # 1 − ρ²; |ρ| can also round to just above 1
    unexplained = np.where(unexplained < _ROUNDING_OF_PERFECT_CORRELATION, 0.0, unexplained)
    return Values(ratio, 2 * ratio * _sqrt(safe_ratio(unexplained, n - 1)), n)


def _relative_mse(a):
    return Values(safe_ratio(a["mse_r"], a["mse_j"]), a["jackknife_relative_mse"], a["n_pairs"])


def _bias_diff(a):
    return _mean_of(a["mean_dbias"], a["var_dbias"], a["n_pairs"])


def _mse_diff(a):
    return _mean_of(a["mean_dmse"], a["var_dmse"], a["n_pairs"])


def _coverage_diff(a):
    return _mean_of(a["mean_dcover"], a["var_dcover"], a["n_pairs_ci"])


_CI = ("ci_low", "ci_high")
_JACKKNIFE = "leave-one-seed-block-out jackknife (K − 1 df)"

MEASURES: tuple[Measure, ...] = (
    Measure("bias", "Bias", (), "mean(θ̂ − θ); MCSE √(var(θ̂)/n)", _bias),
    Measure("relative_bias", "Relative bias", ("truth ≠ 0",),
            "mean(θ̂ − θ)/θ; MCSE MCSE(bias)/|θ|", _relative_bias),
    Measure("empirical_se", "Empirical SE", (), "sd(θ̂); MCSE EmpSE/√(2(n−1))", _empirical_se),
    Measure("model_se", "Model SE", ("se",), "√mean(SE²); MCSE √(var(SE²)/(4n·mean(SE²)))", _model_se),
    Measure("model_se_relative_error", "Relative error in model SE (%)", ("se",),
            "100(ModSE/EmpSE − 1); MCSE 100(ModSE/EmpSE)·√(var(SE²)/(4n·ModSE⁴) + 1/(2(n−1)))",
            _model_se_relative_error),
    Measure("mse", "MSE", (), "mean((θ̂ − θ)²); MCSE √(var((θ̂ − θ)²)/n)", _mse),
    Measure("rmse", "RMSE", (), f"√MSE; MCSE {_JACKKNIFE}", _rmse),
    Measure("coverage", "Coverage", _CI, "share of intervals containing θ; MCSE √(C(1−C)/n)", _coverage),
    Measure("bias_eliminated_coverage", "Bias-eliminated coverage", _CI,
            "share of intervals containing mean(θ̂); MCSE √(C(1−C)/n)", _bias_eliminated_coverage),
    Measure("ci_width", "Mean interval width", _CI, "mean(upper − lower); MCSE sd(width)/√n", _ci_width,
            heading="CI width"),
    Measure("rejection_rate", "Rejection rate", ("p_value",),
            "share of p < 1 − level; MCSE √(P(1−P)/n)", _rejection_rate),
    Measure("crb_efficiency", "Efficiency vs Cramér–Rao bound", ("crb",),
            "CRB/var(θ̂), CRB = 1/(n·I); MCSE eff·√(2/(n−1))", _crb_efficiency, heading="CRB efficiency"),
    Measure("relative_efficiency", "Relative efficiency", ("reference",),
            "var(θ̂_ref)/var(θ̂) on paired replicates; MCSE 2·RE·√((1−ρ²)/(n−1))",
            _relative_efficiency, paired=True),
    Measure("relative_mse", "Relative MSE", ("reference",),
            f"MSE_ref/MSE on paired replicates; MCSE {_JACKKNIFE}", _relative_mse, paired=True),
    Measure("bias_diff", "Bias difference", ("reference",),
            "mean((θ̂ − θ) − (θ̂_ref − θ_ref)) on paired replicates; MCSE sd(difference)/√n",
            _bias_diff, paired=True),
    Measure("mse_diff", "MSE difference", ("reference",),
            "mean((θ̂ − θ)² − (θ̂_ref − θ_ref)²) on paired replicates; MCSE sd(difference)/√n",
            _mse_diff, paired=True),
    Measure("coverage_diff", "Coverage difference", ("reference", *_CI),
            "C − C_ref on paired replicates with intervals; MCSE sd(difference)/√n",
            _coverage_diff, paired=True),
)
MEASURE_NAMES = tuple(m.name for m in MEASURES)
_BY_NAME = {m.name: m for m in MEASURES}
_ORDER = {m.name: i for i, m in enumerate(MEASURES)}

PERFORMANCE_SCHEMA = pa.schema([
    ("scenario", pa.string()), ("estimator", pa.string()), ("measure", pa.string()),
    ("value", pa.float64()), ("mcse", pa.float64()),
    ("n_ok", pa.int64()), ("n_failed", pa.int64()),
])

ESTIMATE_COLUMNS = ("scenario", "estimator", "block", "rep", "estimate", "se", "ci_low", "ci_high",
                    "p_value", "status")


# --------------------------------------------------------------------------- inputs

def _check_level(level, name: str = "level") -> float:
    if not is_open_unit(level):
        raise ValueError(f"`{name}` must lie strictly between 0 and 1, got {level!r}")
    return float(level)


def _check_targets(targets) -> dict[str, float]:
    targets = {} if targets is None else targets
    if not isinstance(targets, Mapping):
        raise ValueError(f"`targets` must be a mapping measure -> largest acceptable MCSE, "
                         f"got {type(targets).__name__}")
    for name, target in targets.items():
        if name not in _BY_NAME:
            raise ValueError(f"`targets`: {name!r} is not a measure; choose from {', '.join(MEASURE_NAMES)}")
        if not is_positive_number(target):
            raise ValueError(f"`targets[{name!r}]` must be a positive number, got {target!r}")
    return {name: float(target) for name, target in targets.items()}


def _rows(con, sql: str, params=None) -> list[tuple]:
    """All rows of a small query (DuckDB 2.0: an unfinished result blocks the next query)."""
    return con.execute(sql, params or []).fetchall()


def _columns(con, relation: str) -> list[str]:
    cursor = con.execute(f"SELECT * FROM {relation} LIMIT 0")
    cursor.fetchall()
    return [d[0] for d in cursor.description]


def _check_relations(con, estimates: str, truth: str, reference: str | None) -> None:
    for parameter, relation, needed in (("estimates", estimates, ESTIMATE_COLUMNS),
                                        ("truth", truth, ("scenario", "estimator", "truth"))):
        missing = [c for c in needed if c not in _columns(con, relation)]
        if missing:
            raise ValueError(f"`{parameter}` lacks the column(s) {', '.join(missing)}")
    dup = _rows(con, f"SELECT scenario, estimator FROM {truth} GROUP BY scenario, estimator "
                     f"HAVING count(*) > 1 LIMIT 1")
    if dup:
        raise ValueError(f"`truth` holds more than one row for scenario {dup[0][0]!r}, estimator {dup[0][1]!r}")
    if reference is not None:
        if not isinstance(reference, str):
            raise ValueError(f"`reference` must be an estimator name, got {reference!r}")
        if not _rows(con, f"SELECT 1 FROM {truth} WHERE estimator = ? LIMIT 1", [reference]):
            raise ValueError(f"`reference` {reference!r} is not an estimator of the `truth` relation")


def _table_of(mapping_or_table, value_name: str, parameter: str) -> pa.Table:
    """An Arrow table (scenario, estimator, <value_name>) from a table or a mapping."""
    if isinstance(mapping_or_table, pa.Table):
        missing = [c for c in ("scenario", "estimator", value_name) if c not in mapping_or_table.column_names]
        if missing:
            raise ValueError(f"`{parameter}` lacks the column(s) {', '.join(missing)}")
        return mapping_or_table.select(["scenario", "estimator", value_name])
    if isinstance(mapping_or_table, Mapping):
        keys = list(mapping_or_table)
        if any(not (isinstance(k, tuple) and len(k) == 2) for k in keys):
            raise ValueError(f"`{parameter}` must map (scenario, estimator) pairs to numbers")
        return pa.table({"scenario": pa.array([k[0] for k in keys], pa.string()),
                         "estimator": pa.array([k[1] for k in keys], pa.string()),
                         value_name: pa.array([float(mapping_or_table[k]) for k in keys], pa.float64())})
    raise ValueError(f"`{parameter}` must be an Arrow table or a mapping, got {type(mapping_or_table).__name__}")


def _crb_table(con, crb) -> pa.Table | None:
    """The Cramér-Rao bounds as an Arrow table (scenario, estimator, crb), checked."""
    if crb is None:
        return None
    if isinstance(crb, str):
        if "crb" not in _columns(con, crb):
            raise ValueError(f"`crb` relation {crb!r} lacks the column crb")
        crb = con.sql(f"SELECT scenario, estimator, crb FROM {crb}").to_arrow_table()
    table = _table_of(crb, "crb", "crb")
    bounds = _numbers(table["crb"])
    bad = int(np.sum(~(np.isfinite(bounds) & (bounds > 0))))
    if bad:
        raise ValueError(f"`crb` must hold positive finite bounds; {bad} row(s) do not")
    return table


def cramer_rao_bound(fisher_information: float, n: int) -> float:
    """Cramér-Rao bound 1/(n·I) for n observations with information I each.

    Parameters
    ----------
    fisher_information : Fisher information per observation, > 0.
    n : number of observations in one dataset, >= 1.
    """
    if not is_positive_number(fisher_information):
        raise ValueError(f"`fisher_information` must be a positive number, got {fisher_information!r}")
    if not (isinstance(n, numbers.Integral) and not isinstance(n, bool) and n >= 1):
        raise ValueError(f"`n` must be a positive integer, got {n!r}")
    return 1.0 / (n * fisher_information)


# --------------------------------------------------------------------------- aggregates

def _numbers(column) -> np.ndarray:
    """An Arrow column as float64 numpy, NULL as NaN."""
    return pc.fill_null(column.cast(pa.float64()), np.nan).to_numpy(zero_copy_only=False)


def _keyed_rows(scenario: np.ndarray, estimator: np.ndarray, columns: dict, keep=None) -> dict[str, np.ndarray]:
    """Rows keyed by scenario and estimator, with float columns; only the *keep* rows if given."""
    rows = {"scenario": scenario, "estimator": estimator, **{k: np.asarray(v, float) for k, v in columns.items()}}
    return rows if keep is None else {k: v[keep] for k, v in rows.items()}


def _blocks(rows: dict[str, np.ndarray]) -> tuple[Blocks, list[tuple[str, str]]]:
    """Group the block rows (sorted by scenario, estimator) and list the group keys."""
    s, e = rows["scenario"], rows["estimator"]
    if len(s) == 0:
        return Blocks(np.zeros(0, int), np.zeros(0), 0), []
    starts = np.ones(len(s), bool)
    starts[1:] = (s[1:] != s[:-1]) | (e[1:] != e[:-1])
    keys = list(zip(s[starts], e[starts]))
    return Blocks(np.cumsum(starts) - 1, rows["m"], len(keys)), keys


def _align(keys, values: np.ndarray, table: dict[str, np.ndarray]) -> np.ndarray:
    """Per-group values keyed by (scenario, estimator), in the row order of *table*; NaN if absent."""
    index = {k: i for i, k in enumerate(keys)}
    at = np.array([index.get(k, -1) for k in zip(table["scenario"], table["estimator"])], int)
    return np.where(at >= 0, np.asarray(values, float)[at] if len(keys) else np.nan, np.nan)


def _within(blocks: Blocks, block_var: np.ndarray) -> np.ndarray:
    """Within-block sums of squares (m − 1)·var; 0 for single-replicate blocks."""
    return np.where(blocks.m > 1, (blocks.m - 1) * block_var, 0.0)


def _single_rows(con, estimates: str, sums: Sums) -> tuple[dict, dict]:
    """Per-group and per-block inputs of the single-estimator measures (groups with an 'ok' replicate)."""
    g = sums.groups
    bs = sums.single
    t, _, rows = bs.totals(g.n)
    hits = centre_hits(con, estimates, g, t["estimate"].mean)
    keep = t["err"].count > 0
    single = _keyed_rows(g.scenario, g.estimator, {
        "truth": g.truth, "n_rows": rows, "n_ok": t["err"].count,
        "mean_err": t["err"].mean, "var_err": t["err"].var, "mse": t["sqerr"].mean, "var_sqerr": t["sqerr"].var,
        "n_se": t["se2"].count, "mean_se2": t["se2"].mean, "var_se2": t["se2"].var,
        "var_est_se": t["estimate_se"].var,
        "n_ci": t["covers"].count, "coverage": t["covers"].mean, "be_coverage": safe_ratio(hits, t["covers"].count),
        "mean_width": t["width"].mean, "var_width": t["width"].var,
        "n_p": t["rejects"].count, "rejection": t["rejects"].mean,
    }, keep)
    b, used = bs.moments, bs.moments["err"].count > 0
    blocks = _keyed_rows(g.scenario[bs.group], g.estimator[bs.group], {
        "m": b["err"].count, "mean_err": b["err"].mean, "var_err": b["err"].var, "mse": b["sqerr"].mean}, used)
    return single, blocks


def _paired_rows(sums: Sums) -> tuple[dict, dict]:
    """Per-group and per-block inputs of the paired measures (estimators with a matched replicate)."""
    g = sums.groups
    bs = sums.paired
    t, c, _ = bs.totals(g.n)
    rows_of = sums.single.totals(g.n)[2]
    reference = g.reference
    keep = t["matched"].count > 0
    j, r, d = t["est_j"], t["est_r"], c[("est_j", "est_r")]
    unexplained = 1 - safe_ratio(d * d, j.m2 * r.m2)        # 1 − ρ², exactly 0 for identical estimators
    paired = _keyed_rows(g.scenario, g.estimator, {
        "n_matched": t["matched"].count, "n_rows_j": rows_of,
        "n_rows_r": np.where(reference >= 0, rows_of[reference], np.nan),
        "n_pairs": j.count, "mean_j": j.mean, "mean_r": r.mean, "var_j": j.var, "var_r": r.var,
        "unexplained_jr": unexplained,
        "mse_j": t["sq_j"].mean, "mse_r": t["sq_r"].mean, "var_sqerr_j": t["sq_j"].var,
        "var_sqerr_r": t["sq_r"].var, "cov_sqerr": safe_ratio(c[("sq_j", "sq_r")], t["sq_j"].count - 1.0),
        "mean_dbias": t["dbias"].mean, "var_dbias": t["dbias"].var,
        "mean_dmse": t["dmse"].mean, "var_dmse": t["dmse"].var,
        "n_pairs_ci": t["dcover"].count, "mean_dcover": t["dcover"].mean, "var_dcover": t["dcover"].var,
    }, keep)
    b, used = bs.moments, bs.moments["est_j"].count > 0
    blocks = _keyed_rows(g.scenario[bs.group], g.estimator[bs.group], {
        "m": b["est_j"].count, "mean_j": b["est_j"].mean, "var_j": b["est_j"].var, "mean_r": b["est_r"].mean,
        "var_r": b["est_r"].var, "mse_j": b["sq_j"].mean, "mse_r": b["sq_r"].mean}, used)
    return paired, blocks


@dataclass(frozen=True)
class _Aggregates:
    """Everything the measures are computed from, one row per scenario x estimator."""

    single: dict[str, np.ndarray]            #: per-estimator aggregates (groups with n_ok > 0)
    paired: dict[str, np.ndarray] | None     #: comparisons with the reference, or None
    heterogeneity: dict[str, np.ndarray]     #: block test of the mean error, aligned with single


def _aggregate(con, estimates: str, truth: str, *, reference: str | None = None, level: float = 0.95,
               crb=None) -> _Aggregates:
    """Check the inputs, take the block sums (one sorted pass) and run the block jackknife."""
    level = _check_level(level)
    _check_relations(con, estimates, truth, reference)
    crb = _crb_table(con, crb)
    truth_table = con.sql(f"SELECT scenario, estimator, truth FROM {truth}").to_arrow_table()
    sums = block_sums(con, estimates, truth_table, reference=reference, alpha=1.0 - level)
    single, block_rows = _single_rows(con, estimates, sums)
    paired, pair_blocks = _paired_rows(sums) if reference is not None else (None, None)
    single["crb"] = np.full(len(single["scenario"]), np.nan) if crb is None else _align(
        list(zip(crb["scenario"].to_pylist(), crb["estimator"].to_pylist())), _numbers(crb["crb"]), single)

    blocks, keys = _blocks(block_rows)
    mse_loo = blocks.leave_one_out_mean(block_rows["mse"])
    var_loo = safe_ratio(blocks.leave_one_out_comoment(block_rows["mean_err"], block_rows["mean_err"],
                                                 _within(blocks, block_rows["var_err"])),
                   blocks.replicates()[blocks.group] - blocks.m - 1)
    for name, loo in (("bias", blocks.leave_one_out_mean(block_rows["mean_err"])), ("mse", mse_loo),
                      ("rmse", _sqrt(mse_loo)), ("empirical_se", _sqrt(var_loo))):
        single[f"jackknife_{name}"] = _align(keys, jackknife_se(blocks, loo), single)
    single["n_blocks"] = _align(keys, blocks.count(), single)
    het = block_heterogeneity(blocks, block_rows["mean_err"], block_rows["var_err"])
    heterogeneity = {"statistic": _align(keys, het.statistic, single), "df": _align(keys, het.df, single),
                     "p_value": _align(keys, het.p_value, single)}

    if paired is not None:
        # replicates of either estimator, each matched pair counted once
        paired["n_rows"] = paired["n_rows_j"] + paired["n_rows_r"] - paired["n_matched"]
        pb = pair_blocks
        pblocks, pkeys = _blocks(pb)
        s_jj = pblocks.leave_one_out_comoment(pb["mean_j"], pb["mean_j"], _within(pblocks, pb["var_j"]))
        s_rr = pblocks.leave_one_out_comoment(pb["mean_r"], pb["mean_r"], _within(pblocks, pb["var_r"]))
        ratio_loo = {"relative_efficiency": safe_ratio(s_rr, s_jj),
                     "relative_mse": safe_ratio(pblocks.leave_one_out_mean(pb["mse_r"]),
                                          pblocks.leave_one_out_mean(pb["mse_j"]))}
        for name, loo in ratio_loo.items():
            paired[f"jackknife_{name}"] = _align(pkeys, jackknife_se(pblocks, loo), paired)
        paired["n_blocks"] = _align(pkeys, pblocks.count(), paired)
    return _Aggregates(single, paired, heterogeneity)


# --------------------------------------------------------------------------- tables

def _floats(x) -> pa.Array:
    return pa.array(np.asarray(x, float), pa.float64(), from_pandas=True)    # NaN -> null


def _ints(x) -> pa.Array:
    return _floats(x).cast(pa.int64())


def _flags(ok, defined) -> pa.Array:
    """Booleans, null where the check could not be made."""
    return pa.array(np.asarray(ok, bool), pa.bool_(), mask=~np.asarray(defined, bool))


def _without_rounding_noise(value, mcse):
    """An MCSE below 1e-12·|value| would need ~10^24 replicates to be Monte
    Carlo error: it is float rounding of a spread that is really 0 (e.g. the
    widths of known-variance intervals). Report it as 0."""
    with np.errstate(invalid="ignore"):
        return np.where(np.abs(mcse) < 1e-12 * np.abs(value), 0.0, mcse)


def _measure_rows(agg: _Aggregates, names) -> list[tuple[Measure, dict, np.ndarray, Values]]:
    """For each named measure with inputs: its aggregates, the rows that get a result, its values."""
    out = []
    for measure in (_BY_NAME[n] for n in names):
        a = agg.paired if measure.paired else agg.single
        if a is None or len(a["scenario"]) == 0:
            continue
        v = measure.compute(a)
        shape = a["scenario"].shape
        v = Values(*(np.broadcast_to(x, shape) for x in (v.value, v.mcse, v.n_used)),
                   present=None if v.present is None else np.broadcast_to(v.present, shape))
        keep = v.n_used > 0
        if v.present is not None:
            keep &= v.present
        out.append((measure, a, np.flatnonzero(keep), v))
    return out


def _keyed(a: dict, idx: np.ndarray, measure: str) -> dict[str, pa.Array]:
    return {"scenario": pa.array(a["scenario"][idx], pa.string()),
            "estimator": pa.array(a["estimator"][idx], pa.string()),
            "measure": pa.array([measure] * len(idx), pa.string())}


def _sorted(parts: list[pa.Table], schema: pa.Schema) -> pa.Table:
    """Rows by scenario, estimator, then measure in MEASURES order."""
    if not parts:
        return schema.empty_table()
    table = pa.concat_tables(parts)
    order = pa.array([_ORDER[m] for m in table["measure"].to_pylist()], pa.int64())
    table = table.append_column("order", order).sort_by(
        [("scenario", "ascending"), ("estimator", "ascending"), ("order", "ascending")])
    return table.drop_columns(["order"]).cast(schema)


def _long_table(agg: _Aggregates) -> pa.Table:
    parts = [pa.table({
        **_keyed(a, idx, measure.name),
        "value": _floats(v.value[idx]),
        "mcse": _floats(_without_rounding_noise(v.value, v.mcse)[idx]),
        "n_ok": _ints(v.n_used[idx]),
        "n_failed": _ints(a["n_rows"][idx] - v.n_used[idx]),
    }) for measure, a, idx, v in _measure_rows(agg, MEASURE_NAMES)]
    return _sorted(parts, PERFORMANCE_SCHEMA)


def compute_performance(con: duckdb.DuckDBPyConnection, estimates: str = "estimates",
                        truth: str = "truth", *, reference: str | None = None, level: float = 0.95,
                        crb: str | pa.Table | Mapping | None = None) -> pa.Table:
    """Every applicable measure for every scenario x estimator, long form.

    Parameters
    ----------
    con : duckdb connection holding the relations below.
    estimates : name of a table/view with columns scenario, estimator, block,
        rep, estimate, se, ci_low, ci_high, p_value, status (the shard schema).
    truth : name of a table/view with columns (scenario, estimator, truth),
        at most one row per scenario x estimator.
    reference : estimator that the paired measures (relative_efficiency,
        relative_mse, bias_diff, mse_diff, coverage_diff) compare against;
        None = no paired rows.
    level : nominal level; rejection_rate counts p < 1 − level.
    crb : Cramér-Rao bounds for crb_efficiency: a relation name, an Arrow
        table or a mapping ``{(scenario, estimator): crb}``; rows without a
        bound get no crb_efficiency row.

    Returns
    -------
    pyarrow.Table with columns scenario, estimator, measure, value, mcse,
    n_ok, n_failed, sorted by scenario, estimator and MEASURES order. A
    measure whose inputs are missing is absent (no row), never zero; see the
    module docstring for n_ok/n_failed of each kind of measure. An
    estimator with no 'ok' replicate in a scenario has no rows there.
    """
    return _long_table(_aggregate(con, estimates, truth, reference=reference, level=level, crb=crb))


@contextlib.contextmanager
def _in_memory(estimates: pa.Table, truth, reference: str | None):
    """A DuckDB connection holding Arrow estimates and truths as relations."""
    cols = estimates.column_names
    for col in ("scenario", "estimator", "estimate", "status"):
        if col not in cols:
            raise ValueError(f"`estimates` lacks the column {col!r}")
    if "rep" not in cols:
        if reference is not None:
            raise ValueError("`estimates` needs a `rep` column to pair replicates with the `reference`")
        estimates = estimates.append_column("rep", pa.array(np.arange(estimates.num_rows, dtype=np.int64)))
    if "block" not in cols:   # every replicate its own block: the jackknife over replicates
        estimates = estimates.append_column("block", estimates["rep"])
    for col in ("se", "ci_low", "ci_high", "p_value"):
        if col not in cols:
            estimates = estimates.append_column(col, pa.nulls(estimates.num_rows, pa.float64()))
    con = duckdb.connect()
    try:
        con.register("estimates_in", estimates)
        con.register("truth_in", _table_of(truth, "truth", "truth"))
        yield con
    finally:
        con.close()


def performance_table(estimates: pa.Table, truth: Mapping[tuple[str, str], float] | pa.Table, *,
                      reference: str | None = None, level: float = 0.95,
                      crb: pa.Table | Mapping | None = None) -> pa.Table:
    """Measures from in-memory estimates, without Snakemake or a store.

    Parameters
    ----------
    estimates : Arrow table with at least scenario, estimator, estimate,
        status. Missing se/ci_low/ci_high/p_value are taken as not provided;
        a missing ``block`` makes every replicate its own seed block; a
        missing ``rep`` is allowed only without a reference.
    truth : Arrow table (scenario, estimator, truth), or a mapping
        ``{(scenario, estimator): truth}``.
    reference, level, crb : as in :func:`compute_performance`.
    """
    with _in_memory(estimates, truth, reference) as con:
        return compute_performance(con, "estimates_in", "truth_in", reference=reference, level=level, crb=crb)


JACKKNIFE_SCHEMA = pa.schema([
    ("scenario", pa.string()), ("estimator", pa.string()), ("measure", pa.string()),
    ("value", pa.float64()), ("mcse_formula", pa.float64()), ("mcse_jackknife", pa.float64()),
    ("n_blocks", pa.int64()),
])


def _formula_mcse(measure: Measure, a: dict[str, np.ndarray], v: Values) -> np.ndarray:
    """The closed-form MCSE of a jackknifed measure; the delta method for rmse and relative_mse."""
    if measure.name == "rmse":            # MCSE(MSE)/(2·RMSE)
        return safe_ratio(_mse(a).mcse, 2 * v.value)
    if measure.name == "relative_mse":    # a ratio of two correlated means
        mse_r, mse_j = a["mse_r"], a["mse_j"]
        rel = safe_ratio(a["var_sqerr_r"], mse_r ** 2) + safe_ratio(a["var_sqerr_j"], mse_j ** 2) \
            - 2 * safe_ratio(a["cov_sqerr"], mse_r * mse_j)
        return v.value * _sqrt(safe_ratio(rel, a["n_pairs"]))
    return v.mcse


def jackknife_table(con: duckdb.DuckDBPyConnection, estimates: str = "estimates", truth: str = "truth",
                    *, reference: str | None = None) -> pa.Table:
    """Seed-block jackknife MCSE beside the formula MCSE, as a cross-check.

    Parameters
    ----------
    con, estimates, truth, reference : as in :func:`compute_performance`.

    Returns
    -------
    pyarrow.Table (scenario, estimator, measure, value, mcse_formula,
    mcse_jackknife, n_blocks) for bias, empirical_se, mse, rmse and, with a
    reference, relative_efficiency and relative_mse. The formula MCSE is
    Morris et al.'s Table 6 where it has one, else the delta method (rmse,
    relative_mse). The jackknife leaves out one seed block at a time and has
    K − 1 df for K blocks; it is null with fewer than 2 blocks.
    """
    agg = _aggregate(con, estimates, truth, reference=reference)
    names = ("bias", "empirical_se", "mse", "rmse", "relative_efficiency", "relative_mse")
    parts = [pa.table({
        **_keyed(a, idx, measure.name),
        "value": _floats(v.value[idx]),
        "mcse_formula": _floats(_formula_mcse(measure, a, v)[idx]),
        "mcse_jackknife": _floats(a[f"jackknife_{measure.name}"][idx]),
        "n_blocks": _ints(a["n_blocks"][idx]),
    }) for measure, a, idx, v in _measure_rows(agg, names)]
    return _sorted(parts, JACKKNIFE_SCHEMA)


PLAN_SCHEMA = pa.schema([
    ("scenario", pa.string()), ("estimator", pa.string()), ("measure", pa.string()),
    ("value", pa.float64()), ("mcse", pa.float64()), ("target", pa.float64()),
    ("n_ok", pa.int64()), ("n_failed", pa.int64()), ("n_needed", pa.int64()), ("n_to_run", pa.int64()),
])


def _plan(performance: pa.Table, targets: dict[str, float]) -> pa.Table:
    rows = performance.filter(pc.is_in(performance["measure"], pa.array(list(targets), pa.string())))
    target = np.array([targets[m] for m in rows["measure"].to_pylist()], float)
    n_ok, n_failed = _numbers(rows["n_ok"]), _numbers(rows["n_failed"])
    needed = replicates_for_target(n_ok, _numbers(rows["mcse"]), target)
    return pa.table({
        "scenario": rows["scenario"], "estimator": rows["estimator"], "measure": rows["measure"],
        "value": rows["value"], "mcse": rows["mcse"], "target": _floats(target),
        "n_ok": rows["n_ok"], "n_failed": rows["n_failed"], "n_needed": _ints(needed),
        "n_to_run": _ints(round_up(needed * (n_ok + n_failed) / n_ok)),
    }, schema=PLAN_SCHEMA)


def plan_replicates(con: duckdb.DuckDBPyConnection, estimates: str = "estimates", truth: str = "truth",
                    targets: Mapping[str, float] | None = None, *, reference: str | None = None,
                    level: float = 0.95, crb=None) -> pa.Table:
    """Replicates needed to reach each target MCSE, from the replicates run so far.

    Parameters
    ----------
    con, estimates, truth, reference, level, crb : as in :func:`compute_performance`.
    targets : measure -> largest acceptable MCSE (> 0), in the measure's
        units (shares for coverage, percent for model_se_relative_error).

    Returns
    -------
    pyarrow.Table (scenario, estimator, measure, value, mcse, target, n_ok,
    n_failed, n_needed, n_to_run), one row per scenario x estimator x
    targeted measure that has a row in the performance table.
    n_needed = ⌈n_ok·(MCSE/target)²⌉ usable replicates (Var/target², or
    C(1 − C)/target² for coverage; Morris, White & Crowther 2019);
    n_to_run = ⌈n_needed·(n_ok + n_failed)/n_ok⌉ allows for the share that
    failed so far. Both are totals, not additions, and null where the MCSE is
    unknown. Before any run, use :func:`estbench.mcse.replicates_needed`.
    """
    targets = _check_targets(targets)
    return _plan(compute_performance(con, estimates, truth, reference=reference, level=level, crb=crb), targets)


CHECKS_SCHEMA = pa.schema([
    ("scenario", pa.string()), ("estimator", pa.string()), ("check", pa.string()),
    ("measure", pa.string()), ("statistic", pa.float64()), ("limit", pa.float64()),
    ("passed", pa.bool_()), ("p_value", pa.float64()), ("df", pa.int64()),
    ("n_ok", pa.int64()), ("n_needed", pa.int64()),
])


def compute_checks(con: duckdb.DuckDBPyConnection, estimates: str = "estimates", truth: str = "truth",
                   targets: Mapping[str, float] | None = None, *, reference: str | None = None,
                   level: float = 0.95, crb=None, heterogeneity_alpha: float = 0.001) -> pa.Table:
    """Monte Carlo error checks for every scenario x estimator.

    Parameters
    ----------
    con, estimates, truth, reference, level, crb : as in :func:`compute_performance`.
    targets : measure -> largest acceptable MCSE (> 0).
    heterogeneity_alpha : a block test with p below it fails. With G
        scenario x estimator groups, about G·alpha fail by chance alone.

    Returns
    -------
    pyarrow.Table (scenario, estimator, check, measure, statistic, limit,
    passed, p_value, df, n_ok, n_needed), sorted by scenario, estimator,
    check; two kinds of rows:

    * check = ``mcse_target``, one per targeted measure row: statistic = its
      MCSE, limit = the target, passed = MCSE <= target, n_needed as in
      :func:`plan_replicates`; p_value and df null.
    * check = ``block_heterogeneity``, measure = ``bias``: statistic = Q of
      :func:`estbench.mcse.block_heterogeneity` (seed-block mean errors
      against their formula MCSE), df = K − 1, p_value from the chi-square
      distribution, limit = heterogeneity_alpha, passed = p >= alpha; all
      null (passed too) where there are fewer than 2 blocks.
    """
    targets = _check_targets(targets)
    alpha = _check_level(heterogeneity_alpha, "heterogeneity_alpha")
    agg = _aggregate(con, estimates, truth, reference=reference, level=level, crb=crb)
    return _checks(agg, _long_table(agg), targets, alpha)


def performance_and_checks(con: duckdb.DuckDBPyConnection, estimates: str = "estimates",
                           truth: str = "truth", targets: Mapping[str, float] | None = None, *,
                           reference: str | None = None, level: float = 0.95, crb=None,
                           heterogeneity_alpha: float = 0.001) -> tuple[pa.Table, pa.Table]:
    """``compute_performance`` and ``compute_checks`` from one pass over the estimates.

    Parameters and returns as in those two functions; this is what ingest uses.
    """
    targets = _check_targets(targets)
    alpha = _check_level(heterogeneity_alpha, "heterogeneity_alpha")
    agg = _aggregate(con, estimates, truth, reference=reference, level=level, crb=crb)
    performance = _long_table(agg)
    return performance, _checks(agg, performance, targets, alpha)


def _checks(agg, performance: pa.Table, targets: dict, alpha: float) -> pa.Table:
    """The checks table from the aggregates and the performance table built from them."""
    plan = _plan(performance, targets)
    mcse = _numbers(plan["mcse"])
    target_rows = pa.table({
        "scenario": plan["scenario"], "estimator": plan["estimator"],
        "check": pa.array(["mcse_target"] * plan.num_rows, pa.string()), "measure": plan["measure"],
        "statistic": plan["mcse"], "limit": plan["target"],
        "passed": _flags(mcse <= _numbers(plan["target"]), np.isfinite(mcse)),
        "p_value": pa.nulls(plan.num_rows, pa.float64()), "df": pa.nulls(plan.num_rows, pa.int64()),
        "n_ok": plan["n_ok"], "n_needed": plan["n_needed"],
    }, schema=CHECKS_SCHEMA)
    s, het = agg.single, agg.heterogeneity
    groups = len(s["scenario"])
    het_rows = pa.table({
        "scenario": pa.array(s["scenario"], pa.string()), "estimator": pa.array(s["estimator"], pa.string()),
        "check": pa.array(["block_heterogeneity"] * groups, pa.string()),
        "measure": pa.array(["bias"] * groups, pa.string()),
        "statistic": _floats(het["statistic"]), "limit": _floats(np.full(groups, alpha)),
        "passed": _flags(het["p_value"] >= alpha, np.isfinite(het["p_value"])),
        "p_value": _floats(het["p_value"]), "df": _ints(het["df"]),
        "n_ok": _ints(s["n_ok"]), "n_needed": pa.nulls(groups, pa.int64()),
    }, schema=CHECKS_SCHEMA)
    return pa.concat_tables([target_rows, het_rows]).sort_by(
        [("scenario", "ascending"), ("estimator", "ascending"), ("check", "ascending")])
