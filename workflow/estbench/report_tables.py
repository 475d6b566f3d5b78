"""The report's text and table sections: study at a glance, precision,
performance tables (with paired tests of the leader) and the appendix."""

from __future__ import annotations

import json
import math

from . import report_data
from .measures import MEASURES
from .report_model import Family, ReportModel
from .report_stats import RANKINGS, Contest, badness, mcse_text, round_to_mcse, sign_of

#: The performance tables of each DGM setting: measures and column headings
#: (every measure is in performance.csv). Two tables keep each value's MCSE
#: beside it on a page of ordinary width.
TABLE_PARTS = (
    ("Estimation", {"bias": "Bias", "empse": "Empirical SE", "rmse": "RMSE",
                    "relative_efficiency": "Relative efficiency", "crb_efficiency": "CRB efficiency"}),
    ("Inference", {"modse": "Model SE", "coverage": "Coverage", "ci_width": "CI width",
                   "rejection_rate": "Rejection rate"}),
)
#: Shards listed in the appendix; the rest are counted.
SHARDS_LISTED = 500
#: Most common failure messages shown per scenario x estimator.
TOP_MESSAGES = 3


# ------------------------------------------------------------------ study at a glance

def _params_text(params) -> str:
    return ", ".join(f"{k} = {v:g}" if isinstance(v, (int, float)) else f"{k} = {v}"
                     for k, v in (params or {}).items())


def describe_spec(spec) -> str:
    """A DGM spec as a reader writes it: ``t(df = 3, loc = 10, scale = 0.5)``."""
    if "distribution" in spec:
        return f"{spec['distribution']}({_params_text(spec.get('params'))})"
    if "mixture" in spec:
        return " + ".join(f"{c['weight']:g} × {c['distribution']}({_params_text(c.get('params'))})"
                          for c in spec["mixture"])
    if "mechanism" in spec:
        return f"{spec['mechanism']}({_params_text(spec.get('params'))})"
    if "generator" in spec:
        return (f"generator {spec['generator']}({_params_text(spec.get('params'))}), "
                f"truth from {spec.get('truth', '?')}")
    return json.dumps(spec, sort_keys=True)


def _truth_text(model: ReportModel, family: Family) -> list[str]:
    """'mean = 10' per estimand the estimators target; several values if they vary with n."""
    out = []
    for estimand in model.targets():
        values = []
        for s in family.scenarios:
            t = model.truth(s["scenario"], estimand)
            if t is None:
                continue
            text = format(t["value"], ".6g") + (f" (MCSE {t['mcse']:.2g})" if t["mcse"] else "")
            if text not in values:
                values.append(text)
        if values:
            crb = any(model.truth(s["scenario"], estimand) and
                      _finite(model.truth(s["scenario"], estimand)["crb"]) for s in family.scenarios)
            out.append(f"{estimand} = {' / '.join(values)}" + (" · Cramér–Rao bound known" if crb else ""))
    return out


def _finite(x) -> bool:
    return x is not None and math.isfinite(x)


def glance(model: ReportModel, con) -> dict:
    counts = model.counts
    per_pair = [c["rows"] for c in counts]
    dgms = []
    for f in model.families:
        first = not dgms or dgms[-1]["dgm"] != f.dgm
        dgms.append({"dgm": f.dgm, "first": first, "description": f.scenarios[0]["dgm_description"],
                     "rows": sum(1 for g in model.families if g.dgm == f.dgm),
                     "spec": describe_spec(f.scenarios[0]["spec"]),
                     "swept": f.swept, "truths": _truth_text(model, f)})
    hashes = {h["estimator"]: h for h in report_data.code_hashes(con)}
    estimators = [{**e, "args_text": _params_text(e["args"]) or "—", "hash": hashes.get(e["estimator"])}
                  for e in model.estimators]
    present = {r["measure"] for r in model.performance}
    targets = json.loads(model.study["targets"] or "{}")
    estimands = [{"estimand": t, "estimators": model.estimator_names(t)} for t in model.targets()]
    return {
        "rows": sum(per_pair), "failed": sum(c["failed"] for c in counts), "estimands": estimands,
        "pairs_min": min(per_pair, default=0), "pairs_max": max(per_pair, default=0),
        "pairs": len(per_pair), "pairs_expected": len(model.scenarios) * len(model.estimators),
        "dgms": dgms, "sample_sizes": sorted({s["n"] for s in model.scenarios}),
        "estimators": estimators,
        "measures": [{"label": m.label, "formula": m.formula, "target": targets.get(m.name)}
                     for m in MEASURES if m.name in present],
        "provenance": report_data.provenance_summary(con),
        "environments": report_data.environments(con),
    }


# ------------------------------------------------------------------ precision

def _where(row, families_by_scenario) -> str:
    return families_by_scenario[row["scenario"]].title


