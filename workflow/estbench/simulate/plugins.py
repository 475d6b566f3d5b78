"""Find user and built-in callables named ``module:callable``.

Modules are looked for in the folder of the study file first, then in its
``estimators/`` subfolder (a project made by ``estbench init``), then among
the built-in estimators bundled with estbench, then on the normal import path.
"""

from __future__ import annotations

import functools
import importlib
import importlib.util
import inspect
import sys
from pathlib import Path
from types import ModuleType
from typing import Callable, Iterable

from estbench.core.bundled import BUILTIN_ESTIMATORS


def search_path(study_dir: Path | str | None) -> list[str]:
    """Folders searched for estimator modules, in order."""
    dirs = []
    if study_dir is not None:
        study_dir = Path(study_dir).resolve()
        dirs = [study_dir, *([study_dir / "estimators"] if (study_dir / "estimators").is_dir() else [])]
    return [str(d) for d in [*dirs, BUILTIN_ESTIMATORS]]


def _with_path(dirs: Iterable[str]):
    for d in reversed(list(dirs)):
        if d not in sys.path:
            sys.path.insert(0, d)


def resolve(ref: str, dirs: Iterable[str]) -> Callable:
    """Import ``module:callable`` with *dirs* searched first.

    Raises ``ImportError`` (module missing or failing to import) or
    ``AttributeError``/``TypeError`` (no such callable) with a plain message.
    """
    module_name, _, attr = ref.partition(":")
    _with_path(dirs)
    try:
        module = importlib.import_module(module_name)
    except ModuleNotFoundError as exc:
        if exc.name and module_name.startswith(exc.name):
            raise ImportError(f"no module {module_name!r} beside the study file, in its estimators/ folder, "
                              f"among the built-in estimators or on the Python path") from None
        raise ImportError(f"module {module_name!r} failed to import: {exc}") from None
    except Exception as exc:  # a user module with a bug: report it, don't crash
        raise ImportError(f"module {module_name!r} failed to import: "
                          f"{type(exc).__name__}: {exc}") from None
    fn = getattr(module, attr, None)
    if fn is None:
        raise AttributeError(f"module {module_name!r} has no attribute {attr!r}")
    if not callable(fn):
        raise TypeError(f"{ref} is not callable")
    return fn


def code_files(ref: str, dirs: Iterable[str]) -> list[Path]:
    """Source files whose code decides what ``module:callable`` computes.

    The module's own file first, then the modules it uses from the same folder
    (e.g. a shared ``_helpers.py``), followed transitively. Editing any of them
    reruns the estimator's shards and changes its code hash.
    """
    fn = resolve(ref, dirs)
    root = sys.modules[fn.__module__]
    folder = Path(inspect.getsourcefile(root)).resolve().parent
    found, todo = [], [root]
    while todo:
        module = todo.pop(0)
        path = Path(inspect.getsourcefile(module)).resolve()
        if path in found:
            continue
        found.append(path)
        for value in vars(module).values():
            used = value if isinstance(value, ModuleType) else sys.modules.get(getattr(value, "__module__", None) or "")
            file = getattr(used, "__file__", None)
            if used is not None and file and Path(file).resolve().parent == folder:
                todo.append(used)
    return found


def accepts(fn: Callable, name: str) -> bool:
    """Does *fn* declare a parameter called *name*? (``**kwargs`` does not count.)"""
    try:
        return name in _cached_parameters(fn)
    except TypeError:  # an unhashable callable
        return name in _parameters(fn)


def _parameters(fn: Callable) -> frozenset:
    try:
        return frozenset(inspect.signature(fn).parameters)
    except (TypeError, ValueError):
        return frozenset()


#: Parameter names looked up once per callable: a packed job asks for every piece.
_cached_parameters = functools.lru_cache(maxsize=256)(_parameters)
