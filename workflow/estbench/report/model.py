"""What the report is about, read once from the store: the study, its DGM
families (one curve in n each), the estimators and the performance table,
indexed for the section builders.

A study with many DGM settings (families) gets the compact layout: the
per-setting figures are drawn for a few settings only (``shown_families``),
figures across the settings of each DGM (``Sweep``) summarise them all, and
the performance table has a row per scenario x estimator."""

from __future__ import annotations

import json
import re
from collections import defaultdict
from dataclasses import dataclass, field
from functools import cached_property
from typing import Mapping

import numpy as np
import yaml

from estbench.analyse.failures import failure_warnings, max_failed_share_of
from estbench.report import data as report_data
from estbench.report.styles import Style, estimator_styles

#: Up to this many DGM settings the report shows every setting in full (a table
#: and figures each); above it the compact layout is used.
DETAIL_SETTINGS = 12
#: In the compact layout: settings drawn in full per DGM (first, middle, last in
#: study order), and at most this many in all.
SHOWN_PER_DGM = 3
SHOWN_SETTINGS = 6
#: Sample sizes (rows of panels) in a figure across settings.
ACROSS_SIZES = 4


@dataclass(frozen=True)
class Family:
    """One DGM at one combination of swept values: its scenarios ordered by n."""

    dgm: str
    swept: Mapping
    scenarios: tuple      #: scenario rows (dicts), by increasing n
    slug: str             #: html id

    @property
    def title(self) -> str:
        return self.dgm + (" (" + ", ".join(f"{k} = {value_text(v)}" for k, v in self.swept.items()) + ")"
                           if self.swept else "")

    @property
    def sample_sizes(self) -> list[int]:
        return [s["n"] for s in self.scenarios]

    def scenario_title(self, scenario: Mapping) -> str:
        """One of its scenarios in words: 'normal (df = 3), n = 20'."""
        return f"{self.title}, n = {scenario['n']}"


def value_text(value) -> str:
    """A swept value as a reader writes it: '0.5', '1e+03', 'low'."""
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


def spread(items, limit: int) -> list:
    """At most *limit* of *items*, in their order: the first, the last and evenly spread ones between."""
    items = list(items)
    if len(items) <= limit:
        return items
    pick = np.unique(np.round(np.linspace(0, len(items) - 1, limit)).astype(int))
    return [items[i] for i in pick]


def spread_sample_sizes(sizes, limit: int) -> list[int]:
    """At most *limit* sample sizes: the smallest, the largest and evenly spread ones between."""
    return spread(sorted(sizes), limit)


def shown_families(families: list[Family]) -> list[Family]:
    """The settings drawn in full: all of them up to DETAIL_SETTINGS; otherwise up to
    SHOWN_PER_DGM per DGM spread over its settings, SHOWN_SETTINGS in all."""
    if len(families) <= DETAIL_SETTINGS:
        return list(families)
    by_dgm: dict[str, list[Family]] = {}
    for f in families:
        by_dgm.setdefault(f.dgm, []).append(f)
    per_dgm = max(1, min(SHOWN_PER_DGM, SHOWN_SETTINGS // len(by_dgm)))
    picked = {f.slug for rows in by_dgm.values() for f in spread(rows, per_dgm)}
    return spread([f for f in families if f.slug in picked], SHOWN_SETTINGS)


def _is_number(v) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and np.isfinite(v)


@dataclass(frozen=True)
class Sweep:
    """The settings of one DGM as points on one axis: the value of its one varying
    swept parameter, or else the setting's number in study order."""

    dgm: str
    families: tuple       #: in study order
    x: tuple              #: one number per family
    label: str            #: the axis label
    log: bool             #: a log axis (positive values spanning a factor 20 or more)
    parameter: str | None  #: the parameter on the axis; None when x counts the settings

    @property
    def sample_sizes(self) -> list[int]:
        return sorted({n for f in self.families for n in f.sample_sizes})


def sweeps_of(families: list[Family]) -> list[Sweep]:
    """One Sweep per DGM with two or more settings, in study order."""
    by_dgm: dict[str, list[Family]] = {}
    for f in families:
        by_dgm.setdefault(f.dgm, []).append(f)
    out = []
    for dgm, rows in by_dgm.items():
        if len(rows) < 2:
            continue
        names = list(dict.fromkeys(k for f in rows for k in f.swept))
        varying = [k for k in names if len({json.dumps(f.swept.get(k)) for f in rows}) > 1]
        if len(varying) == 1 and all(_is_number(f.swept.get(varying[0])) for f in rows):
            x = tuple(float(f.swept[varying[0]]) for f in rows)
            log = min(x) > 0 and max(x) >= 20 * min(x)
            out.append(Sweep(dgm, tuple(rows), x, varying[0], log, varying[0]))
        else:
            what = ", ".join(varying) or "settings"
            out.append(Sweep(dgm, tuple(rows), tuple(float(i) for i in range(1, len(rows) + 1)),
                             f"setting of {what} (number in study order)", False, None))
    return out


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
    _present: dict = field(default_factory=dict, repr=False)   #: measure -> scenarios that have it

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
        for r in model.performance:
            model._present.setdefault(r["measure"], set()).add(r["scenario"])
        return model

    @property
    def compact(self) -> bool:
        """True for a study with more than DETAIL_SETTINGS DGM settings."""
        return len(self.families) > DETAIL_SETTINGS

    @cached_property
    def shown(self) -> list[Family]:
        """The settings whose figures are drawn (all of them unless compact)."""
        return shown_families(self.families)

    @cached_property
    def sweeps(self) -> list[Sweep]:
        """The DGMs summarised across their settings (compact layout only)."""
        return sweeps_of(self.families) if self.compact else []

    def swept_names(self) -> list[str]:
        """Swept parameter names over all scenarios, in order of first appearance."""
        return list(dict.fromkeys(k for f in self.families for k in f.swept))

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
        present = self._present.get(measure, ())
        if family is None:
            return bool(present)
        return any(s["scenario"] in present for s in family.scenarios)

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

    def series_across(self, sweep: Sweep, measure: str, n: int, estimators) -> dict[str, dict]:
        """``{estimator: {"x", "value", "mcse"}}`` of *measure* at sample size *n* across
        the settings of *sweep*, for estimators with at least one finite value."""
        out = {}
        for est in estimators:
            d = defaultdict(list)
            for x, f in zip(sweep.x, sweep.families):
                s = next((s for s in f.scenarios if s["n"] == n), None)
                r = s and self.row(s["scenario"], est, measure)
                if r and r["value"] is not None and np.isfinite(r["value"]):
                    d["x"].append(x)
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
