"""External checks of confidence intervals: binomial proportion, t and bootstrap.

Proportion intervals are judged by exact coverage, summing binomial
probabilities over every outcome x = 0..n (Brown, Cai & DasGupta 2001,
Statistical Science 16:101-133; "BCD"), against reference intervals computed
outside this project (scipy.stats.binomtest, scipy.stats.beta) or from BCD's
formulas. Monte Carlo checks use fixed seeds and a tolerance in MCSEs.
"""

import sys

import numpy as np
import pytest
from scipy import stats

from estbench.core.bundled import BUILTIN_ESTIMATORS

sys.path.insert(0, str(BUILTIN_ESTIMATORS))
import location  # noqa: E402
import proportion  # noqa: E402

INTERVALS = [proportion.wald, proportion.wilson, proportion.agresti_coull,
             proportion.clopper_pearson, proportion.jeffreys]
GRID = [(10, 0.1), (20, 0.5), (37, 0.03), (50, 0.3), (100, 0.9)]


def _every_outcome(n):
    """Row x holds x ones then n - x zeros: one row per possible count."""
    return (np.arange(n)[None, :] < np.arange(n + 1)[:, None]).astype(float)


def _reference(method, n, level):
    """(low, high) for x = 0..n from scipy or from BCD's formulas, outcome by outcome."""
    z = stats.norm.ppf(0.5 + level / 2)
    out = []
    for x in range(n + 1):
        p = x / n
        if method == "wald":
            half = z * np.sqrt(p * (1 - p) / n)
            out.append((p - half, p + half))
        elif method == "agresti_coull":                     # BCD eq. (4.3) with z^2 added trials
            nt = n + z ** 2
            pt = (x + z ** 2 / 2) / nt
            half = z * np.sqrt(pt * (1 - pt) / nt)
            out.append((pt - half, pt + half))
        elif method in ("wilson", "clopper_pearson"):
            ci = stats.binomtest(x, n).proportion_ci(level, method="wilson" if method == "wilson" else "exact")
            out.append((ci.low, ci.high))
        else:                                               # Jeffreys, BCD section 4.1.3
            tail = (1 - level) / 2
            low = stats.beta.ppf(tail, x + 0.5, n - x + 0.5) if x > 0 else 0.0
            high = stats.beta.ppf(1 - tail, x + 0.5, n - x + 0.5) if x < n else 1.0
            out.append((low, high))
    return np.array(out)


def _exact_coverage(low, high, n, p):
    """sum over x of P(X = x) 1{low_x <= p <= high_x}, X ~ Binomial(n, p)."""
    return float(stats.binom.pmf(np.arange(n + 1), n, p) @ ((low <= p) & (p <= high)))


@pytest.mark.parametrize("fn", INTERVALS, ids=lambda f: f.__name__)
@pytest.mark.parametrize("level", [0.95, 0.9])
def test_proportion_interval_matches_its_reference_on_every_outcome(fn, level):
    """Ends within 1e-10 of the reference for every x, hence identical exact coverage."""
    for n, p in GRID:
        out = fn(_every_outcome(n), level=level)
        ref = _reference(fn.__name__, n, level)
        np.testing.assert_allclose(out["ci_low"], ref[:, 0], rtol=0, atol=1e-10)
        np.testing.assert_allclose(out["ci_high"], ref[:, 1], rtol=0, atol=1e-10)
        np.testing.assert_array_equal(out["estimate"], np.arange(n + 1) / n)
        assert _exact_coverage(out["ci_low"], out["ci_high"], n, p) == pytest.approx(
            _exact_coverage(ref[:, 0], ref[:, 1], n, p), abs=1e-12)


def test_clopper_pearson_never_covers_less_than_nominal():
    """Clopper-Pearson is conservative: exact coverage >= level at every (n, p) (BCD)."""
    for n in (5, 17, 40, 101):
        out = proportion.clopper_pearson(_every_outcome(n))
        for p in np.linspace(0.005, 0.995, 67):
            assert _exact_coverage(out["ci_low"], out["ci_high"], n, p) >= 0.95 - 1e-12


def test_wald_fails_for_small_p_and_wilson_and_jeffreys_average_near_nominal():
    """BCD's message (their figures, from memory): Wald covers far too little near the
    boundary (at x = 0 it is [0, 0], so coverage <= 1 - (1-p)^n exactly), while the
    coverage of Wilson and Jeffreys averaged over p is close to the level and
    Agresti-Coull is a little conservative. Measured here at n = 50, p on a grid."""
    n, grid = 50, np.linspace(0.01, 0.99, 99)
    rows = _every_outcome(n)
    mean_coverage = {}
    for fn in INTERVALS:
        out = fn(rows)
        mean_coverage[fn.__name__] = np.mean([_exact_coverage(out["ci_low"], out["ci_high"], n, p) for p in grid])
    wald = proportion.wald(rows)
    assert _exact_coverage(wald["ci_low"], wald["ci_high"], n, 0.01) <= 1 - 0.99 ** n
    assert mean_coverage["wald"] < 0.93
    assert abs(mean_coverage["wilson"] - 0.95) < 0.01
    assert abs(mean_coverage["jeffreys"] - 0.95) < 0.01
    assert 0.95 <= mean_coverage["agresti_coull"] < mean_coverage["clopper_pearson"]


