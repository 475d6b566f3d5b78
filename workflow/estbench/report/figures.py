"""Figures for the report, drawn with matplotlib and returned as inline SVG text.

Every function takes small, already aggregated numbers (one point per
scenario x estimator, or histogram counts) and returns one ``<svg>`` element
that carries ``role="img"`` and an ``aria-label``. Each estimator keeps its
colour, marker and line style in every figure (``styles.estimator_styles``).
"""

from __future__ import annotations

import html
import io
import math
import re
from typing import Mapping, Sequence

import matplotlib

matplotlib.use("Agg")
import numpy as np  # noqa: E402
from matplotlib.collections import LineCollection  # noqa: E402
from matplotlib.colors import to_rgb  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter, NullLocator  # noqa: E402

from estbench.report.styles import Style  # noqa: E402

GUIDE = "#777777"
COVERING_GREY = "#c9ced3"

matplotlib.rcParams.update({
    "svg.fonttype": "none",        # real text: searchable, selectable, small
    "svg.hashsalt": "estbench",    # deterministic element ids
    "font.size": 9,
    "font.family": ["DejaVu Sans", "sans-serif"],
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.titlesize": 9.5,
    "legend.fontsize": 8.5,
})


_ID = re.compile(r'\bid="([^"]+)"')
_PATH_DATA = re.compile(r' d="[^"]*"')
_FINE_DIGITS = re.compile(r"(\d\.\d\d)\d+")


def to_svg(fig: Figure, label: str, uid: str) -> str:
    """Serialise *fig* as an inline ``<svg>`` element labelled for screen readers.

    Element ids get the prefix *uid*, so figures on one page never share an
    id; namespace declarations are dropped (inline SVG in HTML needs none),
    which keeps the page free of any http: reference. Path coordinates keep
    two decimals of a point (1/7200 inch): more is invisible and only makes
    the page larger.
    """
    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Creator": None, "Date": None, "Format": None, "Type": None})
    svg = buf.getvalue()
    svg = svg[svg.index("<svg"):]
    svg = re.sub(r'\s+xmlns(:\w+)?="[^"]*"', "", svg)
    svg = _PATH_DATA.sub(lambda m: _FINE_DIGITS.sub(r"\1", m.group(0)), svg)
    ids = set(_ID.findall(svg))
    svg = _ID.sub(lambda m: f'id="{uid}-{m.group(1)}"', svg)
    svg = re.sub(r"(url\(#|href=\"#)([^)\"]+)",
                 lambda m: m.group(1) + (f"{uid}-{m.group(2)}" if m.group(2) in ids else m.group(2)), svg)
    return svg.replace("<svg", f'<svg role="img" aria-label="{html.escape(label, quote=True)}"', 1)


#: Margins in inches around a grid of panels (no layout engine: it costs more
#: than the drawing itself).
_LEFT, _BOTTOM, _TOP, _LEGEND = 0.62, 0.5, 0.62, 1.7
_GAP_X, _GAP_Y = 0.62, 0.78


