"""Helpers every DGM kind shares: swept-value variants and parameter text."""

from __future__ import annotations

from typing import Mapping


def variants(params: Mapping):
    """(key-path suffix, params): every swept value tried once, the others at their first value."""
    base = {k: (v[0] if isinstance(v, list) else v) for k, v in params.items()}
    yield "", base
    for k, values in params.items():
        if isinstance(values, list):
            for i, value in enumerate(values[1:], 1):
                yield f".{k}[{i}]", {**base, k: value}


def params_text(params) -> str:
    """``df = 3, loc = 10``: parameters as a reader writes them."""
    return ", ".join(f"{k} = {v:g}" if isinstance(v, (int, float)) else f"{k} = {v}"
                     for k, v in (params or {}).items())
