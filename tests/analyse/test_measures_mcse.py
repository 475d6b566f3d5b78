"""Monte Carlo standard errors, the seed-block jackknife, the checks and the
replicate planning, against results the project did not write.

Each check names its source; fixed seeds keep every test deterministic.
"""

from __future__ import annotations

import math

import duckdb
import numpy as np
import pyarrow as pa
import pytest
from scipy import stats

from estbench.analyse.mcse import Blocks, block_heterogeneity, jackknife_se, replicates_needed
from estbench.analyse.measures import compute_checks, jackknife_table, plan_replicates, performance_table
from test_measures_catalogue import Z975, arm, rows_of


def connection(estimates: pa.Table, truth: dict) -> duckdb.DuckDBPyConnection:
    """An in-memory DuckDB holding the relations `estimates` and `truth`."""
    con = duckdb.connect()
    con.register("estimates", estimates)
    con.register("truth", pa.table({"scenario": [k[0] for k in truth], "estimator": [k[1] for k in truth],
                                    "truth": [float(v) for v in truth.values()]}))
    return con


def mean_and_median(rng, reps: int, n: int, mu: float = 1.0, *, scenario="s", block_size=20,
                    null: float | None = None) -> tuple[pa.Table, dict]:
    """Normal data; the mean (t interval, t test) and the median (normal-theory
    SE √(π/2)·s/√n, z interval and z test), both testing H0: μ = *null*."""
    x = rng.normal(mu, 1.0, (reps, n))
    mean, median, s = x.mean(axis=1), np.median(x, axis=1), x.std(axis=1, ddof=1)
    null = mu if null is None else null
    se_mean, se_median = s / math.sqrt(n), math.sqrt(math.pi / 2) * s / math.sqrt(n)
    tq = stats.t.ppf(0.975, n - 1)
    table = pa.concat_tables([
        arm(scenario, "mean", mean, se=se_mean, ci=(mean - tq * se_mean, mean + tq * se_mean),
            p_value=2 * stats.t.sf(np.abs(mean - null) / se_mean, n - 1), block_size=block_size),
        arm(scenario, "median", median, se=se_median, ci=(median - Z975 * se_median, median + Z975 * se_median),
            p_value=2 * stats.norm.sf(np.abs(median - null) / se_median), block_size=block_size),
    ])
    names = np.unique(np.asarray(table["scenario"].to_pylist(), object))
    truth = {(sc, e): mu for sc in names for e in ("mean", "median")}
    return table, truth


# ----------------------------------------------------------------------------- formula MCSE

REPEATED = ("bias", "relative_bias", "empirical_se", "model_se", "model_se_relative_error", "mse", "rmse", "coverage",
            "bias_eliminated_coverage", "ci_width", "rejection_rate", "crb_efficiency")
REPEATED_PAIRED = ("relative_efficiency", "relative_mse", "bias_diff", "mse_diff", "coverage_diff")


def test_mcse_equals_spread_of_each_measure_across_repeated_studies():
    """Morris, White & Crowther (2019), Statistics in Medicine 38:2074-2102,
    Table 6: the MCSE estimates the SD of a measure over repetitions of the
    whole study. Repeat a 400-replicate study 500 times with independent
    datasets (each repeat its own scenario) and compare the SD across repeats
    with the mean MCSE; the SD itself is uncertain by 1/√(2·499) ≈ 3 %, so
    the 15 % tolerance is about 4.7 of its SEs. rmse and relative_mse use the
    20-block jackknife."""
    repeats, reps, n = 500, 400, 21
    scenario = np.repeat(np.array([f"r{i:03d}" for i in range(repeats)], object), reps)
    rng = np.random.default_rng(2019)
    table, truth = mean_and_median(rng, repeats * reps, n, scenario=scenario, block_size=20)
    crb = {key: 1.0 / n for key in truth}
    perf = performance_table(table, truth, reference="mean", crb=crb).to_pylist()
    ratios = {}
    for estimator, names in (("mean", REPEATED), ("median", REPEATED + REPEATED_PAIRED)):
        for name in names:
            rows = [r for r in perf if r["estimator"] == estimator and r["measure"] == name]
            assert len(rows) == repeats
            values = np.array([r["value"] for r in rows])
            mcse = np.array([r["mcse"] for r in rows])
            ratios[(estimator, name)] = values.std(ddof=1) / mcse.mean()
    bad = {k: round(v, 3) for k, v in ratios.items() if abs(v - 1) > 0.15}
    assert not bad, bad