def _panels(count: int, columns: int, *, panel_width: float, panel_height: float, title: str,
            legend: bool) -> tuple[Figure, list]:
    """A figure holding *count* axes in rows of *columns*, room on the right
    for a legend when *legend*, and *title* on top."""
    rows = -(-count // columns)
    width = _LEFT + columns * panel_width + (columns - 1) * _GAP_X + (_LEGEND if legend else 0.25)
    height = _BOTTOM + rows * panel_height + (rows - 1) * _GAP_Y + _TOP
    fig = Figure(figsize=(width, height))
    fig.subplots_adjust(left=_LEFT / width, right=1 - (_LEGEND if legend else 0.25) / width,
                        bottom=_BOTTOM / height, top=1 - _TOP / height,
                        wspace=_GAP_X / panel_width, hspace=_GAP_Y / panel_height)
    axes = fig.subplots(rows, columns, squeeze=False).ravel()
    for ax in axes[count:]:
        ax.remove()
    fig.suptitle(title, fontsize=10, y=1 - 0.1 / height, va="top")
    return fig, list(axes[:count])


def _dodge(i: int, k: int, step: float = 0.025) -> float:
    """Multiplicative x offset so error bars of k series at one n do not overlap."""
    return math.exp(step * (i - (k - 1) / 2))


def _lines_in_n(ax, series: Mapping[str, Mapping], styles: Mapping[str, Style], *,
                absolute: bool = False, log_y: bool = False, hollow_within: float | None = None) -> None:
    """One line per estimator with ±1 MCSE bars; ``series[est]`` = {n, value, mcse}.

    With *hollow_within*, points whose |value| is within that many MCSEs of
    zero are drawn hollow (indistinguishable from 0).
    """
    names = list(series)
    for i, est in enumerate(names):
        d, st = series[est], styles[est]
        n = np.asarray(d["n"], float)
        v = np.asarray(d["value"], float)
        e = np.nan_to_num(np.asarray(d["mcse"], float))
        if absolute:
            v = np.abs(v)
        lower = np.minimum(e, v * 0.999) if log_y else e   # keep bars above 0 on a log axis
        x = n * _dodge(i, len(names))
        ax.errorbar(x, v, yerr=[lower, e], color=st.colour, marker=st.marker, ls=st.line, ms=4,
                    lw=1.3, capsize=2, elinewidth=0.9, label=est,
                    mfc="white" if hollow_within else st.colour)
        if hollow_within:
            solid = np.abs(v) > hollow_within * e
            ax.plot(x[solid], v[solid], ls="none", marker=st.marker, ms=4, color=st.colour)
    ax.set_xscale("log")
    if log_y:
        ax.set_yscale("log")
        _log_ticks(ax, np.concatenate([np.abs(np.asarray(d["value"], float)) for d in series.values()])
                   if series else np.array([]))
    ax.grid(True, which="major", lw=0.4, color="#e2e5e8")
    ax.set_xlabel("sample size n")


def _log_ticks(ax, values: np.ndarray) -> None:
    """Readable ticks on a log y axis: 1-2-5 steps within two decades, plain
    numbers; the axis starts a little below the smallest value, so a bar
    reaching down to zero runs off the bottom instead of stretching it."""
    values = values[np.isfinite(values) & (values > 0)]
    if not values.size:
        return
    low, high = values.min(), values.max()
    ax.set_ylim(low / 2.5, high * 1.6)
    few = math.log10(high / low) < 2
    ax.yaxis.set_major_locator(LogLocator(subs=(1, 2, 5) if few else (1,), numticks=8))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    ax.yaxis.set_minor_formatter(NullFormatter())


def _n_ticks(ax, n_values: Sequence[int]) -> None:
    """Label the sample sizes themselves on a log x axis."""
    ticks = sorted(set(int(n) for n in n_values))
    ax.set_xticks(ticks, [str(t) for t in ticks])
    ax.xaxis.set_minor_locator(NullLocator())


def _legend(fig: Figure, styles: Mapping[str, Style], names: Sequence[str], extra=(),
            markers: bool = True) -> None:
    """Estimators (and *extra* handles) in the space _panels keeps on the right; their
    markers only if the lines have them."""
    handles = [Line2D([], [], color=st.colour, marker=st.marker if markers else "None", ls=st.line, ms=4,
                      label=name) for name, st in styles.items() if name in names]   # in study order
    width = fig.get_size_inches()[0]
    fig.legend(handles=[*handles, *extra], loc="center left", frameon=False,
               bbox_to_anchor=(1 - (_LEGEND - 0.12) / width, 0.5))


def convergence_svg(series: Mapping[str, Mapping[str, dict]], styles: Mapping[str, Style],
                    title: str, anchor: str | None, label: str, uid: str) -> str:
    """Log-log |bias|, empirical SE and RMSE against n, one line per estimator.

    Parameters
    ----------
    series : ``{measure: {estimator: {"n": [...], "value": [...], "mcse": [...]}}}``
        for measures ``bias``, ``empirical_se``, ``rmse``.
    styles : estimator -> Style.
    title : figure title (the DGM and its swept values).
    anchor : estimator whose value at the smallest n the n^(−1/2) guide passes through.
    label, uid : text alternative and id prefix of the SVG.
    """
    panels = [("bias", "|bias|"), ("empirical_se", "empirical SE"), ("rmse", "RMSE")]
    fig, axes = _panels(3, 3, panel_width=2.55, panel_height=2.3, title=title, legend=True)
    names, all_n = [], []
    for ax, (measure, panel_title) in zip(axes, panels):
        data = series.get(measure, {})
        _lines_in_n(ax, data, styles, absolute=True, log_y=True,
                    hollow_within=2.0 if measure == "bias" else None)
        for est, d in data.items():
            names += [est] if est not in names else []
            all_n += list(d["n"])
        guide = data.get(anchor) or next(iter(data.values()), None)
        if measure != "bias" and guide and len(guide["n"]) > 1:
            n0, v0 = guide["n"][0], abs(guide["value"][0])
            n_ref = np.array([min(guide["n"]), max(guide["n"])], float)
            ax.plot(n_ref, v0 * np.sqrt(n0 / n_ref), ls=(0, (4, 3)), lw=1, color=GUIDE)
        ax.set_title(panel_title)
        if all_n:
            _n_ticks(ax, all_n)
    guide_handle = Line2D([], [], ls=(0, (4, 3)), lw=1, color=GUIDE, label="∝ n^(−1/2)")
    hollow = Line2D([], [], ls="none", marker="o", mfc="white", color="#444444", ms=4,
                    label="|bias| < 2 MCSE")
    _legend(fig, styles, names, (guide_handle, hollow))
    return to_svg(fig, label, uid)


def error_histograms_svg(panels: Sequence[dict], styles: Mapping[str, Style], title: str,
                         target: str, label: str, uid: str) -> str:
    """Histograms of θ̂ − θ, one panel per sample size, one outline per estimator.

    ``panels``: ``[{"n": n, "edges": array, "density": {estimator: array}}]``.
    """
    fig, axes = _panels(len(panels), min(len(panels), 3), panel_width=2.55, panel_height=1.7,
                        title=title, legend=True)
    names = []
    for ax, p in zip(axes, panels):
        for est, dens in p["density"].items():
            st = styles[est]
            ax.plot(*_steps(p["edges"], dens), color=st.colour, ls=st.line, lw=1.3, label=est)
            names += [est] if est not in names else []
        ax.axvline(0, color=GUIDE, lw=0.8, ls=(0, (4, 3)))
        ax.set_title(f"n = {p['n']}")
        ax.set_xlabel(f"estimate − true {target}")
        ax.set_yticks([])
        ax.spines["left"].set_visible(False)
    _legend(fig, styles, names)
    return to_svg(fig, label, uid)


def _steps(edges: np.ndarray, heights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The outline of a histogram as one polyline (cheaper to draw than a patch)."""
    return np.repeat(edges, 2)[1:-1], np.repeat(heights, 2)


def _shade(colour: str, lightness: float) -> tuple:
    """*colour* mixed with white; lightness 0 = the colour itself, 1 = white."""
    rgb = np.array(to_rgb(colour))
    return tuple(rgb + (1 - rgb) * lightness)


def scaled_errors_svg(panels: Sequence[dict], styles: Mapping[str, Style], title: str,
                      target: str, label: str, uid: str) -> str:
    """Densities of √n·(θ̂ − θ), one panel per estimator, lighter lines for smaller n.

    ``panels``: ``[{"estimator": e, "curves": [{"n", "edges", "density"}], "sd": float,
    "crb_sd": float | None}]`` with edges already multiplied by √n. The normal
    curve N(0, sd²) is drawn solid grey, the Cramér–Rao one dotted.
    """
    fig, axes = _panels(len(panels), min(len(panels), 3), panel_width=2.55, panel_height=1.9,
                        title=title, legend=True)
    sizes = []
    for ax, p in zip(axes, panels):
        st = styles[p["estimator"]]
        curves = p["curves"]
        for j, c in enumerate(curves):
            shade = _shade(st.colour, _lightness(j, len(curves)))
            ax.plot(*_steps(c["edges"], c["density"]), color=shade, lw=1.2)
            sizes += [c["n"]] if c["n"] not in sizes else []
        lo = min(c["edges"][0] for c in curves)
        hi = max(c["edges"][-1] for c in curves)
        x = np.linspace(lo, hi, 200)
        for sd, line in ((p["sd"], "-"), (p.get("crb_sd"), ":")):
            if sd and sd > 0:
                ax.plot(x, np.exp(-0.5 * (x / sd) ** 2) / (sd * math.sqrt(2 * math.pi)),
                        color="#333333", lw=1.1, ls=line)
        ax.set_title(p["estimator"], color=st.colour)
        ax.set_xlabel(f"√n · (estimate − true {target})")
        ax.set_yticks([])
        ax.spines["left"].set_visible(False)
    handles = [Line2D([], [], color=_shade("#333333", _lightness(j, len(sizes))), lw=1.4, label=f"n = {n}")
               for j, n in enumerate(sorted(sizes))]
    handles.append(Line2D([], [], color="#333333", lw=1.1, label="normal with the\nSD at the largest n"))
    if any(p.get("crb_sd") for p in panels):
        handles.append(Line2D([], [], color="#333333", lw=1.1, ls=":",
                              label="normal with the\nCramér–Rao SD"))
    width = fig.get_size_inches()[0]
    fig.legend(handles=handles, loc="center left", frameon=False,
               bbox_to_anchor=(1 - (_LEGEND - 0.12) / width, 0.5))
    return to_svg(fig, label, uid)


def _lightness(j: int, k: int) -> float:
    """How much white the j-th of k sample sizes gets: the largest n none."""
    return 0.75 * (1 - j / max(k - 1, 1))


def exceedance_svg(panels: Sequence[dict], styles: Mapping[str, Style], title: str,
                   label: str, uid: str) -> str:
    """P(|θ̂ − θ| > t) against n, one panel per estimand, ±1 MCSE bars.

    ``panels``: ``[{"target": estimand, "tolerance": t, "series": {est: {n, value, mcse}}}]``.
    """
    fig, axes = _panels(len(panels), len(panels), panel_width=3.4, panel_height=2.2, title=title,
                        legend=True)
    names, all_n = [], []
    for ax, p in zip(axes, panels):
        _lines_in_n(ax, p["series"], styles)
        for est, d in p["series"].items():
            names += [est] if est not in names else []
            all_n += list(d["n"])
        ax.set_ylim(bottom=0)
        ax.set_title(f"P(|estimate − true {p['target']}| > {p['tolerance']:.3g})")
        _n_ticks(ax, all_n)
    _legend(fig, styles, names)
    return to_svg(fig, label, uid)


def coverage_svg(coverage: Mapping[str, dict], width: Mapping[str, dict], styles: Mapping[str, Style],
                 level: float, band: tuple[float, float], title: str, label: str, uid: str) -> str:
    """Coverage against n with the nominal line and its ±2 MCSE band; mean
    interval width against n on log–log axes."""
    fig, (ax_c, ax_w) = _panels(2, 2, panel_width=3.4, panel_height=2.3, title=title, legend=True)
    ax_c.axhspan(*band, color="#e8ebee", lw=0)
    ax_c.axhline(level, color=GUIDE, lw=1, ls=(0, (4, 3)))
    _lines_in_n(ax_c, coverage, styles)
    _lines_in_n(ax_w, width, styles, log_y=True)
    all_n = [n for d in coverage.values() for n in d["n"]]
    for ax in (ax_c, ax_w):
        _n_ticks(ax, all_n)
    ax_c.set_title("coverage")
    ax_w.set_title("mean interval width")
    nominal = Line2D([], [], ls=(0, (4, 3)), lw=1, color=GUIDE, label=f"nominal {level:g}")
    shaded = Patch(color="#e8ebee", label="nominal ± 2 MCSE")
    _legend(fig, styles, list(coverage), (nominal, shaded))
    return to_svg(fig, label, uid)


def zip_svg(panels: Sequence[dict], styles: Mapping[str, Style], level: float, title: str,
            label: str, uid: str) -> str:
    """Intervals ranked by |z|, drawn as horizontal lines, non-covering ones in colour.

    ``panels``: ``[{"estimator", "centile": array (0–100), "low", "high",
    "covers": bool array, "truth", "coverage", "coverage_mcse"}]``.
    """
    fig, axes = _panels(len(panels), min(len(panels), 3), panel_width=2.55, panel_height=3.0,
                        title=title, legend=False)
    for ax, p in zip(axes, panels):
        st = styles[p["estimator"]]
        y = np.asarray(p["centile"], float)
        lo, hi = np.asarray(p["low"], float), np.asarray(p["high"], float)
        covers = np.asarray(p["covers"], bool)
        far = 1e6 * (1 + np.nanmax(np.abs(np.where(np.isfinite(lo), lo, 0))))
        lo, hi = np.clip(lo, -far, far), np.clip(hi, -far, far)   # unbounded intervals run off the axis
        segments = np.stack([np.column_stack([lo, y]), np.column_stack([hi, y])], axis=1)
        ax.add_collection(LineCollection(segments, colors=np.where(covers[:, None], np.array(
            [to_rgb(COVERING_GREY)]), np.array([to_rgb(st.colour)])), linewidths=np.where(covers, 0.7, 1.3)))
        ax.axvline(p["truth"], color="#222222", lw=0.9)
        ax.axhline(100 * level, color=GUIDE, lw=1, ls=(0, (4, 3)))
        ends = np.abs(np.concatenate([lo, hi]) - p["truth"])
        ends = ends[ends < 0.5 * far]
        span = float(np.percentile(ends, 99)) if ends.size and np.percentile(ends, 99) > 0 else 1.0
        ax.set_xlim(p["truth"] - 1.05 * span, p["truth"] + 1.05 * span)
        ax.set_ylim(0, 100)
        ax.set_title(f"{p['estimator']}\ncoverage {p['coverage']:.3f} (MCSE {p['coverage_mcse']:.2g})",
                     color=st.colour, fontsize=9)
        ax.set_xlabel("interval (vertical line: true value)")
        ax.set_ylabel("centile of |z|")
    return to_svg(fig, label, uid)


def efficiency_svg(relative: Mapping[str, dict], crb: Mapping[str, dict], asymptotic: Mapping[str, float],
                   styles: Mapping[str, Style], reference: str | None, title: str,
                   label: str, uid: str) -> str:
    """Relative efficiency against the reference and efficiency against the
    Cramér–Rao bound, both against n with ±1 MCSE bars; known large-n
    relative efficiencies as dashed lines in the estimator's colour."""
    panels = [p for p in (("relative", relative), ("crb", crb)) if p[1]]
    fig, axes = _panels(len(panels), len(panels), panel_width=3.4, panel_height=2.3, title=title,
                        legend=True)
    names, all_n = [], []
    for ax, (kind, series) in zip(axes, panels):
        _lines_in_n(ax, series, styles)
        for est, d in series.items():
            names += [est] if est not in names else []
            all_n += list(d["n"])
        ax.axhline(1, color=GUIDE, lw=1, ls=(0, (4, 3)))
        if kind == "relative":
            ax.set_title(f"relative efficiency vs {reference}")
            for est, value in asymptotic.items():
                if est in series:
                    ax.axhline(value, color=styles[est].colour, lw=1, ls=(0, (1.5, 2)))
                    ax.annotate(f"{value:.3g} as n → ∞", (1, value), xycoords=("axes fraction", "data"),
                                ha="right", va="bottom", fontsize=7.5, color=styles[est].colour)
        else:
            ax.set_title("efficiency vs Cramér–Rao bound")
        _n_ticks(ax, all_n)
    _legend(fig, styles, names)
    return to_svg(fig, label, uid)


#: Points per line above which a figure across settings draws the line without markers.
MARKED_POINTS = 30
BAND_ALPHA = 0.18


def across_settings_svg(panels: Sequence[dict], styles: Mapping[str, Style], columns: int, title: str,
                        xlabel: str, log_x: bool, band_label: str, label: str, uid: str) -> str:
    """Measures across the settings of one DGM: one line per estimator with a
    shaded ±2 MCSE band, panels in rows of *columns* (a measure per column, a
    sample size per row).

    ``panels``: ``[{"title": str, "series": {est: {"x", "value", "mcse"}},
    "hline": float | None, "band": (low, high) | None}]``; ``hline`` is a dashed
    reference line (0 for bias, 1 for an efficiency, the nominal level), ``band``
    a grey range behind the lines. *band_label* names the coloured bands in the legend.
    """
    fig, axes = _panels(len(panels), columns, panel_width=2.55 if columns >= 3 else 3.4, panel_height=2.0,
                        title=title, legend=True)
    names, marked = [], False
    for i, (ax, p) in enumerate(zip(axes, panels)):
        if p.get("band"):
            ax.axhspan(*p["band"], color="#e8ebee", lw=0)
        if p.get("hline") is not None:
            ax.axhline(p["hline"], color=GUIDE, lw=1, ls=(0, (4, 3)))
        for est, d in p["series"].items():
            st = styles[est]
            x = np.asarray(d["x"], float)
            order = np.argsort(x, kind="stable")
            x, v, e = x[order], np.asarray(d["value"], float)[order], np.asarray(d["mcse"], float)[order]
            ax.fill_between(x, v - 2 * e, v + 2 * e, color=st.colour, alpha=BAND_ALPHA, lw=0)
            ax.plot(x, v, color=st.colour, ls=st.line, lw=1.2, ms=3.5,
                    marker=st.marker if x.size <= MARKED_POINTS else "None")
            marked = marked or x.size <= MARKED_POINTS
            names += [est] if est not in names else []
        if log_x:
            ax.set_xscale("log")
        ax.set_title(p["title"])
        if i >= len(panels) - columns:
            ax.set_xlabel(xlabel)
        ax.grid(True, which="major", lw=0.4, color="#e2e5e8")
    _legend(fig, styles, names, (Patch(color="#666666", alpha=BAND_ALPHA * 2, label=band_label),), marked)
    return to_svg(fig, label, uid)