def precision(model: ReportModel, con, checks: list[dict]) -> dict:
    fam_of = {s["scenario"]: f for f in model.families for s in f.scenarios}
    targets = json.loads(model.study["targets"] or "{}")
    target_rows = [c for c in checks if c["check"] == "mcse_target"]
    summary = []
    for measure, target in targets.items():
        rows = [c for c in target_rows if c["measure"] == measure]
        known = [c for c in rows if c["statistic"] is not None]
        worst = max(known, key=lambda c: c["statistic"], default=None)
        summary.append({"measure": measure, "target": target, "checks": len(rows),
                        "met": sum(1 for c in rows if c["passed"]),
                        "unknown": len(rows) - len(known),
                        "worst": worst and {"mcse": worst["statistic"], "where": _where(worst, fam_of),
                                            "n": worst["n"], "estimator": worst["estimator"]}})
    not_met = [{**c, "where": _where(c, fam_of),
                "still": None if c["n_needed"] is None else max(0, c["n_needed"] - c["n_ok"])}
               for c in target_rows if not c["passed"]]
    blocks = [c for c in checks if c["check"] == "block_heterogeneity"]
    tested = [c for c in blocks if c["p_value"] is not None]
    alpha = tested[0]["limit"] if tested else None
    flagged = [{**c, "where": _where(c, fam_of)} for c in tested if not c["passed"]]
    failures = _failures(model, con)
    return {"targets": summary, "not_met": not_met, "blocks_tested": len(tested), "alpha": alpha,
            "expected_by_chance": None if alpha is None else alpha * len(tested), "flagged": flagged,
            **failures}


def _messages_text(messages, kinds: int) -> str:
    text = "; ".join(f"{m['message']} ×{m['count']}" for m in messages)
    return text + (f"; and {kinds - len(messages)} other message(s)" if kinds > len(messages) else "")


def _failures(model: ReportModel, con) -> dict:
    """Failed replicates as a scenario x estimator matrix (with each cell's
    commonest messages as its tooltip) and each estimator's commonest messages."""
    counts = {(c["scenario"], c["estimator"]): c for c in model.counts}
    tips = {(m["scenario"], m["estimator"]): _messages_text(m["messages"], m["kinds"])
            for m in report_data.failure_messages(con, TOP_MESSAGES, "scenario")}
    names = model.estimator_names()
    rows = []
    for f in model.families:
        for s in f.scenarios:
            cells = {}
            for est in names:
                c = counts.get((s["scenario"], est))
                if c and c["failed"]:
                    cells[est] = {"failed": c["failed"], "rows": c["rows"],
                                  "share": format(100 * c["failed"] / c["rows"], ".2g") + "%",
                                  "tip": tips.get((s["scenario"], est), "")}
            if cells:
                rows.append({"where": f.title, "n": s["n"], "cells": cells})
    by_estimator = [{**m, "more": m["kinds"] - len(m["messages"])}
                    for m in report_data.failure_messages(con, TOP_MESSAGES, "estimator")]
    by_estimator.sort(key=lambda m: names.index(m["estimator"]))
    total = sum(c["rows"] for c in model.counts)
    failed = sum(c["failed"] for c in model.counts)
    return {"failure_rows": rows, "failure_estimators": [n for n in names if any(n in r["cells"] for r in rows)],
            "failure_messages": by_estimator, "failed": failed, "replicates": total}


# ------------------------------------------------------------------ performance tables

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
    runner-up, from the paired replicates (one query per pair of estimators)."""
    by_pair: dict[tuple, list] = {}
    for found in _leaders(model):
        scenario, target, measure, leader, runner, scale = found
        by_pair.setdefault((scenario, target, *sorted((leader, runner))), []).append(found)
    out = {}
    for (scenario, target, first, second), found in by_pair.items():
        d = report_data.paired_differences(con, scenario, first, second, [f[2] for f in found],
                                           _contribution_params(model, scenario, target, first, second))
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
    """Per DGM setting: one table per part of TABLE_PARTS that has a measure,
    rows grouped by n, estimators within."""
    labels = {m.name: m.label for m in MEASURES}
    tables = []
    for f in model.families:
        parts = []
        for part, headings in TABLE_PARTS:
            measures = [{"name": name, "heading": heading, "label": labels[name]}
                        for name, heading in headings.items() if model.has(name, f)]
            if measures:
                parts.append({"title": part, "measures": measures,
                              "groups": _row_groups(model, f, measures, decided)})
        tables.append({"title": f.title, "slug": f.slug, "parts": parts})
    return tables


def _row_groups(model: ReportModel, family: Family, measures: list[dict], decided) -> list[dict]:
    groups = []
    for s in family.scenarios:
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
            groups.append({"n": s["n"], "rows": rows})
    return groups


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

def appendix(model: ReportModel, con) -> dict:
    shards, total = report_data.shard_list(con, SHARDS_LISTED)
    return {"environments": report_data.environments(con), "shards": shards, "shards_total": total,
            "study_yaml": model.study["study_yaml"]}
