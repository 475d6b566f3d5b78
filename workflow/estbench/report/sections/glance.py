"""Section 1, study at a glance: aims, DGMs and true values, estimands, methods, measures."""

from __future__ import annotations

import json
import math


from estbench.analyse.measures import MEASURES
from estbench.report import data as report_data
from estbench.report.model import Family, ReportModel
from estbench.report.sections.base import SectionInputs
from estbench.simulate.dgms import describe_spec
from estbench.simulate.dgms.common import params_text

#: The entry of the page's table of contents.
TITLE = "Study at a glance"
#: The name the template gives this section's content.
KEY = "glance"


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
