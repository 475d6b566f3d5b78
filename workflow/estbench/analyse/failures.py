"""Failed replicates: which scenario x estimator pairs failed too often, and how a
share of replicates is printed.

A replicate fails when its estimator raised or returned a non-finite value
(status other than 'ok'); failed replicates are left out of every measure. Where
an estimator fails on every replicate of a scenario it has no measures there, and
where it fails often the replicates left may no longer be a fair sample of the
datasets: both are flagged. The limit is the study's ``max_failed_share``.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

from estbench.study.model import DEFAULT_MAX_FAILED_SHARE


def share_text(part: int, whole: int) -> str:
    """*part* of *whole* as a percentage with one decimal: '0.0%', '12.5%', '100%'.

    A share that is neither none nor all never prints as '0.0%' or '100.0%'
    ('<0.1%', '>99.9%' instead), so a printed share never hides a failure.
    """
    if whole < 1 or not 0 <= part <= whole:
        raise ValueError(f"`part` must be between 0 and `whole` >= 1, got {part} of {whole}")
    if part == whole:
        return "100%"
    text = f"{100 * part / whole:.1f}%"
    if part and text == "0.0%":
        return "<0.1%"
    return ">99.9%" if text == "100.0%" else text


def max_failed_share_of(study_row: Mapping) -> float:
    """The study's ``max_failed_share`` from its row in the store (the default for a
    store written before the key existed)."""
    value = study_row.get("max_failed_share")
    return DEFAULT_MAX_FAILED_SHARE if value is None else float(value)


@dataclass(frozen=True)
class FailureWarning:
    """An estimator that failed too often in one scenario."""

    scenario: str
    estimator: str
    failed: int
    replicates: int
    max_failed_share: float

    @property
    def every(self) -> bool:
        """True if it failed on every replicate."""
        return self.failed == self.replicates

    def text(self, where: str) -> str:
        """One sentence; *where* names the scenario."""
        if self.every:
            return (f"{self.estimator} failed on every replicate of {where} "
                    f"({self.failed} of {self.replicates}, 100%)")
        return (f"{self.estimator} failed on {self.failed} of {self.replicates} replicates of {where} "
                f"({share_text(self.failed, self.replicates)}), more than max_failed_share = "
                f"{self.max_failed_share:g}")


def failure_warnings(counts: Iterable[Mapping], max_failed_share: float, scenarios: Sequence[str],
                     estimators: Sequence[str]) -> list[FailureWarning]:
    """Every scenario x estimator pair that failed on all its replicates or on a
    share above *max_failed_share*, in the order of *scenarios*, then *estimators*.

    *counts* has one row per pair with keys scenario, estimator, rows, failed; a
    pair without rows is not flagged (the report calls the store incomplete).
    """
    if not 0 <= max_failed_share < 1:
        raise ValueError(f"`max_failed_share` must be in [0, 1), got {max_failed_share!r}")
    by_pair = {(c["scenario"], c["estimator"]): c for c in counts}
    out = []
    for scenario in scenarios:
        for estimator in estimators:
            c = by_pair.get((scenario, estimator))
            if c and c["rows"] and c["failed"] / c["rows"] > max_failed_share:
                out.append(FailureWarning(scenario, estimator, int(c["failed"]), int(c["rows"]),
                                          max_failed_share))
    return out
