"""The report's numerics and its SQL aggregates, checked against numpy and scipy.

Every query of ``estbench.report.data`` that reads the estimates is run on a
small in-memory table and compared with the same quantity computed by numpy
from the rows themselves.
"""

import math

import duckdb
import numpy as np
import pyarrow as pa
import pytest
from scipy import stats

from estbench.report import data as report_data
from estbench.report.stats import (Contest, badness, mcse_text, nominal_band, power_law_fit,
                                   round_to_mcse)


# ------------------------------------------------------------------ power-law fit

def test_power_law_fit_matches_numpy_weighted_polyfit():
    # Reference: numpy.polyfit with w = 1/σ and cov="unscaled" is weighted least
    # squares with known variances; the delta method gives σ(log v) = MCSE/v.
    n = np.array([5, 10, 25, 50, 200])
    value = np.array([0.231, 0.160, 0.101, 0.0702, 0.0349])
    mcse = np.array([0.004, 0.0025, 0.0018, 0.0009, 0.0006])
    fit = power_law_fit(n, value, mcse)
    coef, cov = np.polyfit(np.log(n), np.log(value), 1, w=value / mcse, cov="unscaled")
    assert fit.exponent == pytest.approx(coef[0], rel=1e-12)
    assert fit.intercept == pytest.approx(coef[1], rel=1e-12)
    assert fit.se == pytest.approx(math.sqrt(cov[0, 0]), rel=1e-10)
    resid = np.log(value) - np.polyval(coef, np.log(n))
    chi2 = float(np.sum((value / mcse) ** 2 * resid ** 2))
    assert fit.chi2 == pytest.approx(chi2, rel=1e-10) and fit.df == 3
    assert fit.p_value == pytest.approx(stats.chi2.sf(chi2, 3), rel=1e-10)


def test_power_law_fit_recovers_an_exact_rate():
    n = np.array([10, 40, 160])
    fit = power_law_fit(n, 3.0 * n ** -0.5, 0.01 * 3.0 * n ** -0.5)
    assert fit.exponent == pytest.approx(-0.5, abs=1e-12)
    assert math.exp(fit.intercept) == pytest.approx(3.0)
    assert fit.chi2 == pytest.approx(0.0, abs=1e-18) and fit.p_value == pytest.approx(1.0)


def test_power_law_fit_standard_error_matches_the_spread_of_fits():
    # Simulated studies: log value = log(2) − 0.5 log n + N(0, (MCSE/value)²).
    # The reported SE must equal the spread of the fitted exponents (WLS theory).
    rng = np.random.default_rng(11)
    n = np.array([5, 10, 20, 50, 100, 400])
    rel = np.array([0.03, 0.02, 0.05, 0.02, 0.04, 0.03])
    fits = []
    for _ in range(4000):
        value = 2.0 * n ** -0.5 * np.exp(rel * rng.standard_normal(n.size))
        fits.append(power_law_fit(n, value, rel * value))
    spread = np.std([f.exponent for f in fits], ddof=1)
    reported = np.mean([f.se for f in fits])
    # 4000 fits: the sd estimate has relative MCSE 1/√(2·3999) ≈ 1.1%; allow 4 of those.
    assert reported == pytest.approx(spread, rel=0.045)
    assert np.mean([f.exponent for f in fits]) == pytest.approx(-0.5, abs=4 * spread / math.sqrt(4000))
    # Under a true power law the lack-of-fit p-value is uniform: about 5% below 0.05.
    below = np.mean([f.p_value < 0.05 for f in fits])
    assert abs(below - 0.05) < 4 * math.sqrt(0.05 * 0.95 / 4000)


def test_power_law_fit_needs_two_usable_points():
    assert power_law_fit([5, 10], [0.1, 0.0], [0.01, 0.01]) is None       # log of 0
    assert power_law_fit([5, 5], [0.1, 0.2], [0.01, 0.01]) is None        # one distinct n
    assert power_law_fit([5, 10, 20], [0.1, 0.07, 0.05], [0.01, np.nan, 0.0]) is None
    with pytest.raises(ValueError, match="equal lengths"):
        power_law_fit([5, 10], [0.1], [0.01])


# ------------------------------------------------------------------ bands, rounding, contests

def test_nominal_band_is_two_binomial_mcse_around_the_level():
    # Closed form: 0.95 ± 2·√(0.95·0.05/1000) = 0.95 ± 0.013784...
    lo, hi = nominal_band(0.95, 1000)
    assert lo == pytest.approx(0.95 - 2 * math.sqrt(0.0475 / 1000))
    assert hi == pytest.approx(0.95 + 2 * math.sqrt(0.0475 / 1000))
    assert nominal_band(0.99, 10) == (pytest.approx(0.99 - 2 * math.sqrt(0.0099 / 10)), 1.0)


