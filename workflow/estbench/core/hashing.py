"""Canonical JSON and short SHA-256 digests: the keys of scenarios, specs and code."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Any, Iterable, Mapping


def canonical_number(x: Any) -> Any:
    """Integral floats become ints (``0.0`` and ``0`` hash alike); other values pass."""
    if isinstance(x, float) and x.is_integer():
        return int(x)
    return x


def canonical_json(obj: Any) -> str:
    """Sorted-key, whitespace-free JSON with canonical numbers."""
    def norm(o):
        if isinstance(o, Mapping):
            return {str(k): norm(v) for k, v in o.items()}
        if isinstance(o, (list, tuple)):
            return [norm(v) for v in o]
        return canonical_number(o)
    return json.dumps(norm(obj), sort_keys=True, separators=(",", ":"), allow_nan=False)


def short_hash(obj: Any) -> str:
    """16 hex digits (64 bits) of the SHA-256 of *obj*'s canonical JSON."""
    return hashlib.sha256(canonical_json(obj).encode()).hexdigest()[:16]


def code_hash(paths: Iterable[Path | str]) -> str:
    """Short SHA-256 over source files' bytes: which code produced a shard."""
    h = hashlib.sha256()
    for path in paths:
        h.update(Path(path).read_bytes())
    return h.hexdigest()[:16]


def file_sha256(path: Path | str) -> str:
    """Full SHA-256 of a file's bytes, read in 1 MiB chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()
