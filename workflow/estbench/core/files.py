"""Write a file so that readers see the old content or the new, never half of either."""

from __future__ import annotations

import os
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator


def temporary_name(path: Path | str) -> Path:
    """``<path>.tmp-<pid>``: where *path* is written before it is moved into place."""
    path = Path(path)
    return path.with_name(f"{path.name}.tmp-{os.getpid()}")


def remove_leftovers(path: Path | str) -> None:
    """Delete temporary files of *path* left by a killed process."""
    path = Path(path)
    for leftover in path.parent.glob(f"{path.name}.tmp-*"):
        leftover.unlink(missing_ok=True)


@contextmanager
def atomic_path(path: Path | str) -> Iterator[Path]:
    """Yield a temporary path to write; on success it replaces *path* in one step.

    The folder is created if needed. If the block raises, the temporary file is
    removed and *path* is left as it was.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = temporary_name(path)
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def write_text_atomically(path: Path | str, text: str) -> None:
    """Write *text* (UTF-8) to *path* through a temporary file and ``os.replace``."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
