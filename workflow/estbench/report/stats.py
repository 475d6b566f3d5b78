"""Numerics behind the report: rates in n, paired contests, bands, rounding.

Everything here works on small summaries (one number per scenario x
estimator); the store's rows never reach this module.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

#: A leader is declared only when it beats the runner-up by more than this
#: many MCSEs of their paired difference (about a two-sided 5% test).
CONTEST_Z = 2.0


@dataclass(frozen=True)
class PowerLawFit:
    """``value ≈ exp(intercept) · n**exponent`` fitted on log scales."""

    exponent: float
    se: float             #: standard error of the exponent, MCSEs taken as known
    intercept: float
    chi2: float           #: weighted residual sum of squares
    df: int               #: points used − 2
    p_value: float        #: lack of fit, P(χ²_df ≥ chi2); NaN when df = 0
    points: int


def power_law_fit(n, value, mcse) -> PowerLawFit | None:
    """Weighted least-squares fit of log(value) = a + b·log(n).

    The delta method gives sd(log value) ≈ MCSE/value, so each point gets the
    weight w = (value/MCSE)². With the MCSEs taken as known, the slope's
    standard error is √[(XᵀWX)⁻¹]₂₂ and the weighted residual sum of squares
    is χ² on k − 2 degrees of freedom under a true power law (a lack-of-fit
    test; a small p-value says the curve bends over this range of n).

    Parameters
    ----------
    n : sample sizes (> 0).
    value : the measure at each n; points with value ≤ 0 are left out.
    mcse : its Monte Carlo SE; points with MCSE ≤ 0 or missing are left out.

    Returns
    -------
    PowerLawFit, or None with fewer than two usable points or one distinct n.
    """
    n, value, mcse = (np.asarray(a, float).ravel() for a in (n, value, mcse))
    if not (n.shape == value.shape == mcse.shape):
        raise ValueError(f"`n`, `value` and `mcse` must have equal lengths, got "
                         f"{n.size}, {value.size}, {mcse.size}")
    with np.errstate(invalid="ignore"):
        use = (n > 0) & (value > 0) & (mcse > 0) & np.isfinite(n + value + mcse)
    n, value, mcse = n[use], value[use], mcse[use]
    if n.size < 2 or np.unique(n).size < 2:
        return None
    x, y, w = np.log(n), np.log(value), (value / mcse) ** 2
    design = np.column_stack([np.ones_like(x), x])
    information = design.T @ (w[:, None] * design)
    covariance = np.linalg.inv(information)
    coef = covariance @ (design.T @ (w * y))
    resid = y - design @ coef
    chi2 = float(np.sum(w * resid ** 2))
    df = int(n.size - 2)
    p_value = float(stats.chi2.sf(chi2, df)) if df > 0 else math.nan
    return PowerLawFit(exponent=float(coef[1]), se=float(math.sqrt(covariance[1, 1])),
                       intercept=float(coef[0]), chi2=chi2, df=df, p_value=p_value, points=int(n.size))


@dataclass(frozen=True)
class Ranking:
    """How one measure orders estimators, and the paired statistic that tests it."""

    measure: str
    better: str           #: plain words for the reader
    paired: str           #: what the paired per-replicate difference is


#: Measures on which the performance tables name a leader. For each, the
#: "badness" ordering and the per-replicate contribution whose paired mean is
#: (runner-up's badness − leader's badness); its MCSE is sd(d)/√pairs.
RANKINGS = {
    "bias": Ranking("bias", "smaller |bias|",
                    "d = s_r·e_r − s_l·e_l, s = sign of each bias (mean: |bias_r| − |bias_l|)"),
    "empirical_se": Ranking("empirical_se", "smaller empirical SE",
                     "d = (θ̂_r − m_r)² − (θ̂_l − m_l)², m = mean estimate (mean: var_r − var_l)"),
    "rmse": Ranking("rmse", "smaller RMSE",
                    "d = e_r² − e_l² (mean: MSE_r − MSE_l; the same order as RMSE)"),
    "coverage": Ranking("coverage", "coverage closer to the nominal level",
                        "d = s_r·(c_r − level) − s_l·(c_l − level), c = 1 if the interval covers, "
                        "s = sign(C − level)"),
}


def badness(measure: str, value: float, level: float) -> float:
    """How far *value* of *measure* is from ideal (smaller is better)."""
    if measure == "bias":
        return abs(value)
    if measure == "coverage":
        return abs(value - level)
    if measure in ("empirical_se", "rmse"):
        return value
    raise ValueError(f"`measure` must be one of {', '.join(RANKINGS)}, got {measure!r}")


def sign_of(x: float) -> float:
    """+1 or −1; 0 counts as +1 so a contribution is never dropped."""
    return -1.0 if x < 0 else 1.0


@dataclass(frozen=True)
class Contest:
    """Leader against runner-up on one measure of one scenario."""

    leader: str
    runner_up: str
    difference: float     #: runner-up's badness − leader's, from the paired replicates
    mcse: float           #: sd of the paired differences / √pairs
    pairs: int
    scale: float = 0.0    #: the larger badness of the two: a difference below 1e-9 of it is rounding

    @property
    def z(self) -> float:
        """Difference in MCSEs (∞ when the paired differences do not vary)."""
        if not self.difference > 1e-9 * self.scale:   # identical estimates, up to float rounding
            return 0.0
        if self.mcse > 0:
            return self.difference / self.mcse
        return math.inf

    @property
    def decided(self) -> bool:
        """True when the leader is better by more than ``CONTEST_Z`` MCSEs."""
        return self.pairs >= 2 and self.z > CONTEST_Z


def nominal_band(level: float, n_sim: int) -> tuple[float, float]:
    """level ± 2·√(level(1 − level)/n_sim): where coverage at the nominal level
    falls in about 95% of studies of n_sim replicates (binomial MCSE, Morris,
    White & Crowther 2019)."""
    half = 2 * math.sqrt(level * (1 - level) / n_sim)
    return max(0.0, level - half), min(1.0, level + half)


def round_to_mcse(value, mcse) -> str:
    """*value* printed to the second significant digit of its MCSE.

    A digit beyond that is Monte Carlo noise. At most six significant digits
    are printed; without a positive MCSE the value gets four.
    """
    if value is None or math.isnan(value):
        return "—"
    if math.isinf(value):
        return "∞" if value > 0 else "−∞"
    if mcse is None or not math.isfinite(mcse) or mcse <= 0:
        return format(value, ".4g")
    decimals = 1 - math.floor(math.log10(mcse))
    if value != 0:   # never more than 6 significant digits, even for a near-zero MCSE
        decimals = min(decimals, 5 - math.floor(math.log10(abs(value))))
    if decimals <= 0:
        text = format(round(value, decimals), ".0f")
    else:
        text = format(value, f".{min(decimals, 15)}f")
    return text.lstrip("-") if float(text) == 0 else text


def mcse_text(mcse) -> str:
    """An MCSE with two significant digits."""
    if mcse is None or not math.isfinite(mcse):
        return "—"
    return format(mcse, ".2g")
