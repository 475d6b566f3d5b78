"""Built-in location and scale estimators against hand-written numpy, per seed block.

    .venv/bin/python benchmarks/estimators.py [--sizes 10 50 1000] [--block 1000] [--repeats 7]
                                              [--yardstick /work/shared/bench/limit_full.py]

The estimators of the reference study (location:mean, location:median,
location:trimmed_mean at proportion 0.1, scale:sd) each get one block of
standard normal data, shape (block, n), and every output they give (estimate,
se, interval, p-value). Beside each one runs the same outputs written flat in
numpy by hand, with everything that depends only on n worked out beforehand,
and the bare estimate as a numpy user would first write it (np.mean,
np.median, scipy.stats.trim_mean, np.std). The row "all four" sets the sum of
the four built-ins against the yardstick script's block function, which
computes the four together (median and trimmed mean from one partition).

Variants run in alternation; each time is the median over --repeats of a
batch of calls lasting about 50 ms, in ms per block. Only the ratios are
meant to travel between machines.
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import statistics
import sys
import time
from pathlib import Path

import numpy as np
from scipy import stats

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "estimators"))
import location  # noqa: E402
import scale  # noqa: E402

PROPORTION = 0.1


def load_yardstick(path: Path):
    """The yardstick script as a module (its main() does not run on import)."""
    spec = importlib.util.spec_from_file_location("yardstick", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def by_hand(n: int) -> dict:
    """Per-estimator numpy written flat, with the constants for this n computed once."""
    t_mean = stats.t.ppf(0.975, n - 1)
    cdf = stats.binom.cdf(np.arange(n + 1), n, 0.5)
    k = int(np.searchsorted(cdf, 0.025, side="right"))
    g = int(PROPORTION * n)
    df_trim = n - 2 * g - 1
    t_trim = stats.t.ppf(0.975, df_trim)
    chi_upper, chi_lower = stats.chi2.ppf([0.975, 0.025], n - 1)

    def mean(x):
        centre = x.mean(axis=1)
        se = np.sqrt(((x - centre[:, None]) ** 2).sum(axis=1) / (n - 1) / n)
        return centre, se, centre - t_mean * se, centre + t_mean * se, \
            2 * stats.t.sf(np.abs(centre / se), n - 1)

    def median(x):
        mid = [(n - 1) // 2, n // 2]
        ends = [k - 1, n - k] if k else []
        part = np.partition(x, sorted({*mid, *ends}), axis=1)
        above = (x > 0).sum(axis=1) + 0.5 * (x == 0).sum(axis=1)
        lower_tail = cdf[np.floor(above).astype(int)]
        upper_tail = 1 - cdf[np.maximum(np.ceil(above).astype(int) - 1, 0)] * (above > 0)
        return (part[:, mid[0]] + part[:, mid[1]]) / 2, part[:, ends], \
            np.minimum(1, 2 * np.minimum(lower_tail, upper_tail))

    def trimmed(x):
        part = np.partition(x, [g, n - 1 - g], axis=1)
        centre = part[:, g:n - g].mean(axis=1)
        clipped = np.clip(x, part[:, g:g + 1], part[:, n - 1 - g:n - g])
        se = clipped.std(axis=1, ddof=1) / ((1 - 2 * PROPORTION) * np.sqrt(n))
        return centre, se, centre - t_trim * se, centre + t_trim * se, \
            2 * stats.t.sf(np.abs(centre / se), df_trim)

    def sd(x):
        ss = ((x - x.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
        return np.sqrt(ss / (n - 1)), np.sqrt(ss / chi_upper), np.sqrt(ss / chi_lower)

    return {"mean": mean, "median": median, "trimmed_10": trimmed, "sd": sd}


BUILT_IN = {
    "mean": location.mean,
    "median": location.median,
    "trimmed_10": lambda x: location.trimmed_mean(x, proportion=PROPORTION),
    "sd": scale.sd,
}
BARE = {
    "mean": lambda x: x.mean(axis=1),
    "median": lambda x: np.median(x, axis=1),
    "trimmed_10": lambda x: stats.trim_mean(x, PROPORTION, axis=1),
    "sd": lambda x: x.std(axis=1, ddof=1),
}


def batch_size(fn, x) -> int:
    """Calls per timed batch so one batch lasts about 50 ms."""
    start = time.perf_counter()
    fn(x)
    once = max(time.perf_counter() - start, 1e-6)
    return max(1, int(0.05 / once))


def per_call_ms(fn, x, calls: int) -> float:
    start = time.perf_counter()
    for _ in range(calls):
        fn(x)
    return (time.perf_counter() - start) / calls * 1e3


def time_size(n: int, block: int, repeats: int, yardstick) -> dict:
    """Median ms per block of every variant at sample size n, measured in alternation."""
    x = np.random.default_rng([2026, n]).standard_normal((block, n))
    constants = yardstick.per_n_constants(n)
    variants = {}
    for name, hand in by_hand(n).items():
        variants[(name, "built-in")] = BUILT_IN[name]
        variants[(name, "by hand")] = hand
        variants[(name, "bare")] = BARE[name]
    variants[("all four", "built-in")] = lambda x: [fn(x) for fn in BUILT_IN.values()]
    variants[("all four", "by hand")] = lambda x: yardstick.block(x, n, constants)
    calls = {key: batch_size(fn, x) for key, fn in variants.items()}
    runs: dict = {key: [] for key in variants}
    for _ in range(repeats):
        for key, fn in variants.items():
            runs[key].append(per_call_ms(fn, x, calls[key]))
    return {key: statistics.median(v) for key, v in runs.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", type=int, nargs="+", default=[10, 50, 1000])
    parser.add_argument("--block", type=int, default=1000)
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--yardstick", type=Path, default=Path("/work/shared/bench/limit_full.py"))
    args = parser.parse_args()
    yardstick = load_yardstick(args.yardstick)
    print(f"machine: {os.cpu_count()} cores; numpy {np.__version__}; block {args.block}; "
          f"medians of {args.repeats} repeats; {time.strftime('%Y-%m-%d %H:%M')}")
    print("ms per block; 'all four' by hand = yardstick block()")
    header = ("n", "estimator", "built-in ms", "by hand ms", "bare estimate ms", "built-in / by hand")
    print(" | ".join(header))
    for n in args.sizes:
        times = time_size(n, args.block, args.repeats, yardstick)
        for name in [*BUILT_IN, "all four"]:
            ours, hand = times[(name, "built-in")], times[(name, "by hand")]
            bare = times.get((name, "bare"))
            print(" | ".join([str(n), name, f"{ours:.3f}", f"{hand:.3f}",
                              "" if bare is None else f"{bare:.3f}", f"{ours / hand:.2f}"]))


if __name__ == "__main__":
    main()
