"""External checks of the shortcuts that keep the built-in estimators at numpy speed.

The median, the trimmed and the Winsorized mean take every order statistic
they need from one partition of each row; the mean and the SD take one sum of
squared deviations; t, normal and chi-square quantiles and tails come straight
from scipy.special. Each check below holds a shortcut to the library function
it stands in for: numpy.median and numpy.var bit for bit, scipy.stats.trim_mean,
scipy.stats.mstats.trimmed_mean_ci, scipy.stats.t / norm / chi2 (bit for bit,
being the same scipy.special calls), scipy.stats.ttest_1samp and
scipy.stats.binomtest. Blocks include rows with a NaN, infinities and ties.
"""

import sys

import numpy as np
import pytest
from scipy import stats
from scipy.stats import mstats

from estbench.core.bundled import BUILTIN_ESTIMATORS

sys.path.insert(0, str(BUILTIN_ESTIMATORS))
import _inference  # noqa: E402
import location  # noqa: E402
import scale  # noqa: E402

SIZES = [1, 2, 5, 6, 10, 11, 50, 1000]


def _block(n, seed=0):
    """Heavy-tailed rows, then rows with a NaN, +inf, both infinities, ties and one repeated value."""
    rng = np.random.default_rng([seed, n])
    x = rng.standard_t(3, size=(12, n)) + 0.2
    x[1, n // 2] = np.nan
    x[2, 0] = np.inf
    x[3, :2] = [np.inf, -np.inf][:n]
    x[4] = np.round(x[4])
    x[5] = 1.5
    return x


def _same_bits(actual, expected):
    """Equal NaN pattern and identical bits elsewhere (so -0.0 differs from 0.0)."""
    actual, expected = np.asarray(actual, dtype=float), np.asarray(expected, dtype=float)
    np.testing.assert_array_equal(np.isnan(actual), np.isnan(expected))
    keep = ~np.isnan(expected)
    np.testing.assert_array_equal(actual[keep].view(np.int64), expected[keep].view(np.int64))


# ---------------------------------------------------------------- median
@pytest.mark.parametrize("n", SIZES)
def test_median_estimate_is_numpy_median_bit_for_bit(n):
    """numpy.median, odd and even n; NaN for the row holding a NaN, as numpy gives."""
    x = _block(n)
    with np.errstate(invalid="ignore"):
        _same_bits(location.median(x)["estimate"], np.median(x, axis=1))


@pytest.mark.parametrize("n", [6, 10, 11, 50, 1000])
@pytest.mark.parametrize("level", [0.95, 0.8])
def test_median_interval_is_the_order_statistics_the_binomial_law_picks(n, level):
    """[x_(k), x_(n+1-k)], k the largest with 1 - 2 B(k-1) >= level, B the Binomial(n, 1/2)
    cdf from scipy.stats.binom (order-statistic interval, e.g. Conover, Practical
    Nonparametric Statistics, from memory); order statistics from numpy.sort."""
    x = _block(n)[6:]                               # rows without NaN or ties
    cdf = stats.binom.cdf(np.arange(n + 1), n, 0.5)
    k = max(j for j in range(1, n + 1) if 1 - 2 * cdf[j - 1] >= level)
    out = location.median(x, level=level)
    ordered = np.sort(x, axis=1)
    np.testing.assert_array_equal(out["ci_low"], ordered[:, k - 1])
    np.testing.assert_array_equal(out["ci_high"], ordered[:, n - k])


@pytest.mark.parametrize("n", [5, 11, 50, 1000])
def test_median_sign_test_agrees_with_binomtest_at_several_n(n):
    """scipy.stats.binomtest(#{x > null_value}, n, 1/2), two-sided, on rows without ties."""
    x = _block(n, seed=1)[6:]
    out = location.median(x, null_value=0.1)
    ref = [stats.binomtest(int((row > 0.1).sum()), n, 0.5).pvalue for row in x]
    np.testing.assert_allclose(out["p_value"], ref, rtol=1e-12)


# ---------------------------------------------------------------- trimmed and Winsorized means
@pytest.mark.parametrize("n", SIZES)
@pytest.mark.parametrize("proportion", [0.0, 0.1, 0.2, 0.45])
def test_trimmed_mean_estimate_matches_scipy_trim_mean(n, proportion):
    """scipy.stats.trim_mean to rounding, including its NaN for a row holding a NaN."""
    x = _block(n)
    with np.errstate(invalid="ignore"):
        out = location.trimmed_mean(x, proportion=proportion)
        ref = stats.trim_mean(x, proportion, axis=1)
    np.testing.assert_allclose(out["estimate"], ref, rtol=1e-15, atol=0)


@pytest.mark.parametrize("n, proportion", [(1000, 0.1), (1000, 0.25), (51, 0.1)])
def test_trimmed_mean_inference_agrees_with_scipy_mstats_at_larger_n(n, proportion):
    """scipy.stats.mstats.trimmed_stde and trimmed_mean_ci (Tukey & McLaughlin 1963);
    p-value 2 P(T > |estimate / se|), T ~ t(n - 2g - 1) from scipy.stats.t."""
    x = _block(n, seed=2)[6:]
    limits = (proportion, proportion)
    out = location.trimmed_mean(x, proportion=proportion, level=0.9)
    df = n - 2 * int(proportion * n) - 1
    for i, row in enumerate(x):
        assert out["se"][i] == pytest.approx(mstats.trimmed_stde(row, limits=limits), rel=1e-12)
        low, high = mstats.trimmed_mean_ci(row, limits=limits, alpha=0.1)
        assert (out["ci_low"][i], out["ci_high"][i]) == pytest.approx((low, high), rel=1e-12)
        p = 2 * stats.t.sf(abs(out["estimate"][i] / out["se"][i]), df)
        assert out["p_value"][i] == pytest.approx(p, rel=1e-12)


@pytest.mark.parametrize("n", [10, 11, 1000])
def test_winsorized_mean_agrees_with_scipy_winsorize_at_larger_n(n):
    """Mean of scipy.stats.mstats.winsorize; SE s_w (n-1) / ((n-2g-1) sqrt(n)) (Dixon & Tukey
    1968, as in Wilcox 2012, section 3.3.3), s_w from numpy.std of the same."""
    x = _block(n, seed=3)[6:]
    out = location.winsorized_mean(x, proportion=0.2)
    g = int(0.2 * n)
    for i, row in enumerate(x):
        w = np.asarray(mstats.winsorize(row, limits=(0.2, 0.2)))
        assert out["estimate"][i] == pytest.approx(w.mean(), rel=1e-13, abs=1e-15)
        assert out["se"][i] == pytest.approx(w.std(ddof=1) * (n - 1) / ((n - 2 * g - 1) * np.sqrt(n)),
                                             rel=1e-13)


def test_rows_with_nan_give_nan_trimmed_and_winsorized_fields():
    """A NaN row gives NaN, as scipy.stats.trim_mean and numpy's mean of mstats.winsorize would."""
    x = _block(20)
    for fn in (location.trimmed_mean, location.winsorized_mean):
        out = fn(x, proportion=0.1)
        assert np.isnan(out["estimate"][1]) and np.isnan(out["se"][1])
        assert np.all(np.isfinite(out["estimate"][6:]))


# ---------------------------------------------------------------- mean and SD
@pytest.mark.parametrize("n", [2, 5, 50, 1000])
def test_mean_agrees_with_ttest_1samp_at_several_n(n):
    """scipy.stats.ttest_1samp: p-value and confidence_interval; se bit for bit numpy.std / sqrt(n)."""
    x = _block(n, seed=4)[6:]
    out = location.mean(x, level=0.9, null_value=0.1)
    _same_bits(out["estimate"], np.mean(x, axis=1))
    _same_bits(out["se"], np.std(x, axis=1, ddof=1) / np.sqrt(n))
    ref = stats.ttest_1samp(x, 0.1, axis=1)
    ci = ref.confidence_interval(0.9)
    np.testing.assert_allclose(out["p_value"], ref.pvalue, rtol=1e-12)
    np.testing.assert_allclose(out["ci_low"], ci.low, rtol=1e-12)
    np.testing.assert_allclose(out["ci_high"], ci.high, rtol=1e-12)


@pytest.mark.parametrize("n", [2, 5, 50, 1000])
@pytest.mark.parametrize("level", [0.95, 0.9])
def test_variance_uses_scipy_chi2_bit_for_bit(n, level):
    """Estimate: numpy.var(ddof=1), bit for bit. Interval SS / chi2 quantiles and the doubled
    smaller tail at SS / null_value, quantiles and tails from scipy.stats.chi2 (normal theory,
    common practice)."""
    x = _block(n, seed=5)
    with np.errstate(invalid="ignore"):
        out = scale.variance(x, level=level, null_value=2.0)
        _same_bits(out["estimate"], np.var(x, axis=1, ddof=1))
        _same_bits(scale.sd(x)["estimate"], np.std(x, axis=1, ddof=1))
        ss = ((x - x.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
        _same_bits(out["ci_low"], ss / stats.chi2.ppf(0.5 + level / 2, n - 1))
        _same_bits(out["ci_high"], ss / stats.chi2.ppf(0.5 - level / 2, n - 1))
        tails = np.minimum(stats.chi2.cdf(ss / 2.0, n - 1), stats.chi2.sf(ss / 2.0, n - 1))
        _same_bits(out["p_value"], np.minimum(1, 2 * tails))


# ---------------------------------------------------------------- reference distributions
@pytest.mark.parametrize("dist, shape", [
    (stats.t, (9,)), (stats.t, (1,)), (stats.t, (np.array([1, 4, 9.5, 250, np.inf, 0, np.nan] * 2),)),
    (stats.norm, ()), (stats.laplace, ()),
])
def test_wald_fields_quantile_and_tail_are_scipy_stats(dist, shape):
    """dist.ppf((1 + level)/2) and 2 dist.sf(|z|) of scipy.stats, bit for bit, for NaN,
    infinite, zero and ordinary z; df per replicate, with invalid df giving NaN."""
    estimate = np.array([0.0, 0.3, -2.0, 40.0, np.inf, np.nan, 1.0] * 2)
    se = np.array([1.0, 0.1, 0.5, 1.0, 1.0, 1.0, 0.0] * 2)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = _inference.wald_fields(estimate, se, 0.9, 0.2, dist, *shape)
        q = dist.ppf(0.95, *shape)
        z = (estimate - 0.2) / se
        _same_bits(out["ci_low"], estimate - q * se)
        _same_bits(out["ci_high"], estimate + q * se)
        _same_bits(out["p_value"], 2 * dist.sf(np.abs(z), *shape))
        frozen = _inference.wald_fields(estimate, se, 0.9, 0.2, dist(*shape))
    for name, value in frozen.items():
        _same_bits(out[name], value)


# ---------------------------------------------------------------- passes
def test_median_trimmed_and_winsorized_partition_each_row_once(monkeypatch):
    """Common practice for order statistics in numpy: one np.partition with every rank needed."""
    calls = []
    partition = np.partition
    monkeypatch.setattr(np, "partition", lambda *a, **k: calls.append(1) or partition(*a, **k))
    x = _block(30)[6:]
    for fn in (location.median, location.trimmed_mean, location.winsorized_mean):
        calls.clear()
        fn(x)
        assert len(calls) == 1, fn.__name__
    calls.clear()
    location.mean(x), scale.sd(x)
    assert not calls
