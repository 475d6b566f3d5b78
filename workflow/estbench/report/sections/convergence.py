"""Section 4, convergence in n: error against n on log-log axes, fitted rates, sampling
distributions of the error, root-n scaled errors and exceedance shares.

Histograms and quantiles are aggregated in SQL over the estimates (``report.data``), for
the settings drawn in full only. In the compact layout (many DGM settings) the fitted
exponents of every setting are drawn across the settings of each DGM."""

from __future__ import annotations

import math

import numpy as np

from estbench.report import across
from estbench.report import data as report_data
from estbench.report import figures
from estbench.report.figure_queue import FigureQueue
from estbench.report.model import Family, ReportModel, Sweep, spread_sample_sizes
from estbench.report.sections.base import SectionInputs
from estbench.report.stats import PowerLawFit, power_law_fit

#: The entry of the page's table of contents.
TITLE = "Convergence in n"
#: The name the template gives this section's content.
KEY = "convergence"

#: Histogram bins between the 0.5% and 99.5% quantiles of the errors (widened by 5%),
#: the quantiles taken over about QUANTILE_SAMPLE replicates per scenario x estimator.
BINS = 40
ERROR_QUANTILES = (0.005, 0.995)
QUANTILE_SAMPLE = 20_000
#: Sample sizes drawn in the sampling-distribution figures.
HISTOGRAM_PANELS = 6


#: The measures whose rate in n is fitted.
RATE_MEASURES = (("empirical_se", "empirical SE"), ("rmse", "RMSE"))


def _fits(model: ReportModel, family: Family, est: str) -> dict[str, PowerLawFit | None]:
    """The power-law fit of each of RATE_MEASURES along the family's n."""
    fits = {}
    for measure, _ in RATE_MEASURES:
        d = model.series(family, measure, [est]).get(est)
        fits[measure] = d and power_law_fit(d["n"], d["value"], d["mcse"])
    return fits


def _rate_rows(model: ReportModel, family: Family) -> list[dict]:
    rows = []
    for est in model.estimator_names():
        fits = _fits(model, family, est)
        if any(fits.values()):
            rows.append({"estimator": est, **fits})
    return rows


def _exponents_figure(model: ReportModel, queue: FigureQueue, sweep: Sweep, target: str) -> dict | None:
    """The fitted exponents b of every setting of *sweep*, across the settings."""
    names = model.estimator_names(target)
    fits = {(f.slug, est): _fits(model, f, est) for f in sweep.families for est in names}
    panels = []
    for measure, name in RATE_MEASURES:
        series = {}
        for est in names:
            d = {"x": [], "value": [], "mcse": []}
            for x, f in zip(sweep.x, sweep.families):
                fit = fits[(f.slug, est)][measure]
                if fit:
                    d["x"].append(x)
                    d["value"].append(fit.exponent)
                    d["mcse"].append(fit.se)
            if d["x"]:
                series[est] = d
        if series:
            panels.append({"title": f"{name}: exponent b", "series": series, "hline": -0.5})
    if not panels:
        return None
    title = across.title_of(model, sweep, target)
    return queue.add(
        figures.across_settings_svg,
        f"The exponent b of empirical SE ∝ n^b and RMSE ∝ n^b fitted at each of the "
        f"{len(sweep.families)} settings of {sweep.dgm} (x axis: {sweep.label}) over n = "
        f"{', '.join(map(str, sweep.sample_sizes))}, with a shaded band of ±2 standard errors of b. The "
        "dashed line is the usual root-n rate, b = −0.5; an RMSE exponent above the SE's is a bias that shrinks "
        "more slowly than the SE.",
        f"Rates in n, {title}",
        f"Fitted exponents of n for empirical SE and RMSE against {sweep.label} for {sweep.dgm}.",
        panels=panels, styles=model.styles, columns=len(panels), title=title, xlabel=sweep.label,
        log_x=sweep.log, band_label="±2 SE of b")


def _keys(model: ReportModel) -> list[dict]:
    """Every scenario x estimator with a true value, in the settings drawn in full: the
    rows the estimate queries join to."""
    out = []
    for scen in (s for f in model.shown for s in f.scenarios):
        for est in model.estimator_names():
            truth = model.truth(scen["scenario"], model.target_of(est))
            if truth is not None and math.isfinite(truth["value"]):
                out.append({"scenario": scen["scenario"], "estimator": est, "target": model.target_of(est),
                            "truth": truth["value"]})
    return out


def _columns(rows: list[dict], names) -> dict:
    return {k: [r[k] for r in rows] for k in names}


def _bins(quantile: dict) -> tuple[float, float]:
    """Left edge and width of BINS bins over the quantile range widened by 5% each side."""
    lo, hi = quantile["lo"], quantile["hi"]
    span = hi - lo
    if not span > 0:                       # all errors (nearly) equal
        span = max(abs(lo), 1.0) * 0.02
        lo -= span / 2
    return lo - 0.05 * span, 1.1 * span / BINS


