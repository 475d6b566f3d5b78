"""Section 2, precision of the simulation: MCSE against the targets, between-block
heterogeneity and failed replicates."""

from __future__ import annotations

import json

from estbench.analyse.failures import share_text
from estbench.report import data as report_data
from estbench.report.model import ReportModel
from estbench.report.sections.base import SectionInputs

#: The entry of the page's table of contents.
TITLE = "Precision of the simulation"
#: The name the template gives this section's content.
KEY = "precision"

#: Most common failure messages shown per scenario x estimator.
TOP_MESSAGES = 3
#: Rows listed of each list of problems (targets not met, flagged blocks, failure
#: warnings); the rest are counted, and every check is in checks.csv.
LISTED = 50


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
    return {"targets": summary, "not_met": not_met[:LISTED], "not_met_total": len(not_met),
            "blocks_tested": len(tested), "alpha": alpha,
            "expected_by_chance": None if alpha is None else alpha * len(tested), "flagged": flagged[:LISTED],
            "flagged_total": len(flagged), **failures}


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
                                  "share": share_text(c["failed"], c["rows"]),
                                  "tip": tips.get((s["scenario"], est), "")}
            if cells:
                rows.append({"where": f.title, "n": s["n"], "cells": cells})
    by_estimator = [{**m, "more": m["kinds"] - len(m["messages"])}
                    for m in report_data.failure_messages(con, TOP_MESSAGES, "estimator")]
    by_estimator.sort(key=lambda m: names.index(m["estimator"]))
    warnings = model.failure_warnings()
    total = sum(c["rows"] for c in model.counts)
    failed = sum(c["failed"] for c in model.counts)
    return {"failure_rows": rows, "failure_estimators": [n for n in names if any(n in r["cells"] for r in rows)],
            "failure_messages": by_estimator, "failed": failed, "replicates": total,
            "failure_warnings": warnings[:LISTED], "failure_warnings_total": len(warnings),
            "max_failed_share": model.max_failed_share}


# ------------------------------------------------------------------ performance tables


def build(inputs: SectionInputs) -> dict:
    return precision(inputs.model, inputs.con, inputs.checks)
