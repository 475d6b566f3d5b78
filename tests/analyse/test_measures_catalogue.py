"""The performance-measure catalogue against results the project did not write.

Each check names its source. Simulated measures must agree with the closed
form within 4 MCSE; every simulation has a fixed seed and enough replicates
that the check is sharp.
"""

from __future__ import annotations

import math

import duckdb
import numpy as np
import pyarrow as pa
import pytest
from scipy import special, stats

from estbench.analyse.measures import (MEASURE_NAMES, MEASURES, PERFORMANCE_SCHEMA, compute_performance,
                               cramer_rao_bound, performance_table)

Z975 = stats.norm.ppf(0.975)


def arm(scenario, estimator, estimate, *, se=None, ci=None, p_value=None, block_size=100,
        status=None, rep=None) -> pa.Table:
    """Estimates of one estimator in the shard schema; *scenario* a name or one per row."""
    estimate = np.asarray(estimate, float)
    n = len(estimate)
    rep = np.arange(n) if rep is None else np.asarray(rep)
    scenario = np.full(n, scenario, object) if isinstance(scenario, str) else np.asarray(scenario, object)
    lo, hi = (None, None) if ci is None else ci

    def column(x):
        return pa.nulls(n, pa.float64()) if x is None else pa.array(np.asarray(x, float))

    return pa.table({
        "scenario": pa.array(scenario, pa.string()), "estimator": pa.array(np.full(n, estimator, object)),
        "block": pa.array(rep // block_size, pa.int64()), "rep": pa.array(rep, pa.int64()),
        "estimate": column(estimate), "se": column(se), "ci_low": column(lo), "ci_high": column(hi),
        "p_value": column(p_value),
        "status": pa.array(np.full(n, "ok", object) if status is None else np.asarray(status, object)),
        "message": pa.nulls(n, pa.string()),
    })


def rows_of(table: pa.Table) -> dict[tuple[str, str, str], dict]:
    """Performance rows keyed by (scenario, estimator, measure)."""
    return {(r["scenario"], r["estimator"], r["measure"]): r for r in table.to_pylist()}


def assert_within(row: dict, expected: float, k: float = 4.0) -> None:
    """The simulated value is within k MCSE of the closed form (float noise aside:
    a measure the data fix exactly, like the coverage difference of two
    intervals that cover on the same datasets, has MCSE 0)."""
    assert abs(row["value"] - expected) <= k * row["mcse"] + 1e-12, (row, expected)


def printed(table: pa.Table) -> list[tuple]:
    """Rows as the CSV prints them: ten significant digits."""
    return [(r["scenario"], r["estimator"], r["measure"], format(r["value"], ".10g"),
             format(r["mcse"], ".10g"), r["n_ok"], r["n_failed"]) for r in table.to_pylist()]


def measures_of(table: pa.Table, scenario: str, estimator: str) -> set[str]:
    return {r["measure"] for r in table.to_pylist() if (r["scenario"], r["estimator"]) == (scenario, estimator)}


# ----------------------------------------------------------------------------- catalogue

def test_catalogue_names_inputs_and_formulas():
    assert len(set(MEASURE_NAMES)) == len(MEASURES) == 17
    assert MEASURE_NAMES[:3] == ("bias", "relative_bias", "empirical_se")
    for m in MEASURES:
        assert m.label and m.formula and "MCSE" in m.formula
    paired = {m.name for m in MEASURES if m.paired}
    assert paired == {"relative_efficiency", "relative_mse", "bias_diff", "mse_diff", "coverage_diff"}
    assert all("reference" in m.needs for m in MEASURES if m.paired)
    assert {m.name for m in MEASURES if "se" in m.needs} == {"model_se", "model_se_relative_error"}
    assert {m.name for m in MEASURES if "p_value" in m.needs} == {"rejection_rate"}


# ----------------------------------------------------------------------------- binomial intervals

def wald(k, n):
    p = k / n
    half = Z975 * np.sqrt(p * (1 - p) / n)
    return p - half, p + half


def wilson(k, n):
    p = k / n
    centre = (p + Z975 ** 2 / (2 * n)) / (1 + Z975 ** 2 / n)
    half = Z975 * np.sqrt(p * (1 - p) / n + Z975 ** 2 / (4 * n ** 2)) / (1 + Z975 ** 2 / n)
    return centre - half, centre + half


def score_test_p(k, n, p0):
    return 2 * stats.norm.sf(np.abs(k / n - p0) / np.sqrt(p0 * (1 - p0) / n))


@pytest.mark.parametrize("n, p", [(20, 0.15), (30, 0.5), (50, 0.02), (100, 0.1)])
def test_binomial_interval_coverage_equals_exact_binomial_sum(n, p):
    """Brown, Cai & DasGupta (2001), "Interval estimation for a binomial
    proportion", Statistical Science 16:101-133: the coverage of an interval
    for p is the exact sum over k of Binom(n, p).pmf(k) · 1{p in CI(k)}. The
    Wilson interval inverts the score test, so the score test's rejection
    rate is 1 − Wilson coverage."""
    reps = 20000
    k_all = np.arange(n + 1)
    pmf = stats.binom.pmf(k_all, n, p)
    exact = {name: float(np.sum(pmf * ((f(k_all, n)[0] <= p) & (p <= f(k_all, n)[1]))))
             for name, f in (("wald", wald), ("wilson", wilson))}
    exact_width = float(np.sum(pmf * np.diff(wald(k_all, n), axis=0)[0]))
    exact_size = float(np.sum(pmf * (score_test_p(k_all, n, p) < 0.05)))
    assert exact_size == pytest.approx(1 - exact["wilson"], abs=1e-12)

    k = np.random.default_rng([2001, n, int(p * 1000)]).binomial(n, p, reps)
    scenario = f"n{n}_p{p}"
    table = pa.concat_tables([
        arm(scenario, "wald", k / n, ci=wald(k, n)),
        arm(scenario, "wilson", k / n, ci=wilson(k, n), p_value=score_test_p(k, n, p)),
    ])
    perf = rows_of(performance_table(table, {(scenario, "wald"): p, (scenario, "wilson"): p},
                                     reference="wilson"))
    for name in ("wald", "wilson"):
        assert perf[(scenario, name, "coverage")]["n_ok"] == reps
        assert_within(perf[(scenario, name, "coverage")], exact[name])
    assert_within(perf[(scenario, "wald", "ci_width")], exact_width)
    assert_within(perf[(scenario, "wilson", "rejection_rate")], exact_size)
    # paired on the same datasets
    assert_within(perf[(scenario, "wald", "coverage_diff")], exact["wald"] - exact["wilson"])


# ----------------------------------------------------------------------------- mean vs median

def test_relative_efficiency_of_median_to_mean_is_two_over_pi():
    """Serfling (1980), Approximation Theorems of Mathematical Statistics,
    from memory: under normal data the asymptotic relative efficiency of the
    sample median to the sample mean is 2/π. The mean attains the
    Cramér-Rao bound σ²/n (Casella & Berger 2002, Statistical Inference,
    from memory), so the median's CRB efficiency is also 2/π."""
    n, reps, chunk = 1001, 20000, 2000
    rng = np.random.default_rng(1980)
    means, medians = [], []
    for _ in range(reps // chunk):
        x = rng.standard_normal((chunk, n))
        means.append(x.mean(axis=1))
        medians.append(np.median(x, axis=1))
    table = pa.concat_tables([arm("normal", "mean", np.concatenate(means)),
                              arm("normal", "median", np.concatenate(medians))])
    truth = {("normal", "mean"): 0.0, ("normal", "median"): 0.0}
    crb = {("normal", e): cramer_rao_bound(1.0, n) for e in ("mean", "median")}
    perf = rows_of(performance_table(table, truth, reference="mean", crb=crb))
    assert_within(perf[("normal", "median", "relative_efficiency")], 2 / math.pi)
    assert_within(perf[("normal", "median", "relative_mse")], 2 / math.pi)
    assert_within(perf[("normal", "median", "crb_efficiency")], 2 / math.pi)
    assert_within(perf[("normal", "mean", "crb_efficiency")], 1.0)
    # the reference is not compared with itself
    assert ("normal", "mean", "relative_efficiency") not in perf
    # 4 MCSE is sharp enough to tell 2/π from 0.6
    assert 4 * perf[("normal", "median", "relative_efficiency")]["mcse"] < 2 / math.pi - 0.6


# ----------------------------------------------------------------------------- variance divisors

def test_variance_estimators_with_divisor_c_match_closed_form_mse():
    """Casella & Berger (2002), Statistical Inference, from memory: for
    normal data S_c = Σ(x − x̄)²/c has bias σ²((n−1)/c − 1), variance
    2(n−1)σ⁴/c² and MSE σ⁴[2(n−1) + (n−1−c)²]/c²; c = n + 1 has the
    smallest MSE."""
    n, sigma, reps = 10, 2.0, 20000
    x = np.random.default_rng(2002).normal(3.0, sigma, (reps, n))
    ss = ((x - x.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
    divisors = {"c_n_minus_1": n - 1, "c_n": n, "c_n_plus_1": n + 1}
    table = pa.concat_tables([arm("normal", name, ss / c) for name, c in divisors.items()])
    truth = {("normal", name): sigma ** 2 for name in divisors}
    perf = rows_of(performance_table(table, truth, reference="c_n_minus_1"))

    def mse(c):
        return sigma ** 4 * (2 * (n - 1) + (n - 1 - c) ** 2) / c ** 2

    for name, c in divisors.items():
        assert_within(perf[("normal", name, "mse")], mse(c))
        assert_within(perf[("normal", name, "bias")], sigma ** 2 * ((n - 1) / c - 1))
        assert_within(perf[("normal", name, "relative_bias")], (n - 1) / c - 1)
        assert_within(perf[("normal", name, "empirical_se")], sigma ** 2 * math.sqrt(2 * (n - 1)) / c)
        assert_within(perf[("normal", name, "rmse")], math.sqrt(mse(c)))
    for name in ("c_n", "c_n_plus_1"):
        c = divisors[name]
        assert_within(perf[("normal", name, "mse_diff")], mse(c) - mse(n - 1))
        assert_within(perf[("normal", name, "bias_diff")], sigma ** 2 * ((n - 1) / c - 1))
        assert_within(perf[("normal", name, "relative_mse")], mse(n - 1) / mse(c))
        assert_within(perf[("normal", name, "relative_efficiency")], (c / (n - 1)) ** 2)
    # the paired difference resolves what the single MSEs cannot: c = n+1 beats c = n
    gap = mse(n) - mse(n + 1)
    assert perf[("normal", "c_n_plus_1", "mse_diff")]["value"] < perf[("normal", "c_n", "mse_diff")]["value"]
    assert 4 * perf[("normal", "c_n_plus_1", "mse_diff")]["mcse"] < gap < 4 * perf[("normal", "c_n", "mse")]["mcse"]


# ----------------------------------------------------------------------------- normal mean procedures

def test_t_and_z_procedures_for_a_normal_mean_match_closed_forms():
    """Closed forms for normal data (Casella & Berger 2002, from memory): the
    t interval covers with probability exactly `level`, its mean width is
    2·t(n−1)·c4·σ/√n with c4 = √(2/(n−1))·Γ(n/2)/Γ((n−1)/2) = E[s]/σ; the
    t test has size α and power P(|T'| > t) with T' noncentral t
    (scipy.stats.nct); E[s²/n] = σ²/n, so ModSE = σ/√n and its relative
    error is 0. A z interval around x̄ + b with known σ covers θ with
    probability Φ(z − b/τ) − Φ(−z − b/τ), τ = σ/√n, has constant width 2zτ,
    and covers mean(θ̂) ≈ θ + b with probability 0.95 (bias-eliminated)."""
    n, mu, sigma, shift, reps = 8, 5.0, 2.0, 0.9, 20000
    x = np.random.default_rng(1908).normal(mu, sigma, (reps, n))
    mean, s = x.mean(axis=1), x.std(axis=1, ddof=1)
    se, tau = s / math.sqrt(n), sigma / math.sqrt(n)
    tq = stats.t.ppf(0.975, n - 1)
    t_ci = (mean - tq * se, mean + tq * se)

    def t_test_p(null):
        return 2 * stats.t.sf(np.abs(mean - null) / se, n - 1)

    table = pa.concat_tables([
        arm("normal", "mean", mean, se=se, ci=t_ci, p_value=t_test_p(mu)),
        arm("normal", "mean_vs_4", mean, se=se, ci=t_ci, p_value=t_test_p(mu - 1)),
        arm("normal", "shifted_z", mean + shift, se=np.full(reps, tau),
            ci=(mean + shift - Z975 * tau, mean + shift + Z975 * tau)),
    ])
    truth = {("normal", e): mu for e in ("mean", "mean_vs_4", "shifted_z")}
    crb = {("normal", "mean"): cramer_rao_bound(1 / sigma ** 2, n)}
    perf = rows_of(performance_table(table, truth, crb=crb))
    c4 = math.sqrt(2 / (n - 1)) * math.exp(special.gammaln(n / 2) - special.gammaln((n - 1) / 2))
    nc = (mu - (mu - 1)) * math.sqrt(n) / sigma
    power = stats.nct.sf(tq, n - 1, nc) + stats.nct.cdf(-tq, n - 1, nc)

    assert_within(perf[("normal", "mean", "coverage")], 0.95)
    assert_within(perf[("normal", "mean", "ci_width")], 2 * tq * c4 * sigma / math.sqrt(n))
    assert_within(perf[("normal", "mean", "model_se")], tau)
    assert_within(perf[("normal", "mean", "model_se_relative_error")], 0.0)
    assert_within(perf[("normal", "mean", "empirical_se")], tau)
    assert_within(perf[("normal", "mean", "crb_efficiency")], 1.0)
    assert_within(perf[("normal", "mean", "rejection_rate")], 0.05)
    assert_within(perf[("normal", "mean_vs_4", "rejection_rate")], power)
    assert_within(perf[("normal", "shifted_z", "bias")], shift)
    assert_within(perf[("normal", "shifted_z", "relative_bias")], shift / mu)
    assert_within(perf[("normal", "shifted_z", "coverage")],
                  stats.norm.cdf(Z975 - shift / tau) - stats.norm.cdf(-Z975 - shift / tau))
    assert_within(perf[("normal", "shifted_z", "bias_eliminated_coverage")], 0.95)
    width = perf[("normal", "shifted_z", "ci_width")]
    assert width["value"] == pytest.approx(2 * Z975 * tau, rel=1e-12) and width["mcse"] < 1e-12
    # a looser level rejects at p < 0.10
    at90 = rows_of(performance_table(table, truth, level=0.90))
    assert_within(at90[("normal", "mean", "rejection_rate")], 0.10)


# ----------------------------------------------------------------------------- absence and pairing

def small_study() -> tuple[pa.Table, dict]:
    """Two scenarios, three estimators; 'bare' gives only estimates."""
    rng = np.random.default_rng(7)
    parts, truth = [], {}
    for scenario, centre in (("centred", 0.0), ("shifted", 2.0)):
        est = rng.normal(centre, 1.0, 200)
        parts += [arm(scenario, "full", est, se=np.ones(200), ci=(est - 2, est + 2), p_value=np.full(200, 0.5)),
                  arm(scenario, "bare", est + rng.normal(0, 0.5, 200)),
                  arm(scenario, "other", 0.9 * est + rng.normal(0, 0.3, 200), ci=(est - 1, est + 1))]
        truth.update({(scenario, e): centre for e in ("full", "bare", "other")})
    return pa.concat_tables(parts), truth


def test_missing_inputs_give_no_rows_never_zero():
    """Common practice (Morris, White & Crowther 2019, Table 6 lists what each measure needs)."""
    table, truth = small_study()
    perf = performance_table(table, truth)
    unpaired = {"bias", "empirical_se", "mse", "rmse"}
    assert measures_of(perf, "shifted", "bare") == unpaired | {"relative_bias"}
    assert measures_of(perf, "centred", "bare") == unpaired            # truth 0: no relative bias
    assert measures_of(perf, "shifted", "full") == set(MEASURE_NAMES[:11])
    assert measures_of(perf, "shifted", "other") == unpaired | {
        "relative_bias", "coverage", "bias_eliminated_coverage", "ci_width"}
    assert not any(m.paired for m in MEASURES if m.name in set(perf["measure"].to_pylist()))

    with_ref = performance_table(table, truth, reference="full",
                                 crb={("shifted", "bare"): 0.25})
    assert not {m.name for m in MEASURES if m.paired} & measures_of(with_ref, "shifted", "full")
    paired = {"relative_efficiency", "relative_mse", "bias_diff", "mse_diff"}
    assert measures_of(with_ref, "shifted", "bare") == unpaired | {"relative_bias", "crb_efficiency"} | paired
    assert measures_of(with_ref, "centred", "bare") == unpaired | paired
    assert measures_of(with_ref, "centred", "other") >= paired | {"coverage_diff"}


def test_rows_are_sorted_and_deterministic():
    table, truth = small_study()
    first = performance_table(table, truth, reference="full")
    assert first.schema == PERFORMANCE_SCHEMA
    order = {m: i for i, m in enumerate(MEASURE_NAMES)}
    keys = [(r["scenario"], r["estimator"], order[r["measure"]]) for r in first.to_pylist()]
    assert keys == sorted(keys)
    again = performance_table(table.take(np.random.default_rng(3).permutation(table.num_rows)),
                              truth, reference="full")
    assert printed(again) == printed(first)


def test_paired_measures_use_only_replicates_where_both_are_ok():
    """Morris, White & Crowther (2019), section 5.2: comparisons between
    methods use the replicates where both gave a result."""
    rng = np.random.default_rng(11)
    ref_est, j_est = rng.normal(0, 1, 500), rng.normal(0, 2, 500)
    ref_status = np.where(np.arange(500) < 10, "error", "ok")                     # reps 0-9 fail
    j_status = np.where((np.arange(500) >= 5) & (np.arange(500) < 20), "nonfinite", "ok")  # reps 5-19
    keep = np.arange(400)                                                        # j lacks reps 400-499
    table = pa.concat_tables([arm("s", "ref", ref_est, status=ref_status),
                              arm("s", "j", j_est[keep], status=j_status[keep], rep=keep)])
    perf = rows_of(performance_table(table, {("s", "ref"): 0.0, ("s", "j"): 0.0}, reference="ref"))
    both = np.arange(20, 400)
    for name in ("relative_efficiency", "relative_mse", "bias_diff", "mse_diff"):
        assert perf[("s", "j", name)]["n_ok"] == len(both)
        assert perf[("s", "j", name)]["n_failed"] == 500 - len(both)
    assert perf[("s", "j", "bias")]["n_ok"] == 385 and perf[("s", "j", "bias")]["n_failed"] == 15
    assert perf[("s", "ref", "bias")]["n_ok"] == 490
    expected = np.var(ref_est[both], ddof=1) / np.var(j_est[both], ddof=1)
    assert perf[("s", "j", "relative_efficiency")]["value"] == pytest.approx(expected, rel=1e-10)
    diff = j_est[both] - ref_est[both]
    assert perf[("s", "j", "bias_diff")]["value"] == pytest.approx(diff.mean(), rel=1e-10)
    assert perf[("s", "j", "bias_diff")]["mcse"] == pytest.approx(diff.std(ddof=1) / math.sqrt(len(both)), rel=1e-10)


def test_compute_performance_reads_named_relations():
    table, truth = small_study()
    con = duckdb.connect()
    con.register("est", table)
    con.execute("CREATE TABLE tr (scenario VARCHAR, estimator VARCHAR, truth DOUBLE)")
    con.executemany("INSERT INTO tr VALUES (?, ?, ?)", [[s, e, t] for (s, e), t in truth.items()])
    con.execute("CREATE TABLE bounds AS SELECT 'shifted' AS scenario, 'full' AS estimator, 0.5 AS crb")
    perf = compute_performance(con, "est", "tr", reference="full", crb="bounds")
    assert printed(perf) == printed(performance_table(table, truth, reference="full",
                                                      crb={("shifted", "full"): 0.5}))
    assert ("shifted", "full", "crb_efficiency") in rows_of(perf)


# ----------------------------------------------------------------------------- bad inputs

@pytest.mark.parametrize("kwargs, parameter", [
    ({"level": 1.5}, "level"),
    ({"level": 0}, "level"),
    ({"reference": "nobody"}, "reference"),
    ({"crb": {("shifted", "full"): -1.0}}, "crb"),
    ({"crb": {("shifted", "full"): 0.0}}, "crb"),
    ({"crb": {"shifted": 1.0}}, "crb"),
])
def test_bad_arguments_raise_value_error_naming_the_parameter(kwargs, parameter):
    table, truth = small_study()
    with pytest.raises(ValueError, match=f"`{parameter}"):
        performance_table(table, truth, **kwargs)


def test_bad_relations_raise_value_error():
    table, truth = small_study()
    with pytest.raises(ValueError, match="`estimates`.*rep"):
        performance_table(table.drop_columns(["rep"]), truth, reference="full")
    with pytest.raises(ValueError, match="`estimates`.*status"):
        performance_table(table.drop_columns(["status"]), truth)
    con = duckdb.connect()
    con.register("est", table.drop_columns(["p_value"]))
    con.register("tr", pa.table({"scenario": ["a", "a"], "estimator": ["x", "x"], "truth": [0.0, 1.0]}))
    with pytest.raises(ValueError, match="`estimates`.*p_value"):
        compute_performance(con, "est", "tr")
    con.register("est", table)
    with pytest.raises(ValueError, match="`truth`.*more than one row"):
        compute_performance(con, "est", "tr")
    with pytest.raises(ValueError, match="`fisher_information`"):
        cramer_rao_bound(0.0, 10)
    with pytest.raises(ValueError, match="`n`"):
        cramer_rao_bound(1.0, 0)


def test_one_pass_gives_the_same_performance_and_checks():
    # performance_and_checks (used by ingest) must equal the two separate functions.
    import duckdb
    from estbench.analyse.measures import compute_checks, compute_performance, performance_and_checks
    rng = np.random.default_rng(5)
    reps = 600
    est = rng.normal(1.0, 0.3, size=(2, reps))
    table = pa.table({
        "scenario": ["s"] * (2 * reps), "estimator": ["a"] * reps + ["b"] * reps,
        "block": np.tile(np.arange(reps) // 50, 2), "rep": np.tile(np.arange(reps), 2),
        "estimate": est.ravel(), "se": np.full(2 * reps, 0.3),
        "ci_low": est.ravel() - 0.59, "ci_high": est.ravel() + 0.59,
        "p_value": pa.nulls(2 * reps, pa.float64()), "status": ["ok"] * (2 * reps)})
    truth = pa.table({"scenario": ["s", "s"], "estimator": ["a", "b"], "truth": [1.0, 1.0]})
    con = duckdb.connect()
    con.register("e", table)
    con.register("t", truth)
    targets = {"bias": 0.01, "coverage": 0.02}
    perf, checks = performance_and_checks(con, "e", "t", targets, reference="a")
    for one_pass, separate in [(perf, compute_performance(con, "e", "t", reference="a")),
                               (checks, compute_checks(con, "e", "t", targets, reference="a"))]:
        assert one_pass.schema == separate.schema and one_pass.num_rows == separate.num_rows
        for name in one_pass.column_names:
            a, b = one_pass[name].to_pylist(), separate[name].to_pylist()
            if one_pass.schema.field(name).type == pa.float64():  # DuckDB may sum in another order
                np.testing.assert_allclose(np.array(a, float), np.array(b, float), rtol=1e-12)
            else:
                assert a == b, name
    assert checks.num_rows == 2 * 2 + 2  # two targets per estimator, one block test each
