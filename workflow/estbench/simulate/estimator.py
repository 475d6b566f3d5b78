"""The estimator contract: apply a callable to one seed block, errors as data.

A batch estimator takes the block's data (leading axis = replicates) plus its
keyword ``args`` (and ``level`` / ``rng`` if it declares them) and returns
either an array of estimates or an ``Estimates``/mapping with ``estimate`` and
optionally ``se``, ``ci_low``, ``ci_high``, ``p_value``, each of length
``reps``. ``per_replicate`` turns a function of one dataset into such a batch
estimator that records failures replicate by replicate.
"""

from __future__ import annotations

import contextlib
import functools
import math
import os
import pickle
import signal
import sys
import threading
from dataclasses import dataclass, fields
from typing import Callable, Mapping

import numpy as np

FIELDS = ("estimate", "se", "ci_low", "ci_high", "p_value")
STATUS_OK, STATUS_ERROR, STATUS_NONFINITE = "ok", "error", "nonfinite"
_MESSAGE_LIMIT = 200


@dataclass(frozen=True)
class Estimates:
    """What an estimator returns for a block (arrays of equal length)."""

    estimate: np.ndarray
    se: np.ndarray | None = None
    ci_low: np.ndarray | None = None
    ci_high: np.ndarray | None = None
    p_value: np.ndarray | None = None


@dataclass(frozen=True)
class BlockResult:
    """An estimator's outcome on one block: values plus per-replicate status."""

    columns: Mapping[str, np.ndarray | None]   #: FIELDS -> float arrays or None
    status: np.ndarray                         #: 'ok' | 'error' | 'nonfinite'
    message: np.ndarray                        #: object array, None where ok


class ContractError(ValueError):
    """The estimator returned something the contract does not allow."""


def short_message(exc: BaseException) -> str:
    """``Type: message`` on one line, cut to a readable length."""
    text = f"{type(exc).__name__}: {exc}".replace("\n", " ")
    return text if len(text) <= _MESSAGE_LIMIT else text[: _MESSAGE_LIMIT - 1] + "…"


def coerce(result, reps: int) -> dict[str, np.ndarray | None]:
    """Bring an estimator's return value to ``{field: float array or None}``."""
    if isinstance(result, Estimates):
        result = {f.name: getattr(result, f.name) for f in fields(result)}
    if not isinstance(result, Mapping):
        result = {"estimate": result}
    unknown = set(result) - set(FIELDS)
    if unknown:
        raise ContractError(f"returned unknown field(s) {sorted(unknown)}; allowed: {', '.join(FIELDS)}")
    if result.get("estimate") is None:
        raise ContractError("returned no 'estimate'")
    out = {}
    for name in FIELDS:
        value = result.get(name)
        if value is None:
            out[name] = None
            continue
        arr = np.asarray(value, dtype=float)
        if arr.shape != (reps,):
            raise ContractError(f"'{name}' has shape {arr.shape}; expected ({reps},), "
                                f"one value per replicate")
        out[name] = arr
    return out


def _classify(columns: Mapping[str, np.ndarray | None], reps: int):
    """Status 'nonfinite' where the estimate is not finite or any other field is NaN."""
    status = np.full(reps, STATUS_OK, dtype=object)
    message = np.full(reps, None, dtype=object)
    for name in FIELDS:
        arr = columns[name]
        if arr is None:
            continue
        bad = ~np.isfinite(arr) if name == "estimate" else np.isnan(arr)
        fresh = bad & (status == STATUS_OK)
        status[fresh] = STATUS_NONFINITE
        message[fresh] = f"{name} is not finite"
    return status, message


def failed_block(reps: int, message: str) -> BlockResult:
    """Every replicate of a block failed with *message*."""
    empty = {name: None for name in FIELDS}
    empty["estimate"] = np.full(reps, np.nan)
    return BlockResult(empty, np.full(reps, STATUS_ERROR, dtype=object), np.full(reps, message, dtype=object))


def apply_to_block(fn: Callable, data, reps: int, kwargs: Mapping) -> BlockResult:
    """Run *fn* on one block; an exception or bad output marks the whole block.

    ``sys.exit`` in the estimator counts as an exception, and what it prints goes
    to stderr: stdout may be carrying data (``estbench query``). Per-replicate
    failures come from ``per_replicate`` estimators, which return NaN and attach
    their messages (see there).
    """
    try:
        with contextlib.redirect_stdout(sys.stderr):
            raw = fn(data, **kwargs)
        columns = coerce(raw, reps)
    except (Exception, SystemExit) as exc:  # errors are data: the shard carries on
        return failed_block(reps, short_message(exc))
    status, message = _classify(columns, reps)
    errors = getattr(raw, "errors", None)
    if errors:
        for i, text in errors.items():
            status[i], message[i] = STATUS_ERROR, text
    return BlockResult(columns, status, message)


