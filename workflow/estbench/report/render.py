"""The report and the performance CSV, rendered from the store alone."""

from __future__ import annotations

import csv
import os
import sys
import time
from pathlib import Path

import jinja2

from estbench import __version__
from estbench.analyse.store import open_read_only, reading_store
from estbench.core.bundled import REPORT_TEMPLATES
from estbench.core.errors import entry_point
from estbench.core.files import atomic_path, write_text_atomically
from estbench.core.layout import ResultsLayout
from estbench.report import data as report_data
from estbench.report.figure_queue import FigureQueue
from estbench.report.model import DETAIL_SETTINGS, ReportModel
from estbench.report.sections import SECTIONS
from estbench.report.sections.base import SectionInputs
from estbench.report.stats import RANKINGS

#: Fixed leading and trailing columns of performance.csv; swept parameters go between.
CSV_HEAD = ("scenario", "dgm", "n")
CSV_TAIL = ("estimator", "target", "measure", "value", "mcse", "n_ok", "n_failed")


def fmt_number(x) -> str:
    """Ten significant digits: far below any Monte Carlo error. (Stability does not
    rest on the rounding: the measures themselves are the same to the last bit
    however the rows reached the store; see ``analyse.block_sums``.)"""
    if x is None:
        return ""
    return format(float(x), ".10g")


def swept_columns(rows) -> list[str]:
    """Swept parameter names in order of first appearance; renamed if they clash."""
    seen = []
    for r in rows:
        for k in r["swept"]:
            if k not in seen:
                seen.append(k)
    return seen


def _column_name(param: str) -> str:
    return f"param_{param}" if param in CSV_HEAD + CSV_TAIL else param


def write_performance_csv(rows, out: Path) -> None:
    """Long-form CSV: one row per scenario x estimator x measure."""
    params = swept_columns(rows)
    header = [*CSV_HEAD, *[_column_name(p) for p in params], *CSV_TAIL]
    with atomic_path(out) as tmp, open(tmp, "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(header)
        for r in rows:
            writer.writerow([r["scenario"], r["dgm"], r["n"],
                             *[fmt_number(r["swept"][p]) if p in r["swept"] else "" for p in params],
                             r["estimator"], r["target"], r["measure"], fmt_number(r["value"]),
                             fmt_number(r["mcse"]), r["n_ok"], r["n_failed"]])


def write_checks_csv(con, out: Path) -> None:
    """The Monte Carlo error checks, one row per scenario x estimator x check."""
    rows = report_data.fetch_dicts(con, """
        SELECT c.scenario, s.dgm, s.n, c.estimator, c.check, c.measure, c.statistic, c.limit,
               c.passed, c.p_value, c.df, c.n_ok, c.n_needed
        FROM checks c JOIN scenarios s USING (scenario)
        ORDER BY s.position, c.estimator, c.check, c.measure""")
    header = ["scenario", "dgm", "n", "estimator", "check", "measure", "statistic", "limit",
              "passed", "p_value", "df", "n_ok", "n_needed"]
    with atomic_path(out) as tmp, open(tmp, "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(header)
        for r in rows:
            writer.writerow([fmt_number(r[h]) if isinstance(r[h], float) else
                             ("" if r[h] is None else str(r[h]).lower() if isinstance(r[h], bool) else r[h])
                             for h in header])


def build_context(model: ReportModel, con, queue: FigureQueue) -> dict:
    """Everything the template shows, read from the store (*model* and the
    queries of each section), section by section; the figures are queued on
    *queue* and drawn by ``queue.draw()``."""
    inputs = SectionInputs(model, con, queue, report_data.checks(con))
    context = {
        "study": model.study, "reference": model.reference, "level": model.level,
        "families": model.families, "styles": model.styles,
        "estimator_names": model.estimator_names(), "rankings": RANKINGS,
        "estbench_version": __version__,
        "layout": {"compact": model.compact, "settings": len(model.families),
                   "scenarios": len(model.scenarios), "limit": DETAIL_SETTINGS,
                   "shown": [f.title for f in model.shown]},
        "sections": [{"name": section.__name__.rsplit(".", 1)[1], "title": section.TITLE}
                     for section in SECTIONS],
    }
    for section in SECTIONS:
        context[section.KEY] = section.build(inputs)
    return context


def render_html(context: dict) -> str:
    """The page: the template filled in, the style sheet inlined."""
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(REPORT_TEMPLATES)),
                             autoescape=True, undefined=jinja2.StrictUndefined,
                             trim_blocks=True, lstrip_blocks=True)
    env.filters["sig"] = lambda x, d=3: "" if x is None else format(float(x), f".{d}g")
    css = (REPORT_TEMPLATES / "report.css").read_text()
    return env.get_template("report.html.j2").render(**context, css=css)


def render(layout: ResultsLayout) -> None:
    """Write ``performance.csv``, ``checks.csv`` and ``report.html`` from the store of *layout*."""
    con = open_read_only(layout.store)
    queue = FigureQueue()
    try:
        with reading_store(layout.store):   # a damaged store: one clear line
            con.execute("SET enable_progress_bar = false")
            model = ReportModel.load(con)
            context = build_context(model, con, queue)
            context["links"] = {name: Path(os.path.relpath(path, layout.report_html.parent)).as_posix()
                                for name, path in (("performance", layout.performance_csv),
                                                   ("checks", layout.checks_csv))}
            write_checks_csv(con, layout.checks_csv)
    finally:
        con.close()
    queue.draw()    # after closing the store: workers fork a process without DuckDB threads
    write_performance_csv(model.performance, layout.performance_csv)
    write_text_atomically(layout.report_html, render_html(context))


@entry_point
def main(argv=None) -> int:
    """``python -m estbench.report.render``: the report step of the workflow."""
    import argparse
    parser = argparse.ArgumentParser(prog="python -m estbench.report.render",
                                     description="Render report.html, performance.csv and checks.csv "
                                                 "from a study's store.")
    parser.add_argument("--store", required=True, type=Path,
                        help="the study's store; the page and the CSVs are written beside it")
    args = parser.parse_args(argv)
    layout = ResultsLayout.of_store(args.store)
    start = time.perf_counter()
    render(layout)
    print(f"{layout.report_html}: written in {time.perf_counter() - start:.2f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
