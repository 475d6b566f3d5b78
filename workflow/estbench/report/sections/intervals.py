"""Section 5, intervals: coverage and width against n, and the zip plot of one scenario;
in the compact layout (many DGM settings) also across the settings of each DGM."""

from __future__ import annotations

from estbench.report import across
from estbench.report import data as report_data
from estbench.report import figures
from estbench.report.figure_queue import FigureQueue
from estbench.report.model import ReportModel
from estbench.report.sections.base import SectionInputs
from estbench.report.stats import (nominal_band)

#: The entry of the page's table of contents.
TITLE = "Intervals"
#: The name the template gives this section's content.
KEY = "intervals"

#: Intervals drawn per estimator in the zip plot.
ZIP_LINES = 200


def _zip_scenario(model: ReportModel) -> dict:
    spec = model.options.get("zip") or {}
    dgm = spec.get("dgm", model.scenarios[0]["dgm"])
    rows = [s for s in model.scenarios if s["dgm"] == dgm]
    n = spec.get("n", min(s["n"] for s in rows))
    return min((s for s in rows if s["n"] == n), key=lambda s: s["position"])


def intervals(model: ReportModel, con, queue: FigureQueue) -> dict:
    level = model.level
    n_sim = int(model.study["replicates_run"])
    band = nominal_band(level, n_sim)
    summary = across.figures_per_sweep(
        model, queue, ({"measure": "coverage", "title": "coverage", "hline": level, "band": band},
                       {"measure": "ci_width", "title": "mean interval width"}),
        f"Coverage of the {level:.0%} intervals and their mean width against the swept parameter. The "
        f"dashed line is the nominal level and the grey band level ± 2·√(level(1−level)/{n_sim}) = "
        f"{band[0]:.3f}–{band[1]:.3f}, where coverage falls in about 95% of studies of this size if it is "
        "exactly nominal.")
    sections = []
    for f in model.shown:
        cov = model.series(f, "coverage")
        if not cov:
            continue
        width = model.series(f, "ci_width", list(cov))
        sections.append({"title": f.title, "slug": f.slug, "figure": queue.add(
            figures.coverage_svg,
            f"Left: the share of {level:.0%} intervals that contain the true value, with ±1 MCSE bars; "
            f"the dashed line is the nominal level and the shaded band level ± 2·√(level(1−level)/"
            f"{n_sim}) = {band[0]:.3f}–{band[1]:.3f}, where coverage falls in about 95% of studies of "
            "this size if it is exactly nominal. Right: mean interval width (log–log). Prefer the narrower "
            "interval only among those that cover.",
            f"Coverage and interval width, {f.title}",
            f"Coverage and mean interval width against n for {f.title}.",
            coverage=cov, width=width, styles=model.styles, level=level, band=band, title=f.title)})
    zip_fig = None
    if sections or summary:
        scen = _zip_scenario(model)
        rows = report_data.zip_sample(con, scen["scenario"], ZIP_LINES)
        panels, ranked_by = [], {}
        for est in model.estimator_names():
            r = [x for x in rows if x["estimator"] == est]
            cov = model.row(scen["scenario"], est, "coverage")
            if not r or cov is None:
                continue
            total = r[0]["total"]
            panels.append({"estimator": est, "centile": [100 * x["rank"] / total for x in r],
                           "low": [x["ci_low"] for x in r], "high": [x["ci_high"] for x in r],
                           "covers": [bool(x["covers"]) for x in r], "truth": r[0]["truth"],
                           "coverage": cov["value"], "coverage_mcse": cov["mcse"] or 0.0})
            ranked_by[est] = "|z| = |estimate − truth|/SE" if r[0]["has_se"] else "distance over half-width"
        if panels:
            family = next(f for f in model.families if scen in f.scenarios)
            title = f"{family.title}, n = {scen['n']}"
            per = max(len(p["centile"]) for p in panels)
            no_se = [e for e, how in ranked_by.items() if not how.startswith("|z|")]
            zip_fig = queue.add(
                figures.zip_svg,
                f"Zip plot for {title}: each horizontal line is one replicate's interval, ranked from the "
                f"bottom by |z| = |estimate − truth|/SE (as a centile); non-covering intervals are in "
                f"colour, covering ones grey. With nominal coverage the coloured lines start at the dashed "
                f"line ({level:.0%}); more colour below it means under-coverage, and coloured lines "
                f"leaning to one side of the true value mean bias. About {per} of the replicates per "
                "estimator are drawn (every k-th rank, chosen in the store)."
                + (f" Without an SE ({', '.join(no_se)}), intervals are ranked by the distance to the truth "
                   "over the interval's half-width on that side, which is ≤ 1 exactly when the interval "
                   "covers." if no_se else ""),
                f"Zip plot, {title}",
                f"Zip plot of interval coverage for {title}, one panel per estimator.",
                panels=panels, styles=model.styles, level=level, title=title)
    return {"families": sections, "across": summary, "zip": zip_fig, "band": band, "n_sim": n_sim}


# ------------------------------------------------------------------ efficiency


def build(inputs: SectionInputs) -> dict:
    return intervals(inputs.model, inputs.con, inputs.queue)
