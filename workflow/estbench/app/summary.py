"""What ``estbench run`` says when a run completes, read from the store alone:
scenarios and estimates, failed replicates per estimator, checks not met,
warnings about estimators that failed too often, and where the outputs are.

The warnings are the report's own (``ReportModel.failure_warnings``), so the
terminal and the page always agree; any warning makes the exit status
``EXIT_FAILED_REPLICATES``.
"""

from __future__ import annotations

from dataclasses import dataclass

from estbench.analyse.failures import share_text
from estbench.analyse.store import open_read_only
from estbench.core.errors import EXIT_FAILED_REPLICATES
from estbench.core.layout import ResultsLayout
from estbench.report import data as report_data
from estbench.report.model import ReportModel


@dataclass(frozen=True)
class EstimatorTally:
    """One estimator's replicates in the store, over all scenarios, and how many failed."""

    estimator: str
    replicates: int
    failed: int


@dataclass(frozen=True)
class CheckTally:
    """Rows of one Monte Carlo check: those with a verdict, those not passed, and the
    check's limit (the heterogeneity test's α)."""

    judged: int
    not_passed: int
    unknown: int
    limit: float | None


@dataclass(frozen=True)
class RunSummary:
    """The store after a run, in the few numbers the terminal shows."""

    layout: ResultsLayout
    scenarios: int
    estimates: int                           #: rows in the store, every estimator
    estimators: tuple[EstimatorTally, ...]
    mcse_targets: CheckTally
    block_heterogeneity: CheckTally
    warnings: tuple[str, ...]                #: estimators that failed too often, one sentence each

    @property
    def exit_status(self) -> int:
        """0, or ``EXIT_FAILED_REPLICATES`` if an estimator failed too often."""
        return EXIT_FAILED_REPLICATES if self.warnings else 0


def _tally(checks: list[dict], check: str) -> CheckTally:
    rows = [c for c in checks if c["check"] == check]
    judged = [c for c in rows if c["passed"] is not None]
    return CheckTally(judged=len(judged), not_passed=sum(1 for c in judged if not c["passed"]),
                      unknown=len(rows) - len(judged), limit=judged[0]["limit"] if judged else None)


def run_summary(layout: ResultsLayout) -> RunSummary:
    """Read the summary of the study whose results are under *layout* from its store."""
    con = open_read_only(layout.store)
    try:
        model = ReportModel.load(con)
        checks = report_data.checks(con)
    finally:
        con.close()
    tallies = []
    for name in model.estimator_names():
        mine = [c for c in model.counts if c["estimator"] == name]
        tallies.append(EstimatorTally(name, sum(c["rows"] for c in mine), sum(c["failed"] for c in mine)))
    return RunSummary(layout=layout, scenarios=len(model.scenarios),
                      estimates=sum(c["rows"] for c in model.counts), estimators=tuple(tallies),
                      mcse_targets=_tally(checks, "mcse_target"),
                      block_heterogeneity=_tally(checks, "block_heterogeneity"),
                      warnings=tuple(model.failure_warnings()))


def _plural(count: int, word: str) -> str:
    return f"{count} {word}{'' if count == 1 else 's'}"


def _mcse_line(t: CheckTally) -> str:
    if not t.judged and not t.unknown:
        return "MCSE targets: none set (study key `targets`)"
    unknown = f" ({t.unknown} could not be computed)" if t.unknown else ""
    return f"MCSE targets not met: {t.not_passed} of {t.judged + t.unknown}{unknown}"


def _blocks_line(t: CheckTally) -> str:
    if not t.judged:
        return "block heterogeneity: not tested (it needs at least 2 seed blocks)"
    return (f"block heterogeneity flags: {t.not_passed} of {_plural(t.judged, 'test')} "
            f"(about {t.limit * t.judged:.2g} expected by chance at alpha = {t.limit:g})")


def _failed_text(e: EstimatorTally) -> str:
    if not e.replicates:
        return "no replicates in the store"
    return f"{e.failed} of {e.replicates} ({share_text(e.failed, e.replicates)})"


def summary_lines(summary: RunSummary) -> list[str]:
    """The summary as the terminal shows it, one line each."""
    width = max((len(e.estimator) for e in summary.estimators), default=0)
    scenarios, estimators = _plural(summary.scenarios, "scenario"), _plural(len(summary.estimators), "estimator")
    lines = [f"estbench: done. {scenarios}, {estimators}, {summary.estimates} estimates in the store",
             "  failed replicates, over all scenarios:"]
    lines += [f"    {e.estimator:<{width}}  {_failed_text(e)}" for e in summary.estimators]
    lines += [f"  {_mcse_line(summary.mcse_targets)}", f"  {_blocks_line(summary.block_heterogeneity)}"]
    lines += [f"  warning: {w}" for w in summary.warnings]
    layout = summary.layout
    lines += [f"  Report: {layout.report_html}",
              f"  Measures: {layout.performance_csv}  Checks: {layout.checks_csv}"]
    if summary.warnings:
        lines.append(f"estbench: finished with {_plural(len(summary.warnings), 'warning')} about failed "
                     f"replicates (exit status {summary.exit_status}); the results and the report are kept")
    return lines
