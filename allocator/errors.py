"""Exceptions that the command line turns into one-line messages and exit codes.

Which error for which mistake (the same whichever entry point is called):

- :class:`UsageError` -- an argument of a library call or a command-line option is wrong,
  including a name that is not in the case (unknown model, contributor or requirement);
- :class:`CaseError` -- the content of a case file (or of a tolerance file read by the
  command line) is wrong; the message names the file and the field.

Both are :class:`ValueError` subclasses, so ``except ValueError`` catches bad input of
either kind. Looking a name up in a *result* by subscript (``sheet["housing"]``) follows
the mapping protocol and raises :class:`KeyError`.
"""

from __future__ import annotations

import difflib
from typing import Iterable


def closest(name: object, options: Iterable[str]) -> str | None:
    """The one of ``options`` closest to a misspelt ``name``, or None if none is close.

    The one similarity rule of every "did you mean" hint (``difflib`` ratio at least 0.6).

    Examples
    --------
    >>> closest("housng", ["housing", "shim"]), closest("zzz", ["housing"])
    ('housing', None)
    """
    close = difflib.get_close_matches(str(name), list(options), n=1, cutoff=0.6)
    return close[0] if close else None


def did_you_mean(name: object, options: Iterable[str], *, clause: bool = False) -> str:
    """The hint for a misspelt ``name``: ``" (did you mean 'x'?)"``, or ``""`` if nothing is close.

    Parameters
    ----------
    name : object
        What was given.
    options : iterable of str
        The valid names.
    clause : bool
        ``"; did you mean 'x'?"`` instead, for a hint inside an existing parenthesis
        such as ``(got 'wcx'; did you mean 'wc'?)``.

    Examples
    --------
    >>> did_you_mean("housng", ["housing", "shim"])
    " (did you mean 'housing'?)"
    >>> did_you_mean("wcx", ["wc", "rss"], clause=True)
    "; did you mean 'wc'?"
    >>> did_you_mean("zzz", ["housing"])
    ''
    """
    close = closest(name, options)
    if close is None:
        return ""
    return f"; did you mean '{close}'?" if clause else f" (did you mean '{close}'?)"


def unknown_names(what: str, given: Iterable[object], known: Iterable[str]) -> str:
    """One line naming the unknown ``given`` entries, each with its did-you-mean, or ``""``.

    Examples
    --------
    >>> unknown_names("contributor", ["housng", "shim"], ["housing", "shim"])
    "unknown contributor 'housng' (did you mean 'housing'?)"
    """
    known = list(known)
    bad = [str(n) for n in given if n not in known]
    return "; ".join(f"unknown {what} '{n}'{did_you_mean(n, known)}" for n in bad)


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


class UsageError(AllocatorError, ValueError):
    """A command-line option or an argument of a library call is wrong (exit code 2)."""

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
