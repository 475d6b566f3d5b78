"""How each estimator is drawn: colour, marker and line, the same in every figure.

Kept apart from ``figures`` so that reading the report model (e.g. for the run
summary) does not import matplotlib.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

# A colour-blind-safe qualitative palette (Okabe & Ito, 2008, "Color Universal
# Design"), without its yellow, which is hard to see on white.
PALETTE = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000")
MARKERS = ("o", "s", "^", "D", "v", "P", "X")
DASHES = ("-", "--", ":", "-.")


@dataclass(frozen=True)
class Style:
    """How one estimator is drawn in every figure."""

    colour: str
    marker: str
    line: str


def estimator_styles(estimators: Sequence[str]) -> dict[str, Style]:
    """Colour, marker and line style per estimator, by position in the study.

    Adding an estimator at the end keeps every other estimator's style.
    """
    k = len(PALETTE)
    return {name: Style(PALETTE[i % k], MARKERS[i % len(MARKERS)], DASHES[(i // k) % len(DASHES)])
            for i, name in enumerate(estimators)}
