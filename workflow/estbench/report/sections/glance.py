"""Section 1, study at a glance: aims, DGMs and true values, estimands, methods, measures."""

from __future__ import annotations

import json
import math
from collections import Counter

from estbench.analyse.measures import MEASURES
from estbench.report import data as report_data
from estbench.report.model import ReportModel, value_text
from estbench.report.sections.base import SectionInputs
from estbench.simulate.dgms import describe_spec
from estbench.simulate.dgms.common import params_text

#: The entry of the page's table of contents.
TITLE = "Study at a glance"
#: The name the template gives this section's content.
KEY = "glance"

#: In the compact layout's row of a DGM: distinct true values listed per estimand
#: (more are given as a range), and swept values listed in full (more are cut).
TRUTHS_LISTED = 4
VALUES_LISTED = 6


def _truth_text(model: ReportModel, families) -> list[str]:
    """'mean = 10' per estimand the estimators target; several values if they vary over
    the scenarios of *families*, or, over several families, their range when there
    are more than TRUTHS_LISTED."""
    out = []
    for estimand in model.targets():
        truths = [t for f in families for s in f.scenarios if (t := model.truth(s["scenario"], estimand))]
        values = list(dict.fromkeys(format(t["value"], ".6g")
                                    + (f" (MCSE {t['mcse']:.2g})" if t["mcse"] else "") for t in truths))
        if not values:
            continue
        if len(families) > 1 and len(values) > TRUTHS_LISTED:
            finite = [t["value"] for t in truths if _finite(t["value"])]
            values = [f"{len(values)} values"
                      + (f" from {min(finite):.6g} to {max(finite):.6g}" if finite else "")]
        crb = any(_finite(t["crb"]) for t in truths)
        out.append(f"{estimand} = {' / '.join(values)}" + (" · Cramér–Rao bound known" if crb else ""))
    return out


def _finite(x) -> bool:
    return x is not None and math.isfinite(x)


def _values_text(values: list) -> str:
    """'0, 1, 2, …, 199 (200 values)': a swept parameter's values, the long lists cut."""
    shown = [value_text(v) for v in values]
    if len(shown) <= VALUES_LISTED:
        return ", ".join(shown)
    return ", ".join(shown[:3]) + f", …, {shown[-1]} ({len(shown)} values)"


def _dgm_rows(model: ReportModel) -> list[dict]:
    """The DGM table: a row per setting, or per DGM (its swept values listed) when compact."""
    per_dgm = Counter(f.dgm for f in model.families)
    if not model.compact:
        return [{"dgm": f.dgm, "first": i == 0 or model.families[i - 1].dgm != f.dgm,
                 "description": f.scenarios[0]["dgm_description"], "rows": per_dgm[f.dgm],
                 "spec": describe_spec(f.scenarios[0]["spec"]), "swept": None,
                 "truths": _truth_text(model, [f])}
                for i, f in enumerate(model.families)]
    rows = []
    for dgm in per_dgm:
        families = [f for f in model.families if f.dgm == dgm]
        names = list(dict.fromkeys(k for f in families for k in f.swept))
        swept = [f"{k} = {_values_text(list(dict.fromkeys(f.swept[k] for f in families if k in f.swept)))}"
                 for k in names]
        rows.append({"dgm": dgm, "first": True, "description": families[0].scenarios[0]["dgm_description"],
                     "rows": 1, "spec": describe_spec(families[0].scenarios[0]["spec"]),
                     "swept": (f"(the first of {len(families)} settings, swept over "
                               + "; ".join(swept) + ")") if swept else None,
                     "truths": _truth_text(model, families)})
    return rows


def glance(model: ReportModel, con) -> dict:
    counts = model.counts
    per_pair = [c["rows"] for c in counts]
    dgms = _dgm_rows(model)
    hashes = {h["estimator"]: h for h in report_data.code_hashes(con)}
    estimators = [{**e, "args_text": params_text(e["args"]) or "—", "hash": hashes.get(e["estimator"])}
                  for e in model.estimators]
    present = {r["measure"] for r in model.performance}
    targets = json.loads(model.study["targets"] or "{}")
    estimands = [{"estimand": t, "estimators": model.estimator_names(t)} for t in model.targets()]
    return {
        "rows": sum(per_pair), "failed": sum(c["failed"] for c in counts), "estimands": estimands,
        "failure_warnings": len(model.failure_warnings()),
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


def build(inputs: SectionInputs) -> dict:
    return glance(inputs.model, inputs.con)
