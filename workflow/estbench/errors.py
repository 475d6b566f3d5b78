"""User-facing errors: one clear line per problem, never a traceback."""

from __future__ import annotations


class UserError(Exception):
    """A problem the user can fix (bad study file, missing store, bad query).

    Carries one or more problem lines; the CLI prints them and exits with 2.
    """

    def __init__(self, problems: str | list[str]):
        self.problems = [problems] if isinstance(problems, str) else list(problems)
        super().__init__("\n".join(self.problems))


class StudyError(UserError):
    """The study file breaks the schema or a semantic rule."""
