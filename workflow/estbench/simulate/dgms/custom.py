"""DGM kind ``generator``: a user's ``module:function`` with its ``truth`` companion.

Spec: ``generator: "module:function"``, ``truth: "module:function"``, optional ``params``.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Mapping

import numpy as np

from estbench.core.hashing import canonical_json, short_hash
from estbench.simulate import plugins
from estbench.simulate.dgms.common import params_text

#: The spec key that selects this kind.
KEY = "generator"
#: Spawn-key slot of a simulated truth's own stream: never a seed-block index.
TRUTH_STREAM = 2**64


@dataclass(frozen=True)
class CustomDGM:
    """A user's generator ``module:function`` with its ``truth`` companion.

    ``generator(rng, reps, n, **params)`` returns the block's data: an array
    with leading axis ``reps``, or a dict of such arrays. ``truth(**params)``
    returns ``{estimand: value}`` or ``{estimand: (value, mcse)}``; if it
    declares ``rng`` it gets a stream of its own (seed, spawn_key=(DGM key,
    2**64)), independent of every seed block, so a simulated truth reproduces.
    """

    generator: str
    truth_function: str
    params: Mapping
    search_dirs: tuple = ()
    seed: int = 0

    def draw(self, rng: np.random.Generator, reps: int, n: int):
        fn = plugins.resolve(self.generator, self.search_dirs)
        return fn(rng, reps, n, **self.params)

    def _table(self) -> dict:
        return _custom_truth(self.truth_function, canonical_json(self.params), self.search_dirs, self.seed)

    def estimands(self) -> tuple:
        return tuple(self._table())

    def truth(self, estimand: str) -> float:
        return self._table().get(estimand, (math.nan, math.nan))[0]

    def truth_mcse(self, estimand: str) -> float:
        return self._table().get(estimand, (math.nan, math.nan))[1]

    def crb(self, estimand: str, n: int) -> float:
        return math.nan


@lru_cache(maxsize=256)
def _custom_truth(ref: str, params_json: str, search_dirs: tuple, seed: int) -> dict:
    """Call a truth function once per (function, params, seed) in this process."""
    params = json.loads(params_json)
    fn = plugins.resolve(ref, search_dirs)
    kwargs = dict(params)
    if plugins.accepts(fn, "rng"):
        key = int(short_hash({"truth": ref, "params": params}), 16)
        ss = np.random.SeedSequence(entropy=seed, spawn_key=(key, TRUTH_STREAM))
        kwargs["rng"] = np.random.Generator(np.random.PCG64DXSM(ss))
    out = fn(**kwargs)
    if not isinstance(out, Mapping):
        raise TypeError(f"{ref} must return a mapping estimand -> value or (value, mcse), "
                        f"got {type(out).__name__}")
    table = {}
    for estimand, value in out.items():
        v, m = (value if isinstance(value, (tuple, list)) else (value, 0.0))
        table[str(estimand)] = (float(v), float(m))
    return table


def build(spec: Mapping, search_dirs=(), seed: int = 0) -> CustomDGM:
    return CustomDGM(spec["generator"], spec["truth"], dict(spec.get("params", {})),
                     tuple(search_dirs), int(seed))


def describe(spec: Mapping) -> str:
    return (f"generator {spec['generator']}({params_text(spec.get('params'))}), "
            f"truth from {spec.get('truth', '?')}")


def problems(where: str, spec: Mapping, search_dirs) -> list[str]:
    """The generator and the truth function import and are callable."""
    found = []
    for key in ("generator", "truth"):
        try:
            plugins.resolve(spec[key], search_dirs)
        except (ImportError, AttributeError, TypeError) as exc:
            found.append(f"{where}.{key}`: cannot use {spec[key]!r}: {exc}")
    return found
