"""Section 3, performance tables: estimation and inference measures per DGM setting,
the leader of each measure tested against the runner-up on paired replicates.

In the compact layout (many DGM settings) one table holds every scenario, a
row group each, and figures across each DGM's settings come first."""

from __future__ import annotations

from estbench.analyse.measures import MEASURES
from estbench.report import across
from estbench.report import data as report_data
from estbench.report.model import ReportModel, value_text
from estbench.report.sections.base import SectionInputs
from estbench.report.stats import (RANKINGS, Contest, badness, mcse_text, round_to_mcse, sign_of)

#: The entry of the page's table of contents.
TITLE = "Performance tables"
#: The name the template gives this section's content.
KEY = "performance"

#: The performance tables of each DGM setting and their measures (headings come
#: from the measure catalogue; every measure is in performance.csv). Two tables
#: keep each value's MCSE beside it on a page of ordinary width.
TABLE_PARTS = (
    ("Estimation", ("bias", "empirical_se", "rmse", "relative_efficiency", "crb_efficiency")),
    ("Inference", ("model_se", "coverage", "ci_width", "rejection_rate")),
)


def _leaders(model: ReportModel):
    """(scenario, estimand, measure, leader, runner-up, runner-up's badness) wherever
    two or more estimators of one estimand have a ranked measure."""
    for s in model.scenarios:
        for target in model.targets():
            for measure in RANKINGS:
                scored = []
                for i, est in enumerate(model.estimator_names(target)):
                    value = model.value(s["scenario"], est, measure)
                    if value is not None and value == value:   # present, not NaN
                        scored.append((badness(measure, value, model.level), i, est))
                if len(scored) >= 2:
                    (_, _, leader), (worse, _, runner) = sorted(scored)[:2]
                    yield s["scenario"], target, measure, leader, runner, worse


def contests(model: ReportModel, con) -> dict[tuple, Contest]:
    """``{(scenario, estimand, measure): Contest}`` of the leader against the
    runner-up, from the paired replicates (one query for every pair of estimators)."""
    by_pair: dict[tuple, list] = {}
    for found in _leaders(model):
        scenario, target, measure, leader, runner, scale = found
        by_pair.setdefault((scenario, target, *sorted((leader, runner))), []).append(found)
    if not by_pair:
        return {}
    pairs = {c: [] for c in report_data.PAIR_COLUMNS}
    for i, (scenario, target, first, second) in enumerate(by_pair):
        row = {"pair": i, "scenario": scenario, "est_a": first, "est_b": second,
               **_contribution_params(model, scenario, target, first, second)}
        for c in report_data.PAIR_COLUMNS:
            pairs[c].append(row[c])
    wanted = {f[2] for found in by_pair.values() for f in found}
    paired = {d["pair"]: d for d in report_data.paired_differences(con, pairs, [m for m in RANKINGS
                                                                               if m in wanted])}
    out = {}
    for i, ((scenario, target, first, second), found) in enumerate(by_pair.items()):
        d = paired.get(i)
        if d is None:      # no replicate where both succeeded
            continue
        for _, _, measure, leader, runner, scale in found:
            pairs, mean, sd = d[f"{measure}_pairs"], d[f"{measure}_mean"], d[f"{measure}_sd"]
            if not pairs:
                continue
            mcse = (sd or 0.0) / pairs ** 0.5 if pairs > 1 else float("nan")
            out[(scenario, target, measure)] = Contest(leader, runner, mean if runner == second else -mean,
                                                       mcse, pairs, scale)
    return out


def _contribution_params(model: ReportModel, scenario: str, target: str, a: str, b: str) -> dict:
    """Signs and centres of two estimators' per-replicate contributions (RANKINGS)."""
    truth = model.truth(scenario, target)["value"]
    params = {"truth": truth, "level": model.level}
    for tag, est in (("a", a), ("b", b)):
        bias = model.value(scenario, est, "bias") or 0.0
        coverage = model.value(scenario, est, "coverage")
        params[f"sb_{tag}"] = sign_of(bias)
        params[f"sc_{tag}"] = sign_of(coverage - model.level) if coverage is not None else 1.0
        params[f"m_{tag}"] = truth + bias
    return params


