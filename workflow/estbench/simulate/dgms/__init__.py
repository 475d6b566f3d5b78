"""Data-generating mechanisms: one module per kind, and the registry that picks one.

A DGM is built from one scenario's resolved spec (no swept lists left). It
draws a block of data (leading axis = replicates) from a
``numpy.random.Generator`` in one vectorised call, and answers, for each
estimand it knows: the true value, the Monte Carlo SE of that value (0 unless
the truth itself was simulated) and, where known, the Cramér–Rao bound.

Each kind module (``distribution``, ``mixture``, ``mechanism``, ``custom``) owns
its spec key (``KEY``), its checks (``problems``), its building (``build``) and
its description in the report (``describe``). A new kind is a new module here,
an entry in ``KIND_MODULES`` and its branch in the schema's ``dgm`` definition (a
test checks that the two agree).

A kind's module is imported when a spec of that kind is first used, so a
simulation job imports only what its own DGMs need (``distribution`` and
``mixture`` bring scipy.stats, about a CPU-second; ``mechanism`` and a user's
``generator`` need numpy only).
"""

from __future__ import annotations

import importlib
from types import ModuleType
from typing import Mapping

#: Spec key -> the module of that DGM kind.
KIND_MODULES: Mapping[str, str] = {
    "distribution": "estbench.simulate.dgms.distribution",
    "mixture": "estbench.simulate.dgms.mixture",
    "mechanism": "estbench.simulate.dgms.mechanism",
    "generator": "estbench.simulate.dgms.custom",
}


def kind_module(key: str) -> ModuleType:
    """The module of DGM kind *key* (a key of ``KIND_MODULES``), imported on first use."""
    return importlib.import_module(KIND_MODULES[key])


def kind_of(spec: Mapping) -> ModuleType:
    """The kind module of a DGM spec (the schema guarantees exactly one kind key)."""
    for key in KIND_MODULES:
        if key in spec:
            return kind_module(key)
    raise ValueError(f"a DGM spec needs one of {', '.join(KIND_MODULES)}; got keys {', '.join(spec)}")


def build_dgm(spec: Mapping, search_dirs=(), seed: int = 0):
    """Build the DGM of one scenario from its resolved (sweep-free) spec.

    *search_dirs* and *seed* matter only for user generators (module lookup and
    the stream of a simulated truth).
    """
    return kind_of(spec).build(spec, search_dirs, seed)


def describe_spec(spec: Mapping) -> str:
    """A DGM spec as a reader writes it: ``t(df = 3, loc = 10, scale = 0.5)``."""
    return kind_of(spec).describe(spec)


def spec_problems(name: str, spec: Mapping, search_dirs) -> list[str]:
    """Problems with DGM *name*'s spec (all swept values), one line each."""
    return kind_of(spec).problems(f"`dgms.{name}", spec, search_dirs)
