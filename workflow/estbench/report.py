"""The report and the performance CSV, rendered from the store alone."""

from __future__ import annotations

import csv
import json
import os
from collections import defaultdict
from pathlib import Path

import jinja2

from . import __version__
from .figures import colours, convergence_svg
from .measures import MEASURES
from .paths import REPORT_TEMPLATES
from .store import open_read_only

#: Measures shown in the report's tables (every measure is in performance.csv).
TABLE_MEASURES = ("bias", "empse", "modse", "rmse", "coverage", "ci_width", "rejection_rate",
                  "relative_efficiency", "crb_efficiency")

#: Fixed leading and trailing columns of performance.csv; swept parameters go between.
CSV_HEAD = ("scenario", "dgm", "n")
CSV_TAIL = ("estimator", "target", "measure", "value", "mcse", "n_ok", "n_failed")


def fmt_number(x) -> str:
    """Ten significant digits: far below any Monte Carlo error, and stable in the
    last printed digit when the store's floating-point sums change order."""
    if x is None:
        return ""
    return format(float(x), ".10g")


def _performance_rows(con) -> list[dict]:
    sql = """
    SELECT p.scenario, s.dgm, s.n, s.swept, p.estimator, e.target, p.measure, p.value, p.mcse,
           p.n_ok, p.n_failed, s.position AS spos, e.position AS epos
    FROM performance p
    JOIN scenarios s USING (scenario)
    JOIN estimators e USING (estimator)
    ORDER BY s.position, e.position
    """
    cur = con.execute(sql)
    names = [d[0] for d in cur.description]
    rows = [dict(zip(names, r)) for r in cur.fetchall()]
    order = {m.name: i for i, m in enumerate(MEASURES)}
    rows.sort(key=lambda r: (r["spos"], r["epos"], order.get(r["measure"], len(order))))
    for r in rows:
        r["swept"] = json.loads(r["swept"])
    return rows


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
    rows = _fetch_dicts(con, """
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


def _fetch_dicts(con, sql):
    cur = con.execute(sql)
    names = [d[0] for d in cur.description]
    return [dict(zip(names, r)) for r in cur.fetchall()]


def _families(rows):
    """Group performance rows by DGM and swept values: one family = one curve in n."""
    fam = defaultdict(list)
    for r in rows:
        fam[(r["dgm"], json.dumps(r["swept"], sort_keys=True))].append(r)
    return fam


def _family_title(dgm: str, swept_json: str) -> str:
    swept = json.loads(swept_json)
    return dgm + (" (" + ", ".join(f"{k} = {v:g}" for k, v in swept.items()) + ")" if swept else "")


def build_context(con) -> dict:
    """Everything the template shows, read from the store."""
    study = _fetch_dicts(con, "SELECT * FROM study")[0]
    scenarios = _fetch_dicts(con, "SELECT * FROM scenarios ORDER BY position")
    estimators = _fetch_dicts(con, "SELECT * FROM estimators ORDER BY position")
    rows = _performance_rows(con)
    colour = colours([e["estimator"] for e in estimators])
    present = {r["measure"] for r in rows}
    measures = [m for m in MEASURES if m.name in TABLE_MEASURES and m.name in present]

    tables, figures = [], []
    for (dgm, swept_json), fam_rows in _families(rows).items():
        title = _family_title(dgm, swept_json)
        cells = defaultdict(dict)
        meta = {}
        for r in fam_rows:
            key = (r["epos"], r["n"])
            cells[key][r["measure"]] = r
            if r["measure"] == "bias" or key not in meta:  # bias counts every ok replicate
                meta[key] = {"estimator": r["estimator"], "n": r["n"], "n_ok": r["n_ok"],
                             "n_failed": r["n_failed"], "target": r["target"]}
        table_rows = [{**meta[k], "cells": cells[k]} for k in sorted(cells)]
        tables.append({"title": title, "rows": table_rows})
        series = defaultdict(lambda: defaultdict(lambda: {"n": [], "value": [], "mcse": []}))
        for r in sorted(fam_rows, key=lambda r: r["n"]):
            if r["measure"] in ("bias", "empse", "rmse"):
                d = series[r["measure"]][r["estimator"]]
                d["n"].append(r["n"])
                d["value"].append(r["value"])
                d["mcse"].append(r["mcse"])
        if len({r["n"] for r in fam_rows}) > 1:
            figures.append({
                "title": title,
                "svg": convergence_svg(series, colour, title),
                "alt": (f"Log-log plots of absolute bias, empirical SE and RMSE against n for "
                        f"{title}, one line per estimator, with MCSE error bars."),
            })
    dgms = {}
    for s in scenarios:
        d = dgms.setdefault(s["dgm"], {"dgm": s["dgm"], "description": s["dgm_description"],
                                       "specs": [], "n": [], "n_scenarios": 0})
        spec = json.loads(s["spec"])
        if spec not in d["specs"]:
            d["specs"].append(spec)
        if s["n"] not in d["n"]:
            d["n"].append(s["n"])
        d["n_scenarios"] += 1
    for d in dgms.values():
        d["specs"] = [json.dumps(spec, sort_keys=True) for spec in d["specs"]]
    provenance = _fetch_dicts(con, """
        SELECT count(*) AS shards, sum(seconds) AS seconds, min(created) AS first,
               max(created) AS last, string_agg(DISTINCT numpy, ', ') AS numpy,
               string_agg(DISTINCT scipy, ', ') AS scipy,
               string_agg(DISTINCT estbench, ', ') AS estbench
        FROM provenance""")[0]
    counts = _fetch_dicts(con, """
        SELECT count(*) AS rows, count(*) FILTER (WHERE status <> 'ok') AS failed
        FROM estimates""")[0]
    checks = _fetch_dicts(con, """
        SELECT c.*, s.dgm, s.n, s.swept FROM checks c JOIN scenarios s USING (scenario)
        ORDER BY s.position, c.estimator, c.check, c.measure""")
    failures = _fetch_dicts(con, """
        WITH f AS (SELECT scenario, estimator, status, message, count(*) AS k FROM estimates
                   WHERE status <> 'ok' GROUP BY ALL)
        SELECT f.estimator, s.dgm, s.n, s.swept, sum(k) AS failed,
               arg_max(message, k) AS top_message, max(k) AS top_count
        FROM f JOIN scenarios s USING (scenario)
        GROUP BY f.estimator, s.dgm, s.n, s.swept, s.position ORDER BY s.position, f.estimator""")
    return {
        "checks_target": [c for c in checks if c["check"] == "mcse_target"],
        "checks_blocks": [c for c in checks if c["check"] == "block_heterogeneity"],
        "failures": failures,
        "study": study, "scenarios": scenarios, "dgms": list(dgms.values()), "estimators": estimators, "colour": colour,
        "measures": measures, "tables": tables, "figures": figures, "provenance": provenance,
        "counts": counts, "targets": json.loads(study["targets"] or "{}"),
        "estbench_version": __version__, "fmt": fmt_number,
    }


def render_html(context: dict) -> str:
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(REPORT_TEMPLATES)),
                             autoescape=True, undefined=jinja2.StrictUndefined,
                             trim_blocks=True, lstrip_blocks=True)
    env.filters["num"] = fmt_number
    env.filters["sig"] = lambda x, d=3: "" if x is None else format(float(x), f".{d}g")
    css = (REPORT_TEMPLATES / "report.css").read_text()
    return env.get_template("report.html.j2").render(**context, css=css)


def render(store: Path | str, html_out: Path | str, csv_out: Path | str) -> None:
    """Write ``performance.csv``, ``checks.csv`` beside it and ``report.html`` from the store."""
    html_out, csv_out = Path(html_out), Path(csv_out)
    con = open_read_only(store)
    try:
        context = build_context(con)
        rows = _performance_rows(con)
        write_checks_csv(con, csv_out.with_name("checks.csv"))
    finally:
        con.close()
    write_performance_csv(rows, csv_out)
    html = render_html(context)
    tmp = html_out.with_name(html_out.name + f".tmp-{os.getpid()}")
    tmp.write_text(html)
    os.replace(tmp, html_out)


def main(argv=None) -> int:
    import argparse
    parser = argparse.ArgumentParser(prog="python -m estbench.report",
                                     description="Render performance.csv and report.html from a store.")
    parser.add_argument("--store", required=True)
    parser.add_argument("--html", required=True)
    parser.add_argument("--csv", required=True)
    args = parser.parse_args(argv)
    render(args.store, args.html, args.csv)
    return 0


if __name__ == "__main__":
    import sys
    sys.exit(main())