def performance_tables(model: ReportModel, decided: dict[tuple, Contest]) -> list[dict]:
    """One table per part of TABLE_PARTS that has a measure, rows grouped by scenario,
    estimators within: per DGM setting (groups by n), or in the compact layout one
    for the whole study (groups keyed by DGM, swept values and n)."""
    if model.compact:
        names = model.swept_names()
        several = len({f.dgm for f in model.families}) > 1
        keys = ["DGM"] * several + names + ["n"]
        layout = [("Every scenario", "all", None, keys,
                   [(s, [f.dgm] * several + [value_text(f.swept[k]) if k in f.swept else "—" for k in names]
                     + [s["n"]]) for f in model.families for s in f.scenarios])]
    else:
        layout = [(f.title, f.slug, f, ["n"], [(s, [s["n"]]) for s in f.scenarios]) for f in model.families]
    by_name = {m.name: m for m in MEASURES}
    tables = []
    for title, slug, family, keys, scenarios in layout:
        parts = []
        for part, names in TABLE_PARTS:
            measures = [{"name": name, "heading": by_name[name].short, "label": by_name[name].label}
                        for name in names if model.has(name, family)]
            if measures:
                parts.append({"title": part, "measures": measures,
                              "groups": _row_groups(model, scenarios, measures, decided)})
        tables.append({"title": title, "slug": slug, "keys": keys, "parts": parts})
    return tables


def _row_groups(model: ReportModel, scenarios: list[tuple], measures: list[dict], decided) -> list[dict]:
    groups = []
    for s, keys in scenarios:
        rows = []
        for est in model.estimator_names():
            bias = model.row(s["scenario"], est, "bias")
            if bias is None:
                continue
            target = model.target_of(est)
            cells = {}
            for m in measures:
                r = model.row(s["scenario"], est, m["name"])
                if r is not None:
                    cells[m["name"]] = {"value": round_to_mcse(r["value"], r["mcse"]),
                                        "mcse": mcse_text(r["mcse"]),
                                        **_mark(decided.get((s["scenario"], target, m["name"])), est)}
            rows.append({"estimator": est, "cells": cells, "n_ok": bias["n_ok"], "n_failed": bias["n_failed"]})
        if rows:
            groups.append({"n": s["n"], "keys": keys, "rows": rows})
    return groups


#: The measures drawn across the settings of a DGM in the compact layout.
ACROSS = ({"measure": "bias", "title": "bias", "hline": 0.0},
          {"measure": "empirical_se", "title": "empirical SE"},
          {"measure": "rmse", "title": "RMSE"})


def _mark(contest: Contest | None, estimator: str) -> dict:
    """How a cell is marked: 'best' (leader, decided), 'tie' (the leading two, undecided)."""
    if contest is None or estimator not in (contest.leader, contest.runner_up):
        return {"mark": None}
    z = contest.z
    zt = "∞" if z == float("inf") else f"{z:.1f}"
    if contest.decided:
        if estimator != contest.leader:
            return {"mark": None}
        return {"mark": "best", "note": f"best: ahead of {contest.runner_up} by {zt} MCSE "
                                        f"of the paired difference ({contest.pairs} pairs)"}
    other = contest.runner_up if estimator == contest.leader else contest.leader
    return {"mark": "tie", "note": f"within Monte Carlo error of {other} "
                                   f"(paired difference {zt} MCSE, {contest.pairs} pairs)"}


# ------------------------------------------------------------------ appendix


def build(inputs: SectionInputs) -> dict:
    model = inputs.model
    return {"tables": performance_tables(model, contests(model, inputs.con)),
            "across": across.figures_per_sweep(
                model, inputs.queue, ACROSS,
                "Bias, empirical SE and RMSE against the swept parameter. A bias whose band leaves the dashed "
                "zero line is larger than Monte Carlo error; where two bands overlap, the estimators are not "
                "told apart there (the table's ▲ and ≈ marks test it on paired replicates).")}
