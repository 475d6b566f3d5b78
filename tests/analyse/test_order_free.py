"""Every measure is a function of the set of estimates, not of the order rows reach the store.

Floating-point sums depend on their order (common practice; IEEE 754 addition
is not associative). These checks feed the same estimates in different orders,
thread counts and batch boundaries and ask for the same bits; identical
estimators must compare exactly; and the sums must still agree with numpy's
own mean and variance (a general-purpose reference) to rounding.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest

from estbench.analyse import block_sums
from estbench.analyse.measures import jackknife_table, performance_and_checks, performance_table
from test_measures_catalogue import arm, rows_of

PAIRED = ("relative_efficiency", "relative_mse", "bias_diff", "mse_diff", "coverage_diff")


def _study_estimates(seed: int = 11) -> tuple[pa.Table, pa.Table]:
    """Three scenarios x four estimators x 30 seed blocks of 20 replicates, with failures,
    NaN, missing intervals and p-values: every path of the sums."""
    rng = np.random.default_rng(seed)
    reps = 600
    parts, truths = [], []
    for s, (scenario, loc, scale) in enumerate([("s_a", 10.0, 0.5), ("s_b", 1e6, 1.0), ("s_c", -3.0, 4.0)]):
        data = loc + scale * rng.standard_normal((reps, 8))
        mean, median = data.mean(axis=1), np.median(data, axis=1)
        se = data.std(axis=1, ddof=1) / np.sqrt(8)
        for name, est, has_ci in (("mean", mean, True), ("median", median, False),
                                  ("midrange", (data.min(axis=1) + data.max(axis=1)) / 2, True),
                                  ("jittered", mean + 1e-3 * rng.standard_normal(reps), True)):
            status = np.where(rng.random(reps) < 0.03, "failed", "ok")
            est = np.where(status == "ok", est, np.nan)
            if name == "midrange":
                est[rng.random(reps) < 0.01] = np.inf          # 'ok' but not finite: not used
            lo, hi = (est - 2.36 * se, est + 2.36 * se) if has_ci else (None, None)
            parts.append(arm(scenario, name, est, se=se if has_ci else None, ci=None if lo is None else (lo, hi),
                             p_value=rng.random(reps) if has_ci else None, block_size=20, status=status))
            truths.append((scenario, name, loc))
    truth = pa.table({"scenario": [t[0] for t in truths], "estimator": [t[1] for t in truths],
                      "truth": [t[2] for t in truths]})
    return pa.concat_tables(parts), truth


def _csv_bytes(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pacsv.write_csv(table, sink)
    return sink.getvalue().to_pybytes()


@pytest.fixture(scope="module")
def estimates_and_truth():
    return _study_estimates()


@pytest.mark.parametrize("order, threads, batch_rows", [
    ("reversed", 1, None), ("shuffled", 2, None), ("shuffled", 1, 37), ("by estimator", 2, 1000),
])
def test_any_row_order_threads_and_batches_give_the_same_bits(estimates_and_truth, monkeypatch, order,
                                                              threads, batch_rows):
    estimates, truth = estimates_and_truth
    expected = _measures_of(estimates, truth, threads=2)
    n = estimates.num_rows
    index = {"reversed": np.arange(n)[::-1], "shuffled": np.random.default_rng(3).permutation(n),
             "by estimator": np.argsort(estimates["estimator"].to_numpy(zero_copy_only=False), kind="stable")}[order]
    if batch_rows:   # cut DuckDB's stream into small batches: blocks straddle batch boundaries
        monkeypatch.setattr(block_sums, "BATCH_ROWS", batch_rows)
    got = _measures_of(estimates.take(index), truth.take(np.arange(truth.num_rows)[::-1]), threads=threads)
    assert got[0] == expected[0]
    assert got[1] == expected[1]
    assert got[0].count(b"\n") == 157 and got[1].count(b"\n") > 12   # the whole tables


def _measures_of(estimates: pa.Table, truth: pa.Table, threads: int) -> tuple[bytes, bytes]:
    """performance.csv and checks.csv bytes from a DuckDB connection with *threads* threads."""
    con = duckdb.connect(config={"threads": threads})
    try:
        con.register("estimates", estimates)
        con.register("truth", truth)
        performance, checks = performance_and_checks(con, "estimates", "truth", {"bias": 0.01, "coverage": 0.01},
                                                     reference="mean")
        return _csv_bytes(performance), _csv_bytes(checks)
    finally:
        con.close()


def test_identical_estimators_compare_exactly():
    # the same numbers under two names, failures on the same replicates
    rng = np.random.default_rng(8)
    est = 1e6 + rng.standard_normal(1000)        # a large mean: the hardest case for rounding
    status = np.where(rng.random(1000) < 0.05, "failed", "ok")
    est = np.where(status == "ok", est, np.nan)
    ci = (est - 1.96, est + 1.96)
    table = pa.concat_tables([arm("s", name, est, ci=ci, block_size=50, status=status, se=np.ones(1000))
                              for name in ("mean", "same_mean")])
    truth = {("s", "mean"): 1e6, ("s", "same_mean"): 1e6}
    rows = rows_of(performance_table(table, truth, reference="mean"))
    for measure, value in [("relative_efficiency", 1.0), ("relative_mse", 1.0), ("bias_diff", 0.0),
                           ("mse_diff", 0.0), ("coverage_diff", 0.0)]:
        row = rows[("s", "same_mean", measure)]
        assert (row["value"], row["mcse"]) == (value, 0.0), row
        assert row["n_ok"] == int((status == "ok").sum())
    con = duckdb.connect()
    con.register("estimates", table)
    con.register("truth", pa.table({"scenario": ["s", "s"], "estimator": ["mean", "same_mean"],
                                    "truth": [1e6, 1e6]}))
    jack = {(r["estimator"], r["measure"]): r for r in jackknife_table(con, reference="mean").to_pylist()}
    assert jack[("same_mean", "relative_efficiency")]["mcse_jackknife"] == 0.0
    assert jack[("same_mean", "relative_mse")]["mcse_jackknife"] == 0.0


def test_estimators_equal_but_for_the_last_bits_have_no_monte_carlo_error():
    # a mean and the same mean summed in another order differ in the last bit of some
    # estimates; the correlation is 1 up to rounding, so the MCSE of RE is 0, not ~1e-9
    rng = np.random.default_rng(9)
    data = 10 + 0.5 * rng.standard_normal((2000, 5))
    mean = data.mean(axis=1)
    reordered = np.sort(data, axis=1)[:, ::-1].sum(axis=1) / 5
    assert 0 < np.sum(mean != reordered) < 2000          # some, not all, differ in the last bits
    table = pa.concat_tables([arm("s", "mean", mean), arm("s", "reordered", reordered)])
    rows = rows_of(performance_table(table, {("s", "mean"): 10.0, ("s", "reordered"): 10.0}, reference="mean"))
    row = rows[("s", "reordered", "relative_efficiency")]
    assert row["value"] == pytest.approx(1.0, abs=1e-12) and row["mcse"] == 0.0


def test_sums_agree_with_numpy_to_rounding(estimates_and_truth):
    # numpy's mean and var(ddof=1) over the usable replicates of each group
    estimates, truth = estimates_and_truth
    rows = rows_of(performance_table(estimates, truth, reference="mean"))
    est = estimates["estimate"].to_numpy(zero_copy_only=False)
    ok = (estimates["status"].to_numpy(zero_copy_only=False) == "ok") & np.isfinite(est)
    scen = estimates["scenario"].to_numpy(zero_copy_only=False)
    name = estimates["estimator"].to_numpy(zero_copy_only=False)
    rep = estimates["rep"].to_numpy()
    checked = 0
    for s, e, theta in zip(*(truth[c].to_pylist() for c in ("scenario", "estimator", "truth"))):
        x = est[ok & (scen == s) & (name == e)]
        err = x - theta
        assert rows[(s, e, "bias")]["value"] == pytest.approx(err.mean(), rel=1e-12, abs=1e-12)
        assert rows[(s, e, "empirical_se")]["value"] == pytest.approx(err.std(ddof=1), rel=1e-12)
        assert rows[(s, e, "mse")]["value"] == pytest.approx((err ** 2).mean(), rel=1e-12)
        if e != "mean":
            r_sel = ok & (scen == s) & (name == "mean")
            j_sel = ok & (scen == s) & (name == e)
            both = np.intersect1d(rep[r_sel], rep[j_sel])
            xr = est[r_sel][np.isin(rep[r_sel], both)]
            xj = est[j_sel][np.isin(rep[j_sel], both)]
            row = rows[(s, e, "relative_efficiency")]
            assert row["n_ok"] == len(both)
            assert row["value"] == pytest.approx(xr.var(ddof=1) / xj.var(ddof=1), rel=1e-10)
            rho = np.corrcoef(xj, xr)[0, 1]
            ratio = row["value"]
            assert row["mcse"] == pytest.approx(2 * ratio * np.sqrt((1 - rho ** 2) / (len(both) - 1)), rel=1e-6)
        checked += 1
    assert checked == 12


def test_no_rows_gives_empty_tables():
    empty = arm("s", "mean", np.zeros(0))
    assert performance_table(empty, {("s", "mean"): 0.0}, reference="mean").num_rows == 0
