"""Extend a study until precise: add seed blocks, scenario by scenario, until every
MCSE target is met or a replicate cap is hit.

The number of seed blocks of each scenario beyond the study's own ``replicates``
is kept in ``results/<study>/allocation.json`` (see ``estbench.study.allocation``). The
workflow reads it, so a later plain ``estbench run`` keeps the same replicates,
and the numbers equal those of a study run with that many replicates from the
start: blocks are the same streams whatever their number.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path
from typing import Callable

from estbench.core.errors import UserError
from estbench.analyse.measures import compute_checks, plan_replicates
from estbench.analyse.store import measure_options, open_read_only
from estbench.study.allocation import save_allocation, with_allocation
from estbench.study.model import Study


def first_sufficient_blocks(study: Study, workdir: Path | str = ".") -> tuple[dict, dict]:
    """For each scenario, the smallest block count k >= the study's own at which every
    targeted MCSE is met, judged on blocks 0..k-1 in the store.

    Returns ``(first, present)``: scenario -> k (only scenarios that meet every
    target), and scenario -> blocks in the store.
    """
    con = open_read_only(study.layout(workdir).store)
    try:
        present = dict(con.execute(
            "SELECT scenario, max(block) + 1 FROM estimates GROUP BY scenario").fetchall())
        first: dict[str, int] = {}
        options = measure_options(study)
        for k in range(study.n_blocks, max(present.values(), default=0) + 1):
            open_ = [s for s, blocks in present.items() if s not in first and blocks >= k]
            if not open_:
                break
            con.execute(f"CREATE OR REPLACE TEMP VIEW first_blocks AS "
                        f"SELECT * FROM estimates WHERE block < {int(k)}")
            met: dict[str, bool] = {}
            for row in compute_checks(con, "first_blocks", "truth", study.targets, **options).to_pylist():
                if row["check"] == "mcse_target":
                    met[row["scenario"]] = met.get(row["scenario"], True) and bool(row["passed"])
            for s in open_:
                if met.get(s):
                    first[s] = k
        return first, present
    finally:
        con.close()


def predicted_blocks(study: Study, workdir: Path | str = ".") -> dict:
    """Blocks each scenario needs by the n_sim formulas, from everything in the store."""
    con = open_read_only(study.layout(workdir).store)
    try:
        table = plan_replicates(con, "estimates", "truth", study.targets, **measure_options(study))
    finally:
        con.close()
    need: dict[str, int] = {}
    for row in table.to_pylist():
        if row["n_to_run"] is not None:
            blocks = math.ceil(row["n_to_run"] / study.block_size)
            need[row["scenario"]] = max(need.get(row["scenario"], 0), blocks)
    return need


def run_until_precise(study: Study, run: Callable[[Study], int], max_replicates: int,
                      workdir: Path | str = ".", say: Callable[[str], None] = print) -> int:
    """Run, check the targets, add blocks where they are not met; repeat.

    *run* runs the workflow for a study (with its allocation saved) and returns an
    exit status. Stops when every scenario meets every target (then each keeps the
    first block count that did) or when the unmet ones reach *max_replicates*.
    """
    if not study.targets:
        raise UserError("`targets`: --until-precise needs at least one MCSE target in the study")
    cap = max(study.n_blocks, math.ceil(max_replicates / study.block_size))
    allocation = dict(with_allocation(study, workdir).allocation)
    for round_no in range(1, 1000):
        save_allocation(study, allocation, workdir)
        code = run(dataclasses.replace(study, allocation=allocation))
        if code != 0:
            return code
        first, present = first_sufficient_blocks(study, workdir)
        unmet = [s.key for s in study.scenarios if s.key not in first]
        say(f"estbench: round {round_no}: {len(study.scenarios) - len(unmet)} of {len(study.scenarios)} "
            f"scenarios meet every target")
        settled = {k: v for k, v in first.items() if v > study.n_blocks}
        if not unmet:
            if settled != {k: v for k, v in allocation.items() if v > study.n_blocks}:
                save_allocation(study, settled, workdir)  # keep the first sufficient count
                code = run(dataclasses.replace(study, allocation=settled))
            _report(study, settled, say)
            return code
        need = predicted_blocks(study, workdir)
        grown = dict(settled)
        for s in unmet:
            grown[s] = min(cap, max(present.get(s, 0) + 1, need.get(s, 0)))
        if all(present.get(s, 0) >= cap for s in unmet):
            say(f"estbench: {len(unmet)} scenario(s) still miss a target at the cap of "
                f"{cap * study.block_size} replicates (--max-replicates); stopping there")
            save_allocation(study, grown, workdir)
            code = run(dataclasses.replace(study, allocation=grown))
            _report(study, grown, say)
            return code
        allocation = grown
    return 1


def _report(study: Study, allocation: dict, say) -> None:
    for s in study.scenarios:
        blocks = max(study.n_blocks, allocation.get(s.key, 0))
        say(f"  {s.dgm} n={s.n}: {blocks * study.block_size} replicates")