def _ended(wait_status: int) -> str:
    """What ended a child process, from its ``waitpid`` status."""
    code = os.waitstatus_to_exitcode(wait_status)
    if code < 0:
        return (f"ProcessEnded: the estimator crashed the Python process (signal "
                f"{signal.Signals(-code).name}: {signal.strsignal(-code)})")
    return f"ProcessEnded: the estimator ended the Python process (exit status {code})"


def apply_in_child(fn: Callable, data, reps: int, kwargs: Mapping) -> BlockResult:
    """``apply_to_block`` in a forked child process, for trial runs.

    An estimator that ends or crashes its process (``os._exit``, a segmentation
    fault) then fails this block instead of taking the caller down. A fork costs
    milliseconds: fine for a trial run, too much for every block of a job, which
    calls ``apply_to_block`` directly. Without ``os.fork``, runs in process.
    """
    if not hasattr(os, "fork"):
        return apply_to_block(fn, data, reps, kwargs)
    sys.stdout.flush()
    sys.stderr.flush()
    read_end, write_end = os.pipe()
    pid = os.fork()
    if pid == 0:  # the child: send the result back, never return into the caller's code
        code = 1
        try:
            os.close(read_end)
            payload = pickle.dumps(apply_to_block(fn, data, reps, kwargs))
            with os.fdopen(write_end, "wb") as pipe:
                pipe.write(payload)
            code = 0
        finally:
            sys.stderr.flush()
            os._exit(code)
    os.close(write_end)
    try:
        with os.fdopen(read_end, "rb") as pipe:
            payload = pipe.read()
        _, wait_status = os.waitpid(pid, 0)
    except BaseException:  # Ctrl-C while a trial run hangs: the child goes too
        with contextlib.suppress(ProcessLookupError, ChildProcessError):
            os.kill(pid, signal.SIGKILL)
            os.waitpid(pid, 0)
        raise
    if os.waitstatus_to_exitcode(wait_status) == 0 and payload:
        return pickle.loads(payload)
    return failed_block(reps, _ended(wait_status))


class _PerReplicateEstimates(dict):
    """A mapping of fields that also carries per-replicate error messages."""

    errors: dict


class TimeLimitExceeded(Exception):
    """A replicate ran longer than the estimator's per-replicate time limit."""


@contextlib.contextmanager
def _time_limit(seconds: float | None):
    """Raise ``TimeLimitExceeded`` in the block after *seconds* (main thread, Unix only)."""
    usable = (seconds and hasattr(signal, "setitimer")
              and threading.current_thread() is threading.main_thread())
    if not usable:
        yield
        return

    def expire(signum, frame):
        raise TimeLimitExceeded(f"replicate took longer than {seconds:g} s")

    previous = signal.signal(signal.SIGALRM, expire)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


def per_replicate(fn: Callable | None = None, *, time_limit: float | None = None):
    """Wrap a function of one dataset into a batch estimator.

    Use as ``@per_replicate`` or ``@per_replicate(time_limit=2.0)``. The wrapped
    function is called once per replicate with that replicate's data
    (``data[i]``, or a dict of each array's row i) and the same keyword
    arguments. It returns a number or a mapping with the contract's fields.
    An exception in replicate *i*, or a run longer than ``time_limit``
    seconds, is recorded as status 'error' for *i* alone, with its message.
    """
    if fn is None:
        return functools.partial(per_replicate, time_limit=time_limit)

    @functools.wraps(fn)
    def batch(data, **kwargs):
        reps = len(next(iter(data.values()))) if isinstance(data, Mapping) else len(data)
        cols = {name: np.full(reps, np.nan) for name in FIELDS}
        present = {"estimate"}
        errors = {}
        for i in range(reps):
            row = {k: v[i] for k, v in data.items()} if isinstance(data, Mapping) else data[i]
            try:
                with _time_limit(time_limit):
                    out = fn(row, **kwargs)
            except (Exception, SystemExit) as exc:
                errors[i] = short_message(exc)
                continue
            out = out if isinstance(out, Mapping) else {"estimate": out}
            for name, value in out.items():
                if name not in cols:
                    errors[i] = f"ContractError: unknown field {name!r}"
                    break
                cols[name][i] = math.nan if value is None else float(value)
                present.add(name)
        result = _PerReplicateEstimates({n: (cols[n] if n in present else None) for n in FIELDS})
        result.errors = errors
        return result

    batch.per_replicate = True
    return batch
