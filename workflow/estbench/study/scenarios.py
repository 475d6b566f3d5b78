"""The scenario grid: DGM x swept parameter values x sample size, with stable keys.

A scenario key is a hash of the canonical JSON of (resolved DGM spec, n). It
never depends on the DGM's name, on list positions or on what else is in the
study, so adding, removing or reordering scenarios leaves every other
scenario's random streams alone.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import Mapping

from estbench.core.hashing import short_hash


def scenario_key(dgm_spec: Mapping, n: int) -> str:
    """16-hex-digit key of one scenario (first 64 bits of a SHA-256)."""
    return short_hash({"dgm": dgm_spec, "n": n})


@dataclass(frozen=True)
class Scenario:
    """One point of the grid."""

    key: str              #: stable hash key, also the folder name of its shards
    dgm: str              #: DGM name in the study (display only; not hashed)
    n: int                #: sample size
    spec: Mapping         #: resolved DGM spec (no sweeps left), what gets hashed
    swept: Mapping        #: swept parameter name -> value in this scenario

    @property
    def spawn_key(self) -> int:
        """The scenario's entry in ``SeedSequence.spawn_key``."""
        return int(self.key, 16)


def _dgm_core(spec: Mapping) -> dict:
    """The part of a DGM spec that defines the data (drops descriptions)."""
    return {k: v for k, v in spec.items() if k != "description"}


def expand_dgm(name: str, spec: Mapping, sample_sizes) -> list[Scenario]:
    """All scenarios of one DGM: cross product of its swept params, times n."""
    core = _dgm_core(spec)
    params = core.get("params", {})
    swept_names = sorted(k for k, v in params.items() if isinstance(v, list))
    grids = [params[k] for k in swept_names]
    out = []
    for values in itertools.product(*grids):
        resolved = dict(core)
        if "params" in core:
            resolved["params"] = {**params, **dict(zip(swept_names, values))}
        swept = dict(zip(swept_names, values))
        for n in sample_sizes:
            out.append(Scenario(scenario_key(resolved, n), name, int(n), resolved, swept))
    return out


def expand_study(dgms: Mapping[str, Mapping], sample_sizes) -> list[Scenario]:
    """Every scenario of a study, in study order (order never affects keys)."""
    return [s for name, spec in dgms.items() for s in expand_dgm(name, spec, sample_sizes)]