@pytest.mark.parametrize("value, mcse, text", [
    (0.123456, 0.0034, "0.1235"),       # second significant digit of the MCSE (common practice)
    (-0.0015, 0.005, "-0.0015"),
    (12345.6, 230.0, "12350"),
    (0.95, 0.0, "0.95"),                # no Monte Carlo error: four significant digits
    (1.0000000001, 1e-11, "1.00000"),   # never more than six significant digits
    (-0.00004, 0.002, "0.0000"),        # no "-0.0000"
    (float("inf"), None, "∞"),
    (None, None, "—"),
])
def test_values_are_rounded_to_their_mcse(value, mcse, text):
    assert round_to_mcse(value, mcse) == text


def test_mcse_text_has_two_significant_digits():
    assert mcse_text(0.0034567) == "0.0035" and mcse_text(None) == "—"


def test_a_leader_needs_more_than_two_mcse_of_the_paired_difference():
    assert Contest("a", "b", difference=0.03, mcse=0.01, pairs=100).decided
    assert not Contest("a", "b", difference=0.019, mcse=0.01, pairs=100).decided
    # identical estimates: a zero difference with no spread is a tie, not a win
    assert not Contest("a", "b", difference=0.0, mcse=0.0, pairs=100).decided
    assert not Contest("a", "b", difference=1e-17, mcse=1e-18, pairs=100, scale=0.2).decided
    assert Contest("a", "b", difference=0.1, mcse=0.0, pairs=100).z == math.inf


def test_badness_orders_each_ranked_measure():
    assert badness("bias", -0.3, 0.95) > badness("bias", 0.2, 0.95)
    assert badness("coverage", 0.99, 0.95) > badness("coverage", 0.93, 0.95)
    with pytest.raises(ValueError, match="measure"):
        badness("power", 0.8, 0.95)


# ------------------------------------------------------------------ SQL aggregates against numpy

@pytest.fixture(scope="module")
def estimates_db():
    """An in-memory store fragment: two estimators on the same 3000 datasets of one scenario."""
    rng = np.random.default_rng(5)
    reps = 3000
    shared = rng.standard_normal(reps)
    a = 10 + 0.3 * shared + 0.1 * rng.standard_normal(reps)
    b = 10.02 + 0.3 * shared + 0.2 * rng.standard_normal(reps) + 0.03 * rng.standard_t(3, reps)
    ok_b = rng.random(reps) >= 0.01
    half_b = 0.4 * 1.96
    rep = np.arange(reps)
    table = pa.table({
        "scenario": ["s1"] * (2 * reps), "estimator": ["a"] * reps + ["b"] * reps,
        "block": np.concatenate([rep, rep]) // 100, "rep": np.concatenate([rep, rep]),
        "estimate": np.concatenate([a, b]),
        "se": pa.array(np.concatenate([np.full(reps, 0.31), np.full(reps, np.nan)]), from_pandas=True),
        "ci_low": np.concatenate([a - 1.96 * 0.31, b - half_b]),
        "ci_high": np.concatenate([a + 1.96 * 0.31, b + 0.5 * half_b]),     # b's interval is lopsided
        "p_value": pa.nulls(2 * reps, pa.float64()),
        "status": ["ok"] * reps + ["ok" if k else "error" for k in ok_b],
        "message": [None] * reps + [None if k else "ValueError: boom" for k in ok_b],
    })
    con = duckdb.connect()
    con.register("rows_in", table)
    con.execute("CREATE TABLE estimates AS SELECT * FROM rows_in")
    con.execute("CREATE TABLE truth AS SELECT 's1' AS scenario, estimator, 10.0 AS truth FROM "
                "(VALUES ('a'), ('b')) v(estimator)")
    con.execute("CREATE TABLE estimators AS SELECT * FROM (VALUES ('a', 0), ('b', 1)) v(estimator, position)")
    yield con, {"a": a, "b": b, "ok_b": ok_b, "reps": reps, "half_b": half_b}
    con.close()


def test_error_quantiles_match_numpy(estimates_db):
    con, d = estimates_db
    keys = {"scenario": ["s1", "s1"], "estimator": ["a", "b"], "target": ["mean", "mean"], "truth": [10.0, 10.0]}
    q = report_data.error_quantiles(con, keys, 0.005, 0.995, every=1)[0]
    pooled = np.concatenate([d["a"], d["b"][d["ok_b"]]]) - 10
    # numpy's default "linear" method is the same definition as DuckDB's quantile_cont
    assert q["lo"] == pytest.approx(np.quantile(pooled, 0.005), rel=1e-12)
    assert q["hi"] == pytest.approx(np.quantile(pooled, 0.995), rel=1e-12)
    every = report_data.error_quantiles(con, keys, 0.1, 0.9, every=7)[0]
    sub = np.concatenate([d["a"][::7], d["b"][::7][d["ok_b"][::7]]]) - 10
    assert every["lo"] == pytest.approx(np.quantile(sub, 0.1), rel=1e-12)