def _histograms(model: ReportModel, con, tolerances: dict) -> dict:
    """Histogram counts and exceedances per scenario x estimator, from one SQL pass.

    Returns ``{"edges": {(scenario, target): array}, "counts": {(scenario,
    estimator): array of BINS + 2}, "beyond": {(scenario, estimator): count}}``;
    *tolerances* maps (scenario, target) to the tolerance (or None).
    """
    keys = _keys(model)
    if not keys:
        return {"edges": {}, "counts": {}, "beyond": {}}
    every = max(1, int(model.study["replicates_run"]) // QUANTILE_SAMPLE)
    quantiles = report_data.error_quantiles(con, _columns(keys, ("scenario", "estimator", "target", "truth")),
                                            *ERROR_QUANTILES, every)
    grid = {(q["scenario"], q["target"]): _bins(q) for q in quantiles if q["lo"] is not None}
    rows = []
    for k in keys:
        if (k["scenario"], k["target"]) in grid:
            lo, width = grid[(k["scenario"], k["target"])]
            tol = tolerances.get((k["scenario"], k["target"]))
            rows.append({**k, "lo": lo, "width": width, "bins": BINS,
                         "tolerance": math.nan if tol is None else tol})
    counts, beyond = {}, {}
    names = ("scenario", "estimator", "truth", "lo", "width", "bins", "tolerance")
    for r in report_data.error_histograms(con, _columns(rows, names)):
        key = (r["scenario"], r["estimator"])
        counts.setdefault(key, np.zeros(BINS + 2))[r["bin"] + 1] = r["k"]
        beyond[key] = beyond.get(key, 0) + r["beyond"]
    edges = {key: lo + width * np.arange(BINS + 1) for key, (lo, width) in grid.items()}
    return {"edges": edges, "counts": counts, "beyond": beyond}


def _density(hist: dict, scenario: str, estimator: str, target: str):
    k = hist["counts"].get((scenario, estimator))
    e = hist["edges"].get((scenario, target))
    if k is None or e is None:
        return None
    total = k.sum()
    return {"edges": e, "density": k[1:-1] / (total * (e[1] - e[0])), "outside": (k[0] + k[-1]) / total}


def _tolerance(model: ReportModel, family: Family, target: str) -> tuple[float | None, str]:
    """The tolerance for *target* and where it comes from."""
    option = model.options.get("tolerance")
    if isinstance(option, (int, float)):
        return float(option), "set in the study file"
    if isinstance(option, dict) and target in option:
        return float(option[target]), "set in the study file"
    names = model.estimator_names(target)
    pick = model.reference if model.reference in names else names[0]
    smallest = family.scenarios[0]
    value = model.value(smallest["scenario"], pick, "empirical_se")
    if value is None or not value > 0:
        return None, ""
    return value, f"default: the empirical SE of {pick} at n = {smallest['n']}"


def convergence(model: ReportModel, con, queue: FigureQueue) -> dict:
    tolerances = {(f.slug, t): _tolerance(model, f, t) for f in model.shown for t in model.targets()}
    hist = _histograms(model, con, {(s["scenario"], t): tolerances[(f.slug, t)][0]
                                    for f in model.shown for s in f.scenarios for t in model.targets()})
    summary = [figure for sweep in model.sweeps if len(sweep.sample_sizes) > 1 for t in model.targets()
               if (figure := _exponents_figure(model, queue, sweep, t)) is not None]
    sections = []
    for f in model.shown:
        sec = {"title": f.title, "slug": f.slug, "curves": None, "rates": [], "figures": [],
               "several_n": len(f.scenarios) > 1}
        if sec["several_n"]:
            series = {m: model.series(f, m) for m in ("bias", "empirical_se", "rmse")}
            anchor = model.reference or model.estimator_names()[0]
            sec["curves"] = queue.add(
                figures.convergence_svg,
                "Absolute bias, empirical SE and RMSE against the sample size on log–log axes, with "
                "±1 MCSE bars. A line parallel to the dashed guide falls at the usual n^(−1/2) "
                "rate; a hollow marker is a bias within 2 MCSE of zero, i.e. not distinguishable from "
                "none. RMSE that levels off while the SE keeps falling is bias that does not vanish.",
                f"Convergence in n for {f.title}",
                f"Log-log plots of absolute bias, empirical SE and RMSE against n for {f.title}, "
                "one line per estimator.",
                series=series, styles=model.styles, title=f.title, anchor=anchor)
            sec["rates"] = _rate_rows(model, f)
        for target in model.targets():
            sec["figures"] += _distribution_figures(model, f, target, hist, queue)
            tol, source = tolerances[(f.slug, target)]
            ex = _exceedance_series(model, f, target, hist)
            if tol is not None and ex:
                sec["figures"].append(queue.add(
                    figures.exceedance_svg,
                    f"Share of replicates whose estimate misses the true {target} by more than "
                    f"t = {tol:.3g} ({source}), against n, with ±1 MCSE bars √(P(1−P)/replicates). "
                    "For a consistent estimator it falls to zero; the lower line reaches a given "
                    "accuracy with fewer observations.",
                    f"Probability of missing by more than the tolerance, {f.title}",
                    f"Probability that the error exceeds {tol:.3g} against n for {f.title}.",
                    panels=[{"target": target, "tolerance": tol, "series": ex}], styles=model.styles,
                    title=f.title))
        sections.append(sec)
    return {"across": summary, "settings": sections}


def _exceedance_series(model: ReportModel, family: Family, target: str, hist: dict) -> dict:
    """P(|θ̂ − θ| > tolerance) with its binomial MCSE along n, per estimator of *target*."""
    out = {}
    for est in model.estimator_names(target):
        d = {"n": [], "value": [], "mcse": []}
        for s in family.scenarios:
            total = hist["counts"].get((s["scenario"], est))
            if total is None or not total.sum():
                continue
            share = hist["beyond"][(s["scenario"], est)] / total.sum()
            d["n"].append(s["n"])
            d["value"].append(share)
            d["mcse"].append(math.sqrt(share * (1 - share) / total.sum()))
        if d["n"]:
            out[est] = d
    return out


def _distribution_figures(model, family, target, hist, queue: FigureQueue) -> list[dict]:
    names = model.estimator_names(target)
    sizes = spread_sample_sizes(family.sample_sizes, HISTOGRAM_PANELS)
    by_n = {s["n"]: s for s in family.scenarios}
    panels, worst_outside = [], 0.0
    for n in sizes:
        dens = {}
        for est in names:
            d = _density(hist, by_n[n]["scenario"], est, target)
            if d is not None:
                dens[est] = d
                worst_outside = max(worst_outside, d["outside"])
        if dens:
            panels.append({"n": n, "edges": next(iter(dens.values()))["edges"],
                           "density": {e: d["density"] for e, d in dens.items()}, "parts": dens})
    if not panels:
        return []
    suffix = f" — {target}" if len(model.targets()) > 1 else ""
    shown = ", ".join(str(p["n"]) for p in panels)
    out = [queue.add(
        figures.error_histograms_svg,
        f"Sampling distribution of the error (estimate − true {target}) at each n, from {BINS} bins "
        f"spanning the 0.5%–99.5% range of all estimators' errors (at most {worst_outside:.1%} of any "
        "estimator's replicates fall outside the drawn range). Look for centring on zero (bias), spread, "
        "skewness and heavy tails, and how they change with n.",
        f"Sampling distributions of the error, {family.title}",
        f"Histograms of the estimation error at n = {shown} for {family.title}.",
        panels=panels, styles=model.styles, title=family.title + suffix, target=target)]
    scaled = []
    n_max = panels[-1]["n"]
    for est in names:
        curves = [{"n": p["n"], "edges": p["parts"][est]["edges"] * math.sqrt(p["n"]),
                   "density": p["parts"][est]["density"] / math.sqrt(p["n"])}
                  for p in panels if est in p["parts"]]
        if not curves:
            continue
        empirical_se = model.value(by_n[n_max]["scenario"], est, "empirical_se")
        t = model.truth(by_n[n_max]["scenario"], target)
        crb = t["crb"] if t and t["crb"] is not None and math.isfinite(t["crb"]) else None
        scaled.append({"estimator": est, "curves": curves,
                       "sd": empirical_se * math.sqrt(n_max) if empirical_se else None,
                       "crb_sd": math.sqrt(crb * n_max) if crb else None})
    if len(panels) > 1 and scaled:
        out.append(queue.add(
            figures.scaled_errors_svg,
            f"The error scaled by √n at each n (lighter lines: smaller n). For an estimator with a "
            f"normal limit the curves settle on one shape: the grey normal curve has the SD of "
            f"√n·(estimate − true {target}) at the largest n (n = {n_max}); the dotted one, where "
            "the Cramér–Rao bound is known, is the narrowest any unbiased estimator can reach. "
            "Curves that drift sideways carry a bias that shrinks more slowly than 1/√n.",
            f"Root-n scaled errors, {family.title}",
            f"Densities of root-n scaled errors at n = {shown} for {family.title}, one panel per "
            "estimator, with the normal curve they approach.",
            panels=scaled, styles=model.styles, title=family.title + suffix, target=target))
    return out


# ------------------------------------------------------------------ intervals


def build(inputs: SectionInputs) -> dict:
    return convergence(inputs.model, inputs.con, inputs.queue)
