"""Built-in and user DGMs: true values against scipy.stats, draws, Cramér–Rao bounds."""

import math

import numpy as np
import pyarrow as pa
import pytest
from scipy import integrate, optimize, stats

from estbench.study import jobs
from estbench.simulate.dgms import build_dgm
from estbench.analyse.measures import performance_table
from estbench.simulate.job import compute_shard
from estbench.study.load import study_from_mapping

from conftest import run_cli, tiny_study, write_study


@pytest.mark.parametrize("name, params", [
    ("norm", {"loc": 3.0, "scale": 2.0}), ("t", {"df": 5, "loc": 1.0}), ("gamma", {"a": 2.5, "scale": 1.5}),
    ("lognorm", {"s": 0.7}), ("poisson", {"mu": 3.2}), ("binom", {"n": 12, "p": 0.3}),
])
def test_distribution_truths_equal_scipy(name, params):
    # The true values are scipy.stats' own moments and quantiles (reference library).
    dgm = build_dgm({"distribution": name, "params": params})
    ref = getattr(stats, name)(**params)
    for estimand, value in [("mean", ref.mean()), ("median", ref.median()), ("sd", ref.std()), ("var", ref.var())]:
        assert dgm.truth(estimand) == pytest.approx(value, rel=1e-10, abs=1e-12)


def test_mixture_truths_mean_variance_exact_median_by_integration():
    comps = [{"weight": 0.7, "distribution": "norm", "params": {"loc": 0.0, "scale": 1.0}},
             {"weight": 0.3, "distribution": "norm", "params": {"loc": 3.0, "scale": 2.0}}]
    dgm = build_dgm({"mixture": comps})
    # Law of total expectation / variance (common practice).
    mean = 0.7 * 0 + 0.3 * 3
    var = 0.7 * (1 + 0) + 0.3 * (4 + 9) - mean**2
    assert dgm.truth("mean") == pytest.approx(mean, rel=1e-12)
    assert dgm.truth("var") == pytest.approx(var, rel=1e-12)
    # Independent method: integrate the mixture density numerically and bisect for 1/2.
    pdf = lambda x: 0.7 * stats.norm.pdf(x) + 0.3 * stats.norm.pdf(x, 3, 2)
    cdf = lambda x: integrate.quad(pdf, -np.inf, x, epsabs=1e-13, epsrel=1e-12)[0]
    median = optimize.bisect(lambda x: cdf(x) - 0.5, -5, 5, xtol=1e-13)
    assert dgm.truth("median") == pytest.approx(median, abs=1e-10)
    draws = dgm.draw(np.random.default_rng(3), 200, 500)
    assert abs(draws.mean() - mean) < 4 * math.sqrt(var / draws.size)


@pytest.mark.parametrize("spec, estimand, truth", [
    ({"mechanism": "two_arm", "params": {"effect": 0.4, "sd": 2.0, "allocation": 0.25}}, "effect", 0.4),
    ({"mechanism": "regression", "params": {"slope": -1.5, "intercept": 2.0, "heteroskedasticity": 1.0}}, "slope", -1.5),
    ({"mechanism": "proportion", "params": {"p": 0.12}}, "p", 0.12),
    ({"mechanism": "counts", "params": {"rate": 4.5}}, "rate", 4.5),
])
def test_mechanisms_draw_what_they_claim(spec, estimand, truth):
    dgm = build_dgm(spec)
    assert dgm.truth(estimand) == truth
    data = dgm.draw(np.random.default_rng(11), 4000, 40)
    if estimand == "effect":
        assert data["arm"].sum(axis=1).tolist() == [10] * 4000  # round(0.25 * 40) treated
        diff = data["y"][:, :10].mean(axis=1) - data["y"][:, 10:].mean(axis=1)
        se = math.sqrt(4 / 10 + 4 / 30) / math.sqrt(4000)
        assert abs(diff.mean() - truth) < 4 * se
    elif estimand == "slope":
        x, y = data["x"], data["y"]
        xc = x - x.mean(axis=1, keepdims=True)
        slope = (xc * y).sum(axis=1) / (xc**2).sum(axis=1)
        assert abs(slope.mean() - truth) < 4 * slope.std(ddof=1) / math.sqrt(4000)
    else:
        assert set(np.unique(data)) <= ({0.0, 1.0} if estimand == "p" else set(range(100)))
        assert abs(data.mean() - truth) < 4 * math.sqrt(dgm.truth("var") / data.size)


def _perf(tmp_path, dgm, estimators, n, replicates=40_000):
    raw = tiny_study(replicates=replicates, block_size=10_000, blocks_per_job=4, sample_sizes=[n],
                     dgms={"d": dgm}, estimators=estimators, reference=next(iter(estimators)))
    study = study_from_mapping(raw, source=write_study(tmp_path, raw))
    s = study.scenarios[0]
    tables, truth, crb = [], {}, {}
    d = build_dgm(s.spec)
    for name, spec in study.estimators.items():
        tables += [compute_shard(jobs.shard_spec(study, s.key, name, b), study.search_dirs)
                   for b in study.job_first_blocks()]
        truth[(s.key, name)] = d.truth(spec.target)
        crb[(s.key, name)] = d.crb(spec.target, n)
    rows = performance_table(pa.concat_tables(tables), truth, crb=crb).to_pylist()
    return {(r["estimator"], r["measure"]): r for r in rows}


