"""What the report is about, read once from the store: the study, its DGM
families (one curve in n each), the estimators and the performance table,
indexed for the section builders."""

from __future__ import annotations

import json
import re
from collections import defaultdict
from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import yaml

from estbench.analyse.failures import failure_warnings, max_failed_share_of
from estbench.report import data as report_data
from estbench.report.figures import Style, estimator_styles


@dataclass(frozen=True)
class Family:
    """One DGM at one combination of swept values: its scenarios ordered by n."""

    dgm: str
    swept: Mapping
    scenarios: tuple      #: scenario rows (dicts), by increasing n
    slug: str             #: html id

    @property
    def title(self) -> str:
        return self.dgm + (" (" + ", ".join(f"{k} = {_short(v)}" for k, v in self.swept.items()) + ")"
                           if self.swept else "")

    @property
    def sample_sizes(self) -> list[int]:
        return [s["n"] for s in self.scenarios]

    def scenario_title(self, scenario: Mapping) -> str:
        """One of its scenarios in words: 'normal (df = 3), n = 20'."""
        return f"{self.title}, n = {scenario['n']}"


def _short(value) -> str:
    return format(value, "g") if isinstance(value, (int, float)) else str(value)


def families_of(scenarios: list[dict]) -> list[Family]:
    """Scenarios grouped by DGM and swept values, in the study's order."""
    groups: dict[tuple, list[dict]] = {}
    for s in scenarios:
        groups.setdefault((s["dgm"], json.dumps(s["swept"], sort_keys=True)), []).append(s)
    out = []
    for i, ((dgm, _), rows) in enumerate(groups.items()):
        slug = "f-" + re.sub(r"[^A-Za-z0-9_-]", "-", dgm) + f"-{i}"
        out.append(Family(dgm, rows[0]["swept"], tuple(sorted(rows, key=lambda r: r["n"])), slug))
    return out


def report_options(study_yaml: str) -> dict:
    """The study file's ``report`` key, from the copy of the file in the store."""
    raw = yaml.safe_load(study_yaml or "") or {}
    return dict(raw.get("report") or {})


def spread_sample_sizes(sizes, limit: int) -> list[int]:
    """At most *limit* sample sizes: the smallest, the largest and evenly spread ones between."""
    sizes = sorted(sizes)
    if len(sizes) <= limit:
        return sizes
    pick = np.unique(np.round(np.linspace(0, len(sizes) - 1, limit)).astype(int))
    return [sizes[i] for i in pick]


@dataclass
class ReportModel:
    """The store's small tables, loaded once, with lookups the sections share."""

    study: dict
    options: dict
    scenarios: list[dict]
    estimators: list[dict]
    performance: list[dict]
    truths: list[dict]
    counts: list[dict]            #: rows and failed replicates per scenario x estimator
    families: list[Family]
    styles: dict[str, Style]
    _perf: dict = field(default_factory=dict, repr=False)
    _truth: dict = field(default_factory=dict, repr=False)

    @classmethod
    def load(cls, con) -> "ReportModel":
        study = report_data.study(con)
        scenarios = report_data.scenarios(con)
        estimators = report_data.estimators(con)
        model = cls(study=study, options=report_options(study["study_yaml"]), scenarios=scenarios,
                    estimators=estimators, performance=report_data.performance(con),
                    truths=report_data.truths(con), counts=report_data.replicate_counts(con),
                    families=families_of(scenarios),
                    styles=estimator_styles([e["estimator"] for e in estimators]))
        model._perf = {(r["scenario"], r["estimator"], r["measure"]): r for r in model.performance}
        model._truth = {(t["scenario"], t["estimand"]): t for t in model.truths}
        return model

    @property
    def level(self) -> float:
        return float(self.study["level"])

    @property
    def reference(self) -> str | None:
        return self.study["reference"]

    def target_of(self, estimator: str) -> str:
        return next(e["target"] for e in self.estimators if e["estimator"] == estimator)

    def estimator_names(self, target: str | None = None) -> list[str]:
        return [e["estimator"] for e in self.estimators if target is None or e["target"] == target]

    def targets(self) -> list[str]:
        """Estimands in order of first appearance among the estimators."""
        return list(dict.fromkeys(e["target"] for e in self.estimators))

    def row(self, scenario: str, estimator: str, measure: str) -> dict | None:
        return self._perf.get((scenario, estimator, measure))

    def value(self, scenario: str, estimator: str, measure: str) -> float | None:
        r = self.row(scenario, estimator, measure)
        return None if r is None else r["value"]

    def has(self, measure: str, family: Family | None = None) -> bool:
        keys = None if family is None else {s["scenario"] for s in family.scenarios}
        return any(r["measure"] == measure and (keys is None or r["scenario"] in keys)
                   for r in self.performance)

    def series(self, family: Family, measure: str, estimators=None) -> dict[str, dict]:
        """``{estimator: {"n", "value", "mcse"}}`` of *measure* along the family's n,
        for estimators with at least one finite value."""
        out = {}
        for est in estimators or self.estimator_names():
            d = defaultdict(list)
            for s in family.scenarios:
                r = self.row(s["scenario"], est, measure)
                if r is not None and r["value"] is not None and np.isfinite(r["value"]):
                    d["n"].append(s["n"])
                    d["value"].append(r["value"])
                    d["mcse"].append(r["mcse"] if r["mcse"] is not None else np.nan)
            if d:
                out[est] = dict(d)
        return out

    def truth(self, scenario: str, estimand: str) -> dict | None:
        return self._truth.get((scenario, estimand))

    @property
    def max_failed_share(self) -> float:
        return max_failed_share_of(self.study)

    def failure_warnings(self) -> list[str]:
        """One sentence per scenario x estimator pair that failed on every replicate or
        on a share above ``max_failed_share``, in the study's order."""
        where = {s["scenario"]: f.scenario_title(s) for f in self.families for s in f.scenarios}
        return [w.text(where[w.scenario]) for w in failure_warnings(
            self.counts, self.max_failed_share, list(where), self.estimator_names())]
