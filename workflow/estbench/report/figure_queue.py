"""The page's figures: queued while the sections are built, drawn at the end.

Drawing is most of the time a report takes, and every figure is independent,
so ``FigureQueue.draw`` spreads them over the available cores (forked
workers, after the store connection is closed). Each figure gets a
sequential id prefix, so the page is the same however it was drawn.
"""

from __future__ import annotations

import multiprocessing
import os
import sys
from concurrent.futures import ProcessPoolExecutor

from estbench.report import figures

#: Most worker processes used, and fewest figures worth a pool.
MAX_WORKERS = 4
MIN_FOR_POOL = 4


def _cores() -> int:
    if hasattr(os, "sched_getaffinity"):
        return len(os.sched_getaffinity(0))
    return os.cpu_count() or 1


def _draw(job: tuple) -> str:
    name, kwargs = job
    return getattr(figures, name)(**kwargs)


class FigureQueue:
    """Figures of the page in order; each is a dict the template shows."""

    def __init__(self) -> None:
        self._jobs: list[tuple[dict, tuple]] = []

    def add(self, draw, caption: str, heading: str, label: str, /, **kwargs) -> dict:
        """Queue ``figures.<draw>(**kwargs, label=label, uid=...)``; return the
        figure's dict, whose ``svg`` is filled in by :meth:`draw`.

        *caption* says what to look for, *heading* is a short name shown before
        it, *label* the SVG's text alternative.
        """
        if getattr(figures, draw.__name__, None) is not draw:
            raise ValueError(f"`draw` must be a function of estbench.report.figures, got {draw!r}")
        figure = {"svg": None, "caption": caption, "heading": heading}
        uid = f"fig{len(self._jobs) + 1}"
        self._jobs.append((figure, (draw.__name__, {**kwargs, "label": label, "uid": uid})))
        return figure

    def __len__(self) -> int:
        return len(self._jobs)

    def draw(self, workers: int | None = None) -> None:
        """Draw every queued figure, in parallel when it pays (on Linux, where
        forking a process that has loaded matplotlib is safe)."""
        workers = workers or min(MAX_WORKERS, _cores())
        jobs = [job for _, job in self._jobs]
        if workers > 1 and len(jobs) >= MIN_FOR_POOL and sys.platform.startswith("linux"):
            with ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context("fork")) as pool:
                svgs = list(pool.map(_draw, jobs))
        else:
            svgs = [_draw(job) for job in jobs]
        for (figure, _), svg in zip(self._jobs, svgs):
            figure["svg"] = svg
