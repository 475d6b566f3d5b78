"""Figures across the settings of a DGM, for studies in the compact layout.

For each DGM with several settings (``model.Sweep``) and each estimand, a
measure is drawn against the swept parameter (or the setting's number): one
line per estimator with a ±2 MCSE band, one panel per measure and sample size
(at most ``model.ACROSS_SIZES`` sample sizes, spread over the study's).
"""

from __future__ import annotations

from typing import Sequence

from estbench.report import figures
from estbench.report.figure_queue import FigureQueue
from estbench.report.model import ACROSS_SIZES, ReportModel, Sweep, spread


def title_of(model: ReportModel, sweep: Sweep, target: str) -> str:
    """'normal across loc — sd' (the estimand only when the study has several)."""
    across = f"across {sweep.parameter}" if sweep.parameter else f"across its {len(sweep.families)} settings"
    return f"{sweep.dgm} {across}" + (f" — {target}" if len(model.targets()) > 1 else "")


def sizes_text(sweep: Sweep, sizes: Sequence[int]) -> str:
    """What the rows of panels are, and whether some sample sizes were left out."""
    text = "one row of panels per sample size"
    if len(sizes) < len(sweep.sample_sizes):
        text += (f" (n = {', '.join(map(str, sizes))}: {len(sizes)} of the study's "
                 f"{len(sweep.sample_sizes)}; every value is in the table and performance.csv)")
    return text


def measures_figure(model: ReportModel, queue: FigureQueue, sweep: Sweep, target: str,
                    columns: Sequence[dict], caption: str) -> dict | None:
    """Queue one figure of *columns* (dicts with ``measure``, ``title`` and optionally
    ``hline``, ``band`` and ``note``, a sentence for the caption) for the estimators
    of *target*; None when none has a value.

    *caption* says what to look for; the notes of the columns drawn and the
    figure's layout are added to it.
    """
    names = model.estimator_names(target)
    sizes = spread(sweep.sample_sizes, ACROSS_SIZES)
    series = {(c["measure"], n): model.series_across(sweep, c["measure"], n, names)
              for c in columns for n in sizes}
    kept = [c for c in columns if any(series[(c["measure"], n)] for n in sizes)]
    if not kept:
        return None
    panels = [{"title": f"{c['title']}, n = {n}", "series": series[(c["measure"], n)],
               "hline": c.get("hline"), "band": c.get("band")} for n in sizes for c in kept]
    title = title_of(model, sweep, target)
    what = ", ".join(c["title"] for c in kept)
    notes = "".join(f" {c['note']}" for c in kept if c.get("note"))
    layout = (f" Each line is one estimator across the {len(sweep.families)} settings of {sweep.dgm} "
              f"(x axis: {sweep.label}), with a shaded band of ±2 MCSE; {sizes_text(sweep, sizes)}.")
    return queue.add(figures.across_settings_svg, caption + notes + layout, f"{what}, {title}",
                     f"{what} against {sweep.label} for {sweep.dgm}, one line per estimator of {target}.",
                     panels=panels, styles=model.styles, columns=len(kept), title=title,
                     xlabel=sweep.label, log_x=sweep.log, band_label="±2 MCSE")


def figures_per_sweep(model: ReportModel, queue: FigureQueue, columns: Sequence[dict],
                      caption: str) -> list[dict]:
    """:func:`measures_figure` for every DGM with several settings and every estimand."""
    out = []
    for sweep in model.sweeps:
        for target in model.targets():
            figure = measures_figure(model, queue, sweep, target, columns, caption)
            if figure is not None:
                out.append(figure)
    return out
