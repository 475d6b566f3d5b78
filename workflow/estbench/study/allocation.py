"""Seed blocks per scenario settled by ``estbench run --until-precise``.

Kept in ``results/<study>/allocation.json`` (scenario key -> blocks); the
workflow, ingest and status all read it, so a later plain run keeps the same
replicates. Blocks are the same streams whatever their number, so the numbers
equal those of a study run with that many replicates from the start.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

from estbench.core.files import write_text_atomically
from estbench.study.model import Study


def with_allocation(study: Study, workdir: Path | str = ".") -> Study:
    """The study with the seed blocks an earlier ``--until-precise`` run settled on."""
    path = study.layout(workdir).allocation
    if not path.exists():
        return study
    allocation = {k: int(v) for k, v in json.loads(path.read_text()).items()}
    return dataclasses.replace(study, allocation=allocation)


def save_allocation(study: Study, allocation: dict, workdir: Path | str = ".") -> None:
    """Keep *allocation* (scenario key -> seed blocks) for later runs."""
    write_text_atomically(study.layout(workdir).allocation, json.dumps(dict(sorted(allocation.items())), indent=1) + "\n")
