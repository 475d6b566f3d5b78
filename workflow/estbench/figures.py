"""Figures for the report, drawn with matplotlib and returned as inline SVG text."""

from __future__ import annotations

import io
import re
from typing import Mapping, Sequence

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

# A colour-blind-safe qualitative palette (Okabe & Ito, 2008, "Color Universal Design").
PALETTE = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000", "#F0E442")

matplotlib.rcParams.update({
    "svg.fonttype": "none",        # real text: searchable, selectable, small
    "svg.hashsalt": "estbench",    # deterministic element ids
    "font.size": 9,
    "axes.spines.top": False,
    "axes.spines.right": False,
})


def colours(estimators: Sequence[str]) -> dict[str, str]:
    """One colour per estimator, the same in every figure of a report."""
    return {name: PALETTE[i % len(PALETTE)] for i, name in enumerate(estimators)}


def to_svg(fig) -> str:
    """Serialise *fig* as an inline ``<svg>`` element (no XML prolog, no metadata)."""
    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight",
                metadata={"Creator": None, "Date": None, "Format": None, "Type": None})
    plt.close(fig)
    svg = buf.getvalue()
    svg = svg[svg.index("<svg"):]
    # Inline SVG in HTML needs no namespace declarations; dropping them keeps the
    # page free of any http: reference.
    return re.sub(r'\s+xmlns(:\w+)?="[^"]*"', "", svg, count=0)


def convergence_svg(series: Mapping[str, Mapping[str, dict]], colour: Mapping[str, str],
                    title: str) -> str:
    """Log-log |bias|, empirical SE and RMSE against n, one line per estimator.

    Parameters
    ----------
    series : ``{measure: {estimator: {"n": [...], "value": [...], "mcse": [...]}}}``
        for measures ``bias``, ``empse``, ``rmse``.
    colour : estimator -> colour.
    title : figure title (the DGM and its swept values).
    """
    panels = [("bias", "|bias|"), ("empse", "empirical SE"), ("rmse", "RMSE")]
    fig, axes = plt.subplots(1, 3, figsize=(10, 3.2), constrained_layout=True)
    for ax, (measure, label) in zip(axes, panels):
        all_n, all_v = [], []
        for est, d in series.get(measure, {}).items():
            n = np.asarray(d["n"], float)
            v = np.abs(np.asarray(d["value"], float))
            e = np.asarray(d["mcse"], float)
            lower = np.minimum(e, v * 0.999)  # keep the bar above zero on a log axis
            ax.errorbar(n, v, yerr=[lower, e], marker="o", ms=3.5, lw=1.4, capsize=2,
                        color=colour[est], label=est)
            all_n += list(n)
            all_v += list(v[v > 0])
        if all_n and all_v and measure != "bias":
            n_ref = np.array([min(all_n), max(all_n)])
            anchor = np.median(all_v) * np.sqrt(np.median(all_n))
            ax.plot(n_ref, anchor / np.sqrt(n_ref), ls="--", lw=1, color="#777777",
                    label="∝ n^(−1/2)")
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("sample size n")
        ax.set_title(label)
        ax.grid(True, which="major", lw=0.4, color="#dddddd")
    handles, labels = axes[1].get_legend_handles_labels()
    if handles:
        fig.legend(handles, labels, loc="outside right center", frameon=False)
    fig.suptitle(title, fontsize=10)
    return to_svg(fig)
