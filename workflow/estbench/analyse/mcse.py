"""Monte Carlo error tools that work on per-block sums, with no database.

Three jobs, each on arrays already reduced to one row per seed
block (never one row per replicate):

* the leave-one-block-out jackknife (Koehler, Brown & Haneuse 2009, "On the
  assessment of Monte Carlo error in simulation-based statistical analyses",
  The American Statistician 63:155-162), for measures without a closed-form
  MCSE;
* a between-block heterogeneity test of the mean error, which flags a broken
  random stream or an estimator that misbehaves in some shards;
* replicate planning: how many replicates reach a target MCSE (Morris, White
  & Crowther 2019, Statistics in Medicine 38:2074-2102, section 5.3).
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass

import numpy as np
from scipy import stats


def is_positive_number(x) -> bool:
    """A finite real number > 0 (not a bool): the rule for targets, SDs and bounds."""
    return isinstance(x, numbers.Real) and not isinstance(x, bool) and math.isfinite(x) and x > 0


def is_open_unit(x) -> bool:
    """A real number strictly between 0 and 1: the rule for levels and proportions."""
    return isinstance(x, numbers.Real) and not isinstance(x, bool) and 0 < x < 1


@dataclass(frozen=True)
class Blocks:
    """Per-block rows of several groups (a group = one scenario x estimator).

    Attributes
    ----------
    group : int array, the group index (0 .. n_groups - 1) of each block row.
    m : float array, replicates used in each block (at least 1).
    n_groups : number of groups.
    """

    group: np.ndarray
    m: np.ndarray
    n_groups: int

    def total(self, x: np.ndarray) -> np.ndarray:
        """Sum of *x* over the blocks of each group."""
        return np.bincount(self.group, weights=x, minlength=self.n_groups)

    def count(self) -> np.ndarray:
        """Number of blocks K of each group."""
        return np.bincount(self.group, minlength=self.n_groups).astype(float)

    def replicates(self) -> np.ndarray:
        """Replicates used N of each group."""
        return self.total(self.m)

    def mean(self, block_mean: np.ndarray) -> np.ndarray:
        """Mean over all replicates of each group, from the block means."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return self.total(self.m * block_mean) / self.replicates()

    def leave_one_out_mean(self, block_mean: np.ndarray) -> np.ndarray:
        """For each block k, the mean over the replicates of its group outside k."""
        sums = self.m * block_mean
        rest = self.replicates()[self.group] - self.m
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(rest > 0, (self.total(sums)[self.group] - sums) / np.where(rest > 0, rest, 1),
                            np.nan)

    def leave_one_out_comoment(self, mean_x, mean_y, within_xy) -> np.ndarray:
        """For each block k, sum (x - x̄)(y - ȳ) over its group's replicates outside k.

        Parameters
        ----------
        mean_x, mean_y : block means of x and y.
        within_xy : block sums of (x - x̄_k)(y - ȳ_k) about the block's own means,
            i.e. (m_k - 1) times the block's sample covariance (0 for m_k = 1).

        Built from deviations about the group mean (never raw sums of squares),
        so it keeps its precision when the mean is large against the spread:
        S(k) = S - S_k - m_k N d_xk d_yk / (N - m_k), with d_k the block mean
        minus the group mean and S the group's total co-moment.
        """
        n = self.replicates()
        dx = mean_x - self.mean(mean_x)[self.group]
        dy = mean_y - self.mean(mean_y)[self.group]
        between = self.m * dx * dy
        total = self.total(within_xy + between)
        rest = n[self.group] - self.m
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(rest > 0, total[self.group] - within_xy
                            - between * n[self.group] / np.where(rest > 0, rest, 1), np.nan)


def jackknife_se(blocks: Blocks, leave_one_out: np.ndarray) -> np.ndarray:
    """Delete-a-block jackknife standard error of a statistic, per group.

    Parameters
    ----------
    blocks : the block rows.
    leave_one_out : the statistic recomputed without each block, θ(k).

    Returns
    -------
    float array, one per group: sqrt((K - 1)/K · Σ_k (θ(k) - θ(·))²), the
    jackknife SE over K seed blocks (Koehler, Brown & Haneuse 2009, eq. 3
    with blocks as the deleted units). It rests on K - 1 degrees of freedom:
    with K = 10 blocks the MCSE itself is uncertain by about 1/√(2·9) ≈ 24 %,
    so studies that rely on it want at least a few dozen blocks. Blocks of
    unequal size (after failures) are treated as exchangeable. NaN where a
    group has fewer than 2 blocks.
    """
    k = blocks.count()
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = blocks.total(leave_one_out) / k
        spread = blocks.total((leave_one_out - centre[blocks.group]) ** 2)
        return np.where(k >= 2, np.sqrt((k - 1) / k * spread), np.nan)


@dataclass(frozen=True)
class Heterogeneity:
    """Between-block heterogeneity of the mean error, one entry per group."""

    statistic: np.ndarray   #: Q = Σ_k m_k (ē_k − ē)² / s²_within
    df: np.ndarray          #: K − 1
    p_value: np.ndarray     #: chi2(K − 1) upper tail of Q