# ----------------------------------------------------------------------------- jackknife

def test_block_jackknife_agrees_with_formula_mcse():
    """Koehler, Brown & Haneuse (2009), The American Statistician 63:155-162:
    the jackknife estimates the same Monte Carlo SE as a closed form where
    one exists. With 400 seed blocks the jackknife SE is uncertain by about
    1/√(2·399) ≈ 3.5 %; agreement within 15 % (≈ 4 of those) is required.
    For rmse and relative_mse the formula column is the delta method."""
    table, truth = mean_and_median(np.random.default_rng(2009), 10000, 21, block_size=25)
    jk = jackknife_table(connection(table, truth), reference="mean").to_pylist()
    seen = set()
    for row in jk:
        assert row["n_blocks"] == 400
        assert row["mcse_jackknife"] == pytest.approx(row["mcse_formula"], rel=0.15), row
        seen.add((row["estimator"], row["measure"]))
    assert seen == {(e, m) for e in ("mean", "median") for m in ("bias", "empirical_se", "mse", "rmse")} | {
        ("median", "relative_efficiency"), ("median", "relative_mse")}


def test_jackknife_with_one_replicate_per_block_is_the_classical_se():
    """Efron & Tibshirani (1993), An Introduction to the Bootstrap, ch. 11,
    from memory: the delete-one jackknife SE of a mean equals s/√n exactly."""
    table, truth = mean_and_median(np.random.default_rng(1993), 3000, 5, block_size=1)
    jk = rows_of(jackknife_table(connection(table, truth)))
    for estimator in ("mean", "median"):
        for name in ("bias", "mse"):
            row = jk[("s", estimator, name)]
            assert row["n_blocks"] == 3000
            assert row["mcse_jackknife"] == pytest.approx(row["mcse_formula"], rel=1e-9)


def test_leave_one_block_out_algebra_matches_deleting_each_block():
    """Definition of the delete-a-group jackknife (Koehler, Brown & Haneuse
    2009, section 3): recompute the statistic without each block. Blocks of
    unequal size and a large common mean test the centred sums."""
    rng = np.random.default_rng(5)
    sizes = np.array([7, 3, 9, 1, 6, 12, 4])
    block = np.repeat(np.arange(len(sizes)), sizes)
    x = 1e6 + rng.normal(0, 1, block.size)
    y = 1e6 + 0.5 * x + rng.normal(0, 1, block.size)
    means = lambda v: np.array([v[block == k].mean() for k in range(len(sizes))])  # noqa: E731
    within = lambda v: np.array([((v[block == k] - v[block == k].mean()) ** 2).sum()  # noqa: E731
                                 for k in range(len(sizes))])
    blocks = Blocks(np.zeros(len(sizes), int), sizes.astype(float), 1)
    ratio_loo = blocks.leave_one_out_comoment(means(y), means(y), within(y)) / \
        blocks.leave_one_out_comoment(means(x), means(x), within(x))
    brute = np.array([np.var(y[block != k], ddof=1) / np.var(x[block != k], ddof=1) for k in range(len(sizes))])
    np.testing.assert_allclose(ratio_loo, brute, rtol=1e-9)
    k = len(sizes)
    expected = math.sqrt((k - 1) / k * ((brute - brute.mean()) ** 2).sum())
    assert jackknife_se(blocks, ratio_loo)[0] == pytest.approx(expected, rel=1e-9)
    np.testing.assert_allclose(blocks.leave_one_out_mean(means(x)) - 1e6,
                               [x[block != j].mean() - 1e6 for j in range(k)], rtol=1e-7)


# ----------------------------------------------------------------------------- planning

