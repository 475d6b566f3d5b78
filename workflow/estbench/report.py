"""The report and the performance CSV, rendered from the store alone."""

from __future__ import annotations

import csv
import os
import sys
import time
from pathlib import Path

import jinja2

from . import __version__, report_data
from .figure_queue import FigureQueue
from .paths import REPORT_TEMPLATES
from .report_model import ReportModel
from .report_plots import convergence, efficiency, intervals
from .report_stats import RANKINGS
from .report_tables import appendix, contests, glance, performance_tables, precision
from .store import open_read_only

#: Fixed leading and trailing columns of performance.csv; swept parameters go between.
CSV_HEAD = ("scenario", "dgm", "n")
CSV_TAIL = ("estimator", "target", "measure", "value", "mcse", "n_ok", "n_failed")


def fmt_number(x) -> str:
    """Ten significant digits: far below any Monte Carlo error, and stable in the
    last printed digit when the store's floating-point sums change order."""
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
    tmp = out.with_name(out.name + f".tmp-{os.getpid()}")
    with open(tmp, "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(header)
        for r in rows:
            writer.writerow([r["scenario"], r["dgm"], r["n"],
                             *[fmt_number(r["swept"][p]) if p in r["swept"] else "" for p in params],
                             r["estimator"], r["target"], r["measure"], fmt_number(r["value"]),
                             fmt_number(r["mcse"]), r["n_ok"], r["n_failed"]])
    os.replace(tmp, out)


def write_checks_csv(con, out: Path) -> None:
    """The Monte Carlo error checks, one row per scenario x estimator x check."""
    rows = report_data.fetch_dicts(con, """
        SELECT c.scenario, s.dgm, s.n, c.estimator, c.check, c.measure, c.statistic, c.limit,
               c.passed, c.p_value, c.df, c.n_ok, c.n_needed
        FROM checks c JOIN scenarios s USING (scenario)
        ORDER BY s.position, c.estimator, c.check, c.measure""")
    header = ["scenario", "dgm", "n", "estimator", "check", "measure", "statistic", "limit",
              "passed", "p_value", "df", "n_ok", "n_needed"]
    tmp = out.with_name(out.name + f".tmp-{os.getpid()}")
    with open(tmp, "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(header)
        for r in rows:
            writer.writerow([fmt_number(r[h]) if isinstance(r[h], float) else
                             ("" if r[h] is None else str(r[h]).lower() if isinstance(r[h], bool) else r[h])
                             for h in header])
    os.replace(tmp, out)


def build_context(con, queue: FigureQueue) -> dict:
    """Everything the template shows, read from the store; the figures are
    queued on *queue* and drawn by ``queue.draw()``."""
    model = ReportModel.load(con)
    checks = report_data.checks(con)
    return {
        "study": model.study, "reference": model.reference, "level": model.level,
        "families": model.families, "styles": model.styles,
        "estimator_names": model.estimator_names(),
        "glance": glance(model, con),
        "precision": precision(model, con, checks),
        "tables": performance_tables(model, contests(model, con)), "rankings": RANKINGS,
        "convergence": convergence(model, con, queue),
        "intervals": intervals(model, con, queue),
        "efficiency": efficiency(model, queue),
        "appendix": appendix(model, con),
        "estbench_version": __version__,
    }


def render_html(context: dict) -> str:
    """The page: the template filled in, the style sheet inlined."""
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(REPORT_TEMPLATES)),
                             autoescape=True, undefined=jinja2.StrictUndefined,
                             trim_blocks=True, lstrip_blocks=True)
    env.filters["sig"] = lambda x, d=3: "" if x is None else format(float(x), f".{d}g")
    css = (REPORT_TEMPLATES / "report.css").read_text()
    return env.get_template("report.html.j2").render(**context, css=css)


def render(store: Path | str, html_out: Path | str, csv_out: Path | str) -> None:
    """Write ``performance.csv``, ``checks.csv`` beside it and ``report.html`` from the store."""
    html_out, csv_out = Path(html_out), Path(csv_out)
    con = open_read_only(store)
    queue = FigureQueue()
    try:
        con.execute("SET enable_progress_bar = false")
        context = build_context(con, queue)
        context["links"] = {name: Path(os.path.relpath(path, html_out.parent)).as_posix() for name, path in
                            (("performance", csv_out), ("checks", csv_out.with_name("checks.csv")))}
        rows = report_data.performance(con)
        write_checks_csv(con, csv_out.with_name("checks.csv"))
    finally:
        con.close()
    queue.draw()    # after closing the store: workers fork a process without DuckDB threads
    write_performance_csv(rows, csv_out)
    html = render_html(context)
    tmp = html_out.with_name(html_out.name + f".tmp-{os.getpid()}")
    tmp.write_text(html, encoding="utf-8")
    os.replace(tmp, html_out)


def main(argv=None) -> int:
    import argparse
    parser = argparse.ArgumentParser(prog="python -m estbench.report",
                                     description="Render performance.csv and report.html from a store.")
    parser.add_argument("--store", required=True)
    parser.add_argument("--html", required=True)
    parser.add_argument("--csv", required=True)
    args = parser.parse_args(argv)
    start = time.perf_counter()
    render(args.store, args.html, args.csv)
    print(f"{args.html}: written in {time.perf_counter() - start:.2f} s", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
