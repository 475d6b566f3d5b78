"""Section 6, efficiency: relative efficiency against the reference and against the
Cramér–Rao bound, against n; in the compact layout (many DGM settings) also across the
settings of each DGM."""

from __future__ import annotations

from estbench.report import across
from estbench.report import figures
from estbench.report.figure_queue import FigureQueue
from estbench.report.model import ReportModel
from estbench.report.sections.base import SectionInputs

#: The entry of the page's table of contents.
TITLE = "Efficiency"
#: The name the template gives this section's content.
KEY = "efficiency"


def efficiency(model: ReportModel, queue: FigureQueue) -> dict:
    known = model.options.get("asymptotic_efficiency") or {}
    ref = model.reference
    columns = [{"measure": "crb_efficiency", "title": "efficiency vs CR bound", "hline": 1.0,
                "note": "Efficiency against the Cramér–Rao bound: bound / variance, where the bound is "
                        "known; 1 is the best an unbiased estimator can do."}]
    if ref:
        columns.insert(0, {"measure": "relative_efficiency", "title": f"rel. efficiency vs {ref}", "hline": 1.0,
                           "note": f"Relative efficiency: the variance of {ref} over the estimator's, on "
                                   f"paired replicates; above 1, the estimator is more precise than {ref}."})
    summary = across.figures_per_sweep(model, queue, columns,
                                       "Efficiency against the swept parameter; the dashed line is 1.")
    out = []
    for f in model.shown:
        relative = model.series(f, "relative_efficiency")
        crb = model.series(f, "crb_efficiency")
        if not relative and not crb:
            continue
        asymptotic = {est: per_dgm[f.dgm] for est, per_dgm in known.items() if f.dgm in per_dgm}
        panels = []
        if relative:
            known_line = "; dotted lines are the known large-n values from the study file" if asymptotic else ""
            panels.append(f"relative efficiency, the variance of {model.reference} over the estimator's "
                          f"variance on paired replicates: above 1, an estimator is more precise than "
                          f"{model.reference}{known_line}.")
        if crb:
            panels.append("efficiency against the Cramér–Rao bound, bound / var(θ̂), where the bound is "
                          "known; 1 is the best an unbiased estimator can do.")
        parts = ([f"{side}: {text}" for side, text in zip(("Left", "Right"), panels)] if len(panels) == 2
                 else [panels[0][0].upper() + panels[0][1:]])
        out.append({"title": f.title, "slug": f.slug, "figure": queue.add(
            figures.efficiency_svg, " ".join(parts) + " Bars are ±1 MCSE.", f"Efficiency, {f.title}",
            f"Efficiency against n for {f.title}.", relative=relative, crb=crb, asymptotic=asymptotic,
            styles=model.styles, reference=model.reference, title=f.title)})
    return {"settings": out, "across": summary}


def build(inputs: SectionInputs) -> dict:
    return efficiency(inputs.model, inputs.queue)