@pytest.mark.parametrize("dgm, target, bound", [
    ({"distribution": "norm", "params": {"loc": 1.0, "scale": 3.0}}, "mean", 9.0 / 12),
    ({"mechanism": "counts", "params": {"rate": 2.5}}, "rate", 2.5 / 12),
])
def test_sample_mean_attains_the_cramer_rao_bound(tmp_path, dgm, target, bound):
    # The sample mean is efficient: Var = sigma^2/n (normal), lambda/n (Poisson) (common practice).
    m = _perf(tmp_path, dgm, {"mean": {"function": "location:mean", "target": target}}, 12)
    eff = m[("mean", "crb_efficiency")]
    assert abs(eff["value"] - 1.0) < 4 * eff["mcse"] and eff["mcse"] < 0.01
    empirical_se = m[("mean", "empirical_se")]
    assert abs(empirical_se["value"] ** 2 - bound) < 4 * 2 * empirical_se["value"] * empirical_se["mcse"]


def test_exponential_rate_mle_bias(tmp_path):
    # The MLE n / sum(x) of an exponential rate has mean lambda n/(n-1), bias lambda/(n-1)
    # (common practice, from memory).
    (tmp_path / "rate_mle.py").write_text("def mle(x):\n    return 1 / x.mean(axis=1)\n")
    lam, n = 2.0, 8
    m = _perf(tmp_path, {"distribution": "expon", "params": {"scale": 1 / lam}},
              {"mle": {"function": "rate_mle:mle", "target": "rate"}}, n)
    bias = m[("mle", "bias")]
    assert abs(bias["value"] - lam / (n - 1)) < 4 * bias["mcse"]
    assert bias["value"] > 20 * bias["mcse"]


def test_custom_generator_with_simulated_truth(tmp_path):
    (tmp_path / "survey_dgm.py").write_text(
        "import numpy as np\n"
        "def skewed(rng, reps, n, shape):\n    return rng.gamma(shape, 1.0, size=(reps, n)) ** 2\n"
        "def skewed_truth(shape, rng):\n"
        "    x = rng.gamma(shape, 1.0, size=400_000) ** 2\n"
        "    return {'mean': (float(x.mean()), float(x.std(ddof=1) / len(x) ** 0.5)),\n"
        "            'median': float(np.median(x))}\n")
    raw = tiny_study(dgms={"skew": {"generator": "survey_dgm:skewed", "truth": "survey_dgm:skewed_truth",
                                    "params": {"shape": [2.0, 3.0]}}})
    study = study_from_mapping(raw, source=write_study(tmp_path, raw))
    d = build_dgm(study.scenarios[0].spec, study.search_dirs, study.seed)
    # E[X^2] for X ~ Gamma(k, 1) is k(k + 1) (common practice).
    assert abs(d.truth("mean") - 6.0) < 4 * d.truth_mcse("mean") and 0 < d.truth_mcse("mean") < 0.05
    again = build_dgm(study.scenarios[0].spec, study.search_dirs, study.seed)
    assert again.truth("mean") == d.truth("mean")  # the truth's own stream reproduces
    table = compute_shard(jobs.shard_spec(study, study.scenarios[0].key, "mean", 0), study.search_dirs)
    assert table.num_rows == 30 and set(table.column("status").to_pylist()) == {"ok"}


@pytest.mark.parametrize("dgm, estimators, expected", [
    ({"mechanism": "proportion", "params": {"p": [0.2, 1.5]}}, None,
     "`dgms.d.params.p[1]`: parameter 'p' must be in (0, 1), got 1.5"),
    ({"mechanism": "two_arm", "params": {"efect": 1}}, None, "unknown parameter 'efect'"),
    ({"mechanism": "regression", "params": {"slope": 1}},
     {"w": {"function": "effects:welch", "target": "slope"}},
     "`estimators.w.function`: a trial run on DGM 'd' (n = 20) failed"),
    ({"mechanism": "counts", "params": {"rate": 1}}, {"m": {"function": "location:mean", "target": "slope"}},
     "`estimators.m.target`: DGM 'd' cannot supply the estimand 'slope' (it supplies: rate, mean, var)"),
    ({"generator": "nowhere:gen", "truth": "nowhere:truth"}, None, "`dgms.d.generator`: cannot use 'nowhere:gen'"),
])
def test_dgm_problems_are_reported_at_check_time(tmp_path, dgm, estimators, expected):
    raw = tiny_study(dgms={"d": dgm})
    if estimators:
        raw["estimators"], raw["reference"] = estimators, next(iter(estimators))
    proc = run_cli("check", write_study(tmp_path, raw), cwd=tmp_path)
    assert proc.returncode == 2 and expected in proc.stderr, proc.stderr


def test_generator_returning_the_wrong_shape_is_caught(tmp_path):
    (tmp_path / "flat_gen.py").write_text(
        "def gen(rng, reps, n):\n    return rng.random(n)\n"
        "def truth():\n    return {'mean': 0.5}\n")
    raw = tiny_study(dgms={"flat": {"generator": "flat_gen:gen", "truth": "flat_gen:truth"}})
    proc = run_cli("check", write_study(tmp_path, raw), cwd=tmp_path)
    assert proc.returncode == 2
    assert "`dgms.flat.generator`: must return an array (or dict of arrays) with one row per replicate" in proc.stderr