def block_heterogeneity(blocks: Blocks, block_mean: np.ndarray, block_var: np.ndarray) -> Heterogeneity:
    """Do the seed blocks of each group agree on the mean error?

    Parameters
    ----------
    blocks : the block rows.
    block_mean : mean error ē_k of each block.
    block_var : sample variance of the errors within each block (any value
        where m_k = 1; it is not used there).

    Returns
    -------
    Heterogeneity with Q = Σ_k m_k (ē_k − ē)² / s²_w, where ē is the mean of
    all N replicates and s²_w = Σ_k (m_k − 1) v_k / (N − K) the pooled
    within-block variance, so each block mean is compared with the formula
    MCSE of a mean of m_k replicates, s_w/√m_k. This is Cochran's Q with a
    common variance (Cochran 1954, Biometrics 10:101-129) and equals K − 1
    times the one-way ANOVA F statistic; with N − K large it is χ² on K − 1
    df when all blocks draw from one distribution. A small p-value says some
    blocks differ in mean: a stream or an estimator problem. Entries are NaN
    where K < 2 or N − K < 1.
    """
    k = blocks.count()
    n = blocks.replicates()
    deviation = block_mean - blocks.mean(block_mean)[blocks.group]
    between = blocks.total(blocks.m * deviation ** 2)
    within = blocks.total(np.where(blocks.m > 1, (blocks.m - 1) * block_var, 0.0))
    ok = (k >= 2) & (n - k >= 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        statistic = np.where(ok, between / (within / np.where(ok, n - k, 1)), np.nan)
    df = np.where(ok, k - 1, np.nan)
    p = np.full(statistic.shape, np.nan)
    p[ok] = stats.chi2.sf(statistic[ok], df[ok])
    return Heterogeneity(statistic, df, p)


def replicates_for_target(n_used: np.ndarray, mcse: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Replicates needed for an MCSE of *target*, from a run of *n_used* replicates.

    MCSE shrinks as 1/√n, so n_sim = n_used · (MCSE/target)², which is
    Var/target² for a mean-type measure and C(1 − C)/target² for a share
    (Morris, White & Crowther 2019, section 5.3). Rounded up; NaN where the
    MCSE is unknown.
    """
    return round_up(np.asarray(n_used, float) * (np.asarray(mcse, float) / np.asarray(target, float)) ** 2)


def round_up(x):
    """Round a replicate count up, ignoring float noise: 0.95·0.05/0.005² is 1900, not 1901."""
    with np.errstate(invalid="ignore"):
        return np.ceil(np.round(x, 6))


#: Measures whose value is a share of replicates, so MCSE² = P(1 − P)/n.
SHARE_MEASURES = ("coverage", "bias_eliminated_coverage", "rejection_rate")
#: Measures whose worst case needs a guess of the SD of the estimates.
SD_MEASURES = ("bias", "empirical_se", "mse", "rmse")


def replicates_needed(measure: str, target: float, *, proportion: float | None = None,
                      sd: float | None = None, bias: float = 0.0) -> int:
    """Replicates needed before any run, for a target MCSE of one measure.

    Parameters
    ----------
    measure : one of ``coverage``, ``bias_eliminated_coverage``,
        ``rejection_rate`` (shares) or ``bias``, ``empirical_se``, ``mse``, ``rmse``.
    target : largest acceptable MCSE, > 0, in the measure's units (shares,
        not percentage points).
    proportion : for a share, the expected value, e.g. the nominal level for
        coverage or the expected power. Default: the worst case 0.5, which
        maximises P(1 − P).
    sd : for bias/empirical_se/mse/rmse, a guess of the SD of the estimates across
        replicates (from theory or a pilot run); required for them.
    bias : for mse/rmse, a guess of the bias (default 0).

    Returns
    -------
    int, rounded up. Formulas (Morris, White & Crowther 2019, section 5.3,
    with normal estimates for the squared-error measures):

    * share: P(1 − P)/target² (95 % coverage, target 0.005 → 1900);
    * bias: sd²/target²;
    * empirical_se: 1 + sd²/(2·target²), from MCSE = sd/√(2(n − 1));
    * mse: (2 sd⁴ + 4 bias² sd²)/target², the variance of a squared normal
      error with that mean and SD;
    * rmse: the mse count with target 2·√(sd² + bias²)·target (delta method).
    """
    if measure not in SHARE_MEASURES + SD_MEASURES:
        raise ValueError(f"`measure` must be one of {', '.join(SHARE_MEASURES + SD_MEASURES)} "
                         f"for planning before a run, got {measure!r}; for other measures run a "
                         f"pilot and plan from its MCSE")
    if not is_positive_number(target):
        raise ValueError(f"`target` must be a positive number, got {target!r}")
    if measure in SHARE_MEASURES:
        p = 0.5 if proportion is None else proportion
        if not is_open_unit(p):
            raise ValueError(f"`proportion` must lie strictly between 0 and 1, got {proportion!r}")
        return int(round_up(p * (1 - p) / target ** 2))
    if not is_positive_number(sd):
        raise ValueError(f"`sd` (a guess of the SD of the estimates) must be a positive number "
                         f"for measure {measure!r}, got {sd!r}")
    if not (isinstance(bias, numbers.Real) and math.isfinite(bias)):
        raise ValueError(f"`bias` must be a finite number, got {bias!r}")
    var_sqerr = 2 * sd ** 4 + 4 * bias ** 2 * sd ** 2
    needed = {
        "bias": sd ** 2 / target ** 2,
        "empirical_se": 1 + sd ** 2 / (2 * target ** 2),
        "mse": var_sqerr / target ** 2,
        "rmse": var_sqerr / (4 * (sd ** 2 + bias ** 2) * target ** 2),
    }[measure]
    return int(round_up(needed))