def test_error_histograms_match_numpy_histogram(estimates_db):
    con, d = estimates_db
    lo, width, bins, tol = -0.8, 0.04, 40, 0.25
    keys = {"scenario": ["s1", "s1"], "estimator": ["a", "b"], "truth": [10.0, 10.0], "lo": [lo, lo],
            "width": [width, width], "bins": [bins, bins], "tolerance": [tol, tol]}
    rows = report_data.error_histograms(con, keys)
    edges = lo + width * np.arange(bins + 1)
    for est, x in (("a", d["a"]), ("b", d["b"][d["ok_b"]])):
        err = x - 10
        got = np.zeros(bins + 2)
        beyond = 0
        for r in rows:
            if r["estimator"] == est:
                got[r["bin"] + 1] = r["k"]
                beyond += r["beyond"]
        inside, _ = np.histogram(err, edges)    # (no error falls exactly on an edge here)
        assert np.array_equal(got[1:-1], inside)
        assert got[0] == np.sum(err < lo) and got.sum() == err.size
        assert beyond == np.sum(np.abs(err) > tol)


def _pairs(*rows: dict) -> dict:
    """The pairs table of report_data.paired_differences, from one dict per pair."""
    return {c: [r[c] for r in rows] for c in report_data.PAIR_COLUMNS}


def test_paired_differences_match_numpy_on_the_same_datasets(estimates_db):
    # Reference: the same per-replicate differences computed by numpy from the rows.
    con, d = estimates_db
    ok = d["ok_b"]
    a, b = d["a"][ok], d["b"][ok]
    forward = {"pair": 0, "scenario": "s1", "est_a": "a", "est_b": "b", "truth": 10.0, "level": 0.95,
               "sb_a": 1.0, "sb_b": -1.0, "sc_a": -1.0, "sc_b": 1.0, "m_a": 10.01, "m_b": 10.03}
    # the same two estimators the other way round, with other signs and centres, in the same query
    backward = {"pair": 1, "scenario": "s1", "est_a": "b", "est_b": "a", "truth": 10.0, "level": 0.9,
                "sb_a": 1.0, "sb_b": 1.0, "sc_a": 1.0, "sc_b": 1.0, "m_a": 10.0, "m_b": 10.0}
    measures = ["bias", "empirical_se", "rmse", "coverage"]
    got = report_data.paired_differences(con, _pairs(forward, backward), measures)
    assert [g["pair"] for g in got] == [0, 1]
    cover_a = np.abs(a - 10) <= 1.96 * 0.31
    cover_b = (b - d["half_b"] <= 10) & (10 <= b + 0.5 * d["half_b"])
    expected = [{
        "bias": -1.0 * (b - 10) - 1.0 * (a - 10),
        "empirical_se": (b - 10.03) ** 2 - (a - 10.01) ** 2,
        "rmse": (b - 10) ** 2 - (a - 10) ** 2,
        "coverage": 1.0 * (cover_b - 0.95) - (-1.0) * (cover_a - 0.95),
    }, {
        "bias": (a - 10) - (b - 10),
        "empirical_se": (a - 10) ** 2 - (b - 10) ** 2,
        "rmse": (a - 10) ** 2 - (b - 10) ** 2,
        "coverage": (cover_a - 0.9) - (cover_b - 0.9),
    }]
    for row, want in zip(got, expected):
        for measure, diff in want.items():
            assert row[f"{measure}_pairs"] == ok.sum()
            assert row[f"{measure}_mean"] == pytest.approx(diff.mean(), rel=1e-9, abs=1e-12)
            assert row[f"{measure}_sd"] == pytest.approx(diff.std(ddof=1), rel=1e-9)
    only = report_data.paired_differences(con, _pairs(forward), ["rmse"])
    assert set(only[0]) == {"pair", "rmse_pairs", "rmse_mean", "rmse_sd"}
    # a pair with no replicate in common (no such scenario) gives no row
    assert report_data.paired_differences(con, _pairs({**forward, "scenario": "s9"}), ["rmse"]) == []


def test_zip_sample_ranks_by_abs_z_and_keeps_every_kth(estimates_db):
    con, d = estimates_db
    rows = report_data.zip_sample(con, "s1", lines=300)
    a_rows = [r for r in rows if r["estimator"] == "a"]
    z = np.abs(d["a"] - 10) / 0.31
    order = np.lexsort((np.arange(d["reps"]), z))          # by |z|, ties by rep
    k = math.ceil(d["reps"] / 300)
    assert [r["rank"] for r in a_rows] == list(range(1, d["reps"] + 1, k))
    assert [r["estimate"] for r in a_rows] == pytest.approx(d["a"][order][::k].tolist())
    assert all(r["total"] == d["reps"] and r["has_se"] for r in a_rows)
    # estimator b gives no SE: ranked by distance over the half-width on the truth's side
    b_rows = [r for r in rows if r["estimator"] == "b"]
    b = d["b"][d["ok_b"]]
    ratio = np.where(10 >= b, (10 - b) / (0.5 * d["half_b"]), (b - 10) / d["half_b"])
    k_b = math.ceil(b.size / 300)
    assert [r["estimate"] for r in b_rows] == pytest.approx(b[np.argsort(ratio, kind="stable")][::k_b].tolist())
    covers = [r["covers"] for r in b_rows]
    assert covers == sorted(covers, reverse=True)            # covering first, then the misses
    assert not b_rows[0]["has_se"]