def test_morris_coverage_example_needs_1900_replicates():
    """Morris, White & Crowther (2019), section 5.3: for 95 % coverage and a
    target MCSE of 0.5 percentage points, n_sim = 0.95·0.05/0.005² = 1900;
    the worst case C = 0.5 needs 0.25/0.005² = 10000."""
    assert replicates_needed("coverage", 0.005, proportion=0.95) == 1900
    assert replicates_needed("coverage", 0.005) == 10000
    # the same from a pilot of 2000 replicates of which 1900 cover, and 100 more that failed
    covers = np.arange(2100) < 1900
    status = np.where(np.arange(2100) < 2000, "ok", "error")
    lo = np.where(covers, -1.0, 1.0)
    table = arm("lab", "assay", np.zeros(2100), ci=(lo, lo + 2.0), status=status)
    plan = rows_of(plan_replicates(connection(table, {("lab", "assay"): 0.0}), targets={"coverage": 0.005}))
    row = plan[("lab", "assay", "coverage")]
    assert (row["value"], row["n_ok"], row["n_failed"]) == (pytest.approx(0.95), 2000, 100)
    assert row["n_needed"] == 1900
    assert row["n_to_run"] == math.ceil(1900 * 2100 / 2000)


def test_worst_case_planning_for_error_measures_matches_a_pilot():
    """Var/target² (Morris, White & Crowther 2019, section 5.3) with the
    moments of a normal error N(b, sd²): var(e) = sd², var(e²) = 2sd⁴ +
    4b²sd² (common practice). A 20000-replicate pilot's plan agrees within
    10 % (its sample variance of e² is uncertain by about 3 %)."""
    sd, bias = 0.3, 0.2
    targets = {"bias": 0.004, "mse": 0.002, "rmse": 0.003, "empirical_se": 0.003}
    e = np.random.default_rng(55).normal(bias, sd, 20000)
    plan = rows_of(plan_replicates(connection(arm("s", "e", e, block_size=50), {("s", "e"): 0.0}),
                                   targets=targets))
    for name, target in targets.items():
        before = replicates_needed(name, target, sd=sd, bias=bias)
        assert plan[("s", "e", name)]["n_needed"] == pytest.approx(before, rel=0.10), name
    assert replicates_needed("bias", 0.01, sd=1.0) == 10000
    n = replicates_needed("empirical_se", 0.01, sd=1.0)
    assert 1.0 / math.sqrt(2 * (n - 1)) <= 0.01 < 1.0 / math.sqrt(2 * (n - 2))


# ----------------------------------------------------------------------------- checks

def test_checks_compare_mcse_with_targets():
    table, truth = mean_and_median(np.random.default_rng(8), 2000, 15, block_size=100)
    checks = compute_checks(connection(table, truth), targets={"bias": 0.01, "coverage": 0.002}).to_pylist()
    perf = rows_of(performance_table(table, truth))
    targeted = [r for r in checks if r["check"] == "mcse_target"]
    assert len(targeted) == 4
    for r in targeted:
        mcse = perf[(r["scenario"], r["estimator"], r["measure"])]["mcse"]
        assert r["statistic"] == pytest.approx(mcse)
        assert r["passed"] == (mcse <= r["limit"])
        assert r["n_needed"] == math.ceil(2000 * (mcse / r["limit"]) ** 2 - 1e-6)
    assert {r["measure"]: r["passed"] for r in targeted} == {"bias": True, "coverage": False}
    coverage = next(r for r in targeted if r["measure"] == "coverage" and r["estimator"] == "mean")
    c = perf[("s", "mean", "coverage")]["value"]
    assert coverage["n_needed"] == math.ceil(c * (1 - c) / 0.002 ** 2 - 1e-6)