def test_agresti_coull_contains_wilson():
    """The Agresti-Coull interval always contains the Wilson interval (BCD, from memory)."""
    for n in (3, 10, 40, 200):
        rows = _every_outcome(n)
        for level in (0.8, 0.95, 0.99):
            ac, wi = proportion.agresti_coull(rows, level=level), proportion.wilson(rows, level=level)
            assert np.all(ac["ci_low"] <= wi["ci_low"] + 1e-15)
            assert np.all(ac["ci_high"] >= wi["ci_high"] - 1e-15)


def test_score_and_exact_p_values_agree_with_scipy():
    """Score test: z^2 is Pearson's chi-square, scipy.stats.chisquare on (x, n - x).
    Central exact test: 2 min of scipy.stats.binomtest's one-sided p-values, capped at 1."""
    n, null_value = 30, 0.35
    rows = _every_outcome(n)
    wilson, exact = proportion.wilson(rows, null_value=null_value), proportion.clopper_pearson(rows, null_value=null_value)
    for x in range(n + 1):
        ref = stats.chisquare([x, n - x], [n * null_value, n * (1 - null_value)]).pvalue
        assert wilson["p_value"][x] == pytest.approx(ref, rel=1e-10, abs=1e-300)
        tails = [stats.binomtest(x, n, null_value, alternative=a).pvalue for a in ("less", "greater")]
        assert exact["p_value"][x] == pytest.approx(min(1, 2 * min(tails)), rel=1e-10)


@pytest.mark.parametrize("fn", INTERVALS, ids=lambda f: f.__name__)
def test_each_p_value_inverts_its_interval(fn):
    """At null_value = an end of the interval the p-value is 1 - level (the test the interval
    inverts); Wald and Agresti-Coull ends outside (0, 1) are not testable nulls."""
    n, level = 25, 0.9
    rows = _every_outcome(n)
    out = fn(rows, level=level)
    for x in (1, 7, 24):
        for end in (out["ci_low"][x], out["ci_high"][x]):
            if not 0 < end < 1:
                continue
            p = fn(rows[x:x + 1], level=level, null_value=end)["p_value"][0]
            assert p == pytest.approx(1 - level, rel=1e-8)


@pytest.mark.parametrize("call, message", [
    (lambda: proportion.wilson(np.array([[0.0, 2.0]])), "`data` must hold only 0 and 1"),
    (lambda: proportion.wald(np.ones((2, 4)), null_value=0), "`null_value` must be strictly between"),
])
def test_proportion_bad_input_is_named(call, message):
    with pytest.raises(ValueError, match=message):
        call()


# ---------------------------------------------------------------- t interval
@pytest.mark.parametrize("n, level", [(5, 0.95), (10, 0.9), (30, 0.99)])
def test_t_interval_uses_the_t_quantile_and_covers_exactly_for_normal_data(n, level):
    """Half-width / se is scipy.stats.t.ppf((1 + level)/2, n - 1); for normal data the
    coverage is exactly the level (Student 1908), checked within 4 MCSE."""
    x = np.random.default_rng(n).normal(3.0, 2.0, size=(200_000, n))
    out = location.mean(x, level=level)
    np.testing.assert_allclose((out["ci_high"] - out["estimate"]) / out["se"],
                               stats.t.ppf(0.5 + level / 2, n - 1), rtol=1e-12)
    coverage = ((out["ci_low"] <= 3.0) & (3.0 <= out["ci_high"])).mean()
    assert abs(coverage - level) < 4 * np.sqrt(level * (1 - level) / len(x))


# ---------------------------------------------------------------- bootstrap
def test_bootstrap_reproduces_with_its_stream_and_only_with_it():
    x = np.random.default_rng(1).normal(size=(40, 20))
    first = location.bootstrap_mean(x, rng=np.random.default_rng(7), B=199)
    again = location.bootstrap_mean(x, rng=np.random.default_rng(7), B=199)
    other = location.bootstrap_mean(x, rng=np.random.default_rng(8), B=199)
    for name in first:
        np.testing.assert_array_equal(first[name], again[name])
    assert not np.any(first["ci_low"] == other["ci_low"])
    np.testing.assert_array_equal(first["estimate"], x.mean(axis=1))


def test_bootstrap_percentile_interval_covers_near_nominal():
    """For normal data the percentile interval is about mean ± z sigma_n/sqrt(n) with
    sigma_n the SD with divisor n, so its coverage is near P(|t_{n-1}| <=
    z sqrt((n-1)/n)) = 0.942 at n = 50 (a known small undercoverage; common
    practice). Tolerance: 4 MCSE plus 0.005 for that approximation."""
    n, level = 50, 0.95
    x = np.random.default_rng(2).normal(size=(2_000, n))
    out = location.bootstrap_mean(x, rng=np.random.default_rng(3), level=level)
    coverage = ((out["ci_low"] <= 0) & (0 <= out["ci_high"])).mean()
    approx = 2 * stats.t.cdf(stats.norm.ppf(0.975) * np.sqrt((n - 1) / n), n - 1) - 1
    assert abs(coverage - approx) < 4 * np.sqrt(approx * (1 - approx) / len(x)) + 0.005


def test_bootstrap_needs_a_generator():
    with pytest.raises(TypeError, match="`rng` must be a numpy.random.Generator"):
        location.bootstrap_mean(np.ones((2, 5)), rng=3)
