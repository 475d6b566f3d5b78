"""User errors and the one handler every entry point uses.

A user error (bad study file, missing store, failing query) prints one clear
line per problem, never a traceback, and exits with status 2. A bug keeps its
traceback.
"""

from __future__ import annotations

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


def entry_point(main: Callable[..., int]) -> Callable[..., int]:
    """Wrap a ``main(argv=None) -> int``: user errors become their lines on stderr
    and exit status 2, Ctrl-C exits 130, a closed output pipe exits 0."""
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
    return guarded
