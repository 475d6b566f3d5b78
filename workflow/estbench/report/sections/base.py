"""What every report section is given to build its part of the page."""

from __future__ import annotations

from dataclasses import dataclass

import duckdb

from estbench.report.figure_queue import FigureQueue
from estbench.report.model import ReportModel


@dataclass(frozen=True)
class SectionInputs:
    """The store's connection (read-only), its small tables, the Monte Carlo checks and
    the queue on which a section puts its figures (drawn after the store is closed)."""

    model: ReportModel
    con: duckdb.DuckDBPyConnection
    queue: FigureQueue
    checks: list
