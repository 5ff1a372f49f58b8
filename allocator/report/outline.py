"""The report's outline: its numbered sections, and how a failure names one of them.

Each section is written by the function of the same name in :mod:`.sections`; the same
ids name the report part being computed in :mod:`.build`, so an unexpected error, while
computing or while formatting, says which section it broke.
"""

from __future__ import annotations

import contextlib

from ..errors import AllocatorError, InternalError

# (id, heading) of every section, in order; tests and the browser check use this list
SECTIONS = (
    ("summary", "1 Case summary and assumptions"),
    ("analysis", "2 Stack analysis of the current design"),
    ("allocation", "3 Allocation by model"),
    ("frontier", "4 Cost frontier"),
    ("contributions", "5 Contributions to variation"),
    ("verification", "6 Monte Carlo verification"),
    ("shadow-prices", "7 Shadow prices"),
    ("supplier", "8 Supplier sheet"),
    ("cautions", "9 Cautions"),
    ("reproducibility", "10 Reproducibility"),
)


@contextlib.contextmanager
def working_on(section: str | None, detail: str = ""):
    """Let an unexpected exception while computing or formatting ``section`` (an id of
    :data:`SECTIONS`; None: the page header) end the report as an
    :class:`~allocator.errors.InternalError` naming the section (and ``detail``).

    Library errors (bad input, usage) pass unchanged: they already say what is wrong. A
    failure is never turned into text in the report, so a report written with "ok" hides
    none.
    """
    try:
        yield
    except AllocatorError:
        raise
    except Exception as err:
        where = "the report header" if section is None else f"report section '{dict(SECTIONS)[section]}'"
        if detail:
            where += f" ({detail})"
        raise InternalError(where, err) from err
