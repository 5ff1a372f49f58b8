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


class InternalError(AllocatorError):
    """A computation failed unexpectedly: a bug, not bad input nor an unmeetable
    requirement (exit code 3).

    ``str(err)`` is one line naming where it happened and the original error; the
    original exception is kept as ``__cause__`` (and ``err.original``) for a bug report.
    """

    exit_code = 3

    def __init__(self, where: str, original: BaseException):
        self.where = where
        self.original = original
        detail = " ".join(str(original).split()) or "(no message)"
        super().__init__(
            f"internal error in {where}: {type(original).__name__}: {detail} "
            "(a bug in allocator, not a problem with the case; please report it with the case file)"
        )
