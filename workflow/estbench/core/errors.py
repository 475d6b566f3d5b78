"""User errors and the one handler every entry point uses.

A user error (bad study file, missing store, failing query) prints one clear
line per problem, never a traceback, and exits with status 2. A bug keeps its
traceback.
"""

from __future__ import annotations

import errno
import sys
from functools import wraps
from typing import Callable

#: Exit status of ``estbench run`` when the workflow itself failed (Snakemake stopped).
EXIT_RUN_FAILED = 1
#: Exit status of every estbench entry point when the user can fix the problem.
EXIT_USER_ERROR = 2
#: Exit status of ``estbench run`` when the run completed but an estimator failed too
#: often (on every replicate of a scenario, or above the study's ``max_failed_share``).
EXIT_FAILED_REPLICATES = 3
#: Exit status after Ctrl-C (128 + SIGINT).
EXIT_INTERRUPTED = 130


class UserError(Exception):
    """A problem the user can fix (bad study file, missing store, bad query).

    Carries one or more problem lines; entry points print them and exit with 2.
    """

    def __init__(self, problems: str | list[str]):
        self.problems = [problems] if isinstance(problems, str) else list(problems)
        super().__init__("\n".join(self.problems))

    def lines(self) -> list[str]:
        """What the user sees, one line per problem."""
        return [f"estbench: {line}" for line in self.problems]


class StudyError(UserError):
    """The study file breaks the schema or a semantic rule."""

    def __init__(self, problems: str | list[str], source=None):
        super().__init__(problems)
        self.source = source

    def lines(self) -> list[str]:
        n = len(self.problems)
        where = f"the study file {self.source}" if self.source is not None else "the study"
        return [f"estbench: {where} has {n} problem{'s' if n != 1 else ''}:",
                *(f"  {line}" for line in self.problems)]


#: ``OSError`` numbers of a full disk, and of a file or folder estbench may not write.
_NO_SPACE = (errno.ENOSPC, errno.EDQUOT)
_NOT_ALLOWED = (errno.EROFS, errno.EACCES, errno.EPERM)


def environment_problem(exc: BaseException) -> str | None:
    """One line for a full disk or a file estbench may not write; None if *exc* is
    anything else. (DuckDB reports a full disk in its own exception type, hence the
    message test.)"""
    number = exc.errno if isinstance(exc, OSError) else None
    name = getattr(exc, "filename", None)
    if number in _NO_SPACE or "No space left on device" in str(exc):
        return (f"no space left on the disk{f' (writing {name})' if name else ''}: free some space and "
                f"run the same command again; finished shards are kept")
    if number in _NOT_ALLOWED:
        return (f"cannot use {name or 'a file'}: {exc.strerror}; estbench writes results/<study>/ and "
                f".snakemake/ in the folder it runs in: make them writable, then run the same command again")
    return None


def entry_point(main: Callable[..., int]) -> Callable[..., int]:
    """Wrap a ``main(argv=None) -> int``: user errors, a full disk and a read-only
    folder become one line on stderr and exit status 2, Ctrl-C exits 130, a closed
    output pipe exits 0."""
    @wraps(main)
    def guarded(*args, **kwargs) -> int:
        try:
            return main(*args, **kwargs)
        except UserError as exc:
            for line in exc.lines():
                print(line, file=sys.stderr)
            return EXIT_USER_ERROR
        except BrokenPipeError:  # output piped into e.g. `head`, which stopped reading
            sys.stderr.close()
            return 0
        except KeyboardInterrupt:
            print("estbench: interrupted; run the same command again to resume", file=sys.stderr)
            return EXIT_INTERRUPTED
        except Exception as exc:
            line = environment_problem(exc)
            if line is None:
                raise  # a bug: it keeps its traceback
            print(f"estbench: {line}", file=sys.stderr)
            return EXIT_USER_ERROR
    return guarded