def test_block_heterogeneity_statistic_is_k_minus_1_times_anova_f():
    """The statistic Σ m_k(ē_k − ē)²/s²_within equals (K − 1)·F of one-way
    ANOVA; scipy.stats.f_oneway is the reference. Unequal blocks come from
    failed replicates."""
    rng = np.random.default_rng(1954)
    est = rng.normal(0, 1, 1000)
    status = np.where(rng.random(1000) < 0.1, "error", "ok")
    table = arm("s", "e", est, status=status, block_size=50)
    row = next(r for r in compute_checks(connection(table, {("s", "e"): 0.0}), targets={}).to_pylist()
               if r["check"] == "block_heterogeneity")
    groups = [est[(np.arange(1000) // 50 == k) & (status == "ok")] for k in range(20)]
    f = stats.f_oneway(*groups).statistic
    assert row["df"] == 19 and row["n_ok"] == (status == "ok").sum()
    assert row["statistic"] == pytest.approx(19 * f, rel=1e-9)
    assert row["p_value"] == pytest.approx(stats.chi2.sf(19 * f, 19), rel=1e-9)


def test_block_heterogeneity_is_calibrated_and_flags_a_broken_block():
    """Under one common distribution Q is χ² on K − 1 df (Cochran 1954,
    Biometrics 10:101-129), so 5 % of 400 homogeneous groups have p < 0.05,
    within 4 binomial MCSE. A block of 25 whose estimates are shifted by 1.5
    SD (a stream or shard problem; 7.5 SE of its mean) is flagged."""
    groups, blocks, m = 400, 20, 25
    rng = np.random.default_rng(1029)
    reps = blocks * m
    scenario = np.repeat(np.array([f"g{i:03d}" for i in range(groups)], object), reps)
    est = rng.normal(0, 1, groups * reps)
    est[(scenario == "g007") & (np.tile(np.arange(reps), groups) // m == 3)] += 1.5
    table = arm(scenario, "e", est, block_size=m)
    truth = {(f"g{i:03d}", "e"): 0.0 for i in range(groups)}
    checks = [r for r in compute_checks(connection(table, truth), targets={}, heterogeneity_alpha=0.001).to_pylist()
              if r["check"] == "block_heterogeneity"]
    assert len(checks) == groups
    broken = next(r for r in checks if r["scenario"] == "g007")
    assert broken["p_value"] < 1e-6 and broken["passed"] is False
    p = np.array([r["p_value"] for r in checks if r["scenario"] != "g007"])
    share = (p < 0.05).mean()
    assert abs(share - 0.05) <= 4 * math.sqrt(0.05 * 0.95 / len(p))
    assert all(r["passed"] == (r["p_value"] >= 0.001) for r in checks)


# ----------------------------------------------------------------------------- bad inputs

@pytest.mark.parametrize("targets, message", [
    ({"bais": 0.01}, r"`targets`: 'bais' is not a measure"),
    ({"bias": 0.0}, r"`targets\['bias'\]` must be a positive number, got 0.0"),
    ({"coverage": -0.01}, r"`targets\['coverage'\]`"),
    ({"mse": float("nan")}, r"`targets\['mse'\]`"),
    ({"mse": True}, r"`targets\['mse'\]`"),
    ([("bias", 0.1)], r"`targets` must be a mapping"),
])
def test_bad_targets_raise_value_error_naming_the_parameter(targets, message):
    table, truth = mean_and_median(np.random.default_rng(0), 100, 5)
    con = connection(table, truth)
    for function in (compute_checks, plan_replicates):
        with pytest.raises(ValueError, match=message):
            function(con, targets=targets)


@pytest.mark.parametrize("args, kwargs, parameter", [
    (("model_se", 0.01), {}, "measure"),
    (("coverage", 0.0), {}, "target"),
    (("coverage", 0.01), {"proportion": 1.0}, "proportion"),
    (("bias", 0.01), {}, "sd"),
    (("mse", 0.01), {"sd": -1.0}, "sd"),
    (("mse", 0.01), {"sd": 1.0, "bias": float("inf")}, "bias"),
])
def test_bad_planning_inputs_raise_value_error_naming_the_parameter(args, kwargs, parameter):
    with pytest.raises(ValueError, match=f"`{parameter}`"):
        replicates_needed(*args, **kwargs)


def test_bad_heterogeneity_alpha_raises():
    table, truth = mean_and_median(np.random.default_rng(0), 100, 5)
    with pytest.raises(ValueError, match="`heterogeneity_alpha`"):
        compute_checks(connection(table, truth), targets={}, heterogeneity_alpha=0.0)


def test_heterogeneity_is_undefined_with_one_block():
    blocks = Blocks(np.zeros(1, int), np.array([50.0]), 1)
    het = block_heterogeneity(blocks, np.array([0.1]), np.array([1.0]))
    assert np.isnan(het.statistic[0]) and np.isnan(het.p_value[0])
    assert np.isnan(jackknife_se(blocks, np.array([0.1]))[0])
