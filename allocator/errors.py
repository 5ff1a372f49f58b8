"""Exceptions that the command line turns into one-line messages and exit codes."""

from __future__ import annotations


class AllocatorError(Exception):
    """Base class of the errors the tool reports without a traceback."""

    exit_code = 2


class CaseError(AllocatorError, ValueError):
    """Bad input: names the file, the field path and what is wrong (exit code 2).

    ``str(err)`` is a single line: ``"<file>: <field>: <problem>"``.
    """

    exit_code = 2

    def __init__(self, problem: str, *, file: str | None = None, field: str | None = None):
        self.problem = " ".join(str(problem).split())  # always one line
        self.file = file
        self.field = field
        super().__init__(str(self))

    def __str__(self) -> str:
        parts = [p for p in (self.file, self.field) if p]
        return ": ".join(parts + [self.problem])


class UsageError(AllocatorError):
    """A command-line option or argument is wrong (exit code 2)."""

    exit_code = 2


class InfeasibleError(AllocatorError):
    """A requirement cannot be met (exit code 1)."""

    exit_code = 1
