"""Reading a user's CSV data file (supplier quotes, measured parts) with numbered rows.

Every problem is a :class:`~allocator.errors.CaseError` whose one line names the file,
the row (the line number an editor shows, the header being row 1) and the column::

    quotes.csv: row 7, column cost: 'abc' is not a number

Blank lines and lines starting with ``#`` (comments, e.g. a note that the data are
invented) are skipped; a byte-order mark is tolerated. Files larger than the case
loader's limit are refused before they are read.
"""

from __future__ import annotations

import csv
import io
import math
import os
from dataclasses import dataclass
from pathlib import Path

from .errors import CaseError

__all__ = ["DataTable", "read_csv", "from_columns", "where", "number", "MAX_ROWS"]

MAX_ROWS = 100_000  # data rows in one file (as many as a case's cost table may hold)


def where(row: int | None = None, column: str | None = None) -> str | None:
    """The field part of a message: ``"row 7, column cost"``."""
    parts = []
    if row is not None:
        parts.append(f"row {row}")
    if column is not None:
        parts.append(f"column {column}")
    return ", ".join(parts) or None


@dataclass(frozen=True)
class DataTable:
    """A CSV file as read: its label for messages, header, and rows with their numbers.

    Attributes
    ----------
    label : str
        The file as the user named it.
    header : tuple of str
        Column names, stripped.
    header_row : int
        Line number of the header.
    rows : tuple of (int, tuple of str)
        Line number and stripped cells of each data row (short rows padded with ``""``).
    """

    label: str
    header: tuple[str, ...]
    header_row: int
    rows: tuple[tuple[int, tuple[str, ...]], ...]

    def fail(self, problem: str, row: int | None = None, column: str | None = None):
        """Raise the one-line CaseError naming this file, the row and the column."""
        raise CaseError(problem, file=self.label, field=where(row, column))


def number(table: DataTable, text: str, row: int, column: str) -> float:
    """A finite float from one cell, else a CaseError naming row and column."""
    try:
        value = float(text)
    except ValueError:
        table.fail(f"{text!r} is not a number", row, column)
    if not math.isfinite(value):
        table.fail(f"must be a finite number (got {text!r})", row, column)
    return value


def read_csv(path: str | os.PathLike) -> DataTable:
    """Read a CSV data file: header row, then data rows; comments and blank lines skipped.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    DataTable

    Raises
    ------
    CaseError
        Missing, unreadable, too large (bytes or more than :data:`MAX_ROWS` rows), not
        UTF-8, not CSV, no header, or a row with more cells than the header.
    """
    from .case import MAX_FILE_BYTES

    label = str(path)
    file = Path(path)

    def fail(problem, row=None):
        raise CaseError(problem, file=label, field=where(row))

    try:
        if file.is_dir():
            fail("is a folder, not a CSV file")
        size = file.stat().st_size
        if size > MAX_FILE_BYTES:
            fail(f"file is larger than {MAX_FILE_BYTES // 2**20} MB; refusing to read it")
        with open(file, "rb") as fh:
            data = fh.read(MAX_FILE_BYTES + 1)
    except FileNotFoundError:
        fail("file not found")
    except OSError as err:
        fail(f"cannot read the file ({(err.strerror or str(err)).lower()})")
    if len(data) > MAX_FILE_BYTES:
        fail(f"file is larger than {MAX_FILE_BYTES // 2**20} MB; refusing to read it")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        fail("not UTF-8 text", data.count(b"\n", 0, err.start) + 1)

    reader = csv.reader(io.StringIO(text, newline=""))
    header: tuple[str, ...] | None = None
    header_row = 0
    rows = []
    try:
        for fields in reader:
            row = reader.line_num
            if not fields or all(not f.strip() for f in fields):
                continue
            if fields[0].lstrip().startswith("#"):
                continue
            cells = tuple(f.strip() for f in fields)
            if header is None:
                header, header_row = cells, row
                continue
            if len(cells) > len(header):
                extra = next(i for i in range(len(header), len(cells)) if cells[i]) if any(
                    cells[len(header):]) else None
                if extra is not None:
                    fail(f"{len(cells)} cells but the header has {len(header)} columns", row)
                cells = cells[: len(header)]
            if len(rows) >= MAX_ROWS:
                fail(f"more than {MAX_ROWS} data rows; refusing to read on", row)
            rows.append((row, cells + ("",) * (len(header) - len(cells))))
    except csv.Error as err:
        fail(f"not valid CSV ({err})", reader.line_num)
    if header is None:
        fail("is empty (expected a header row and data rows)")
    return DataTable(label=label, header=header, header_row=header_row, rows=tuple(rows))


def from_columns(columns, label: str = "<data>") -> DataTable:
    """A :class:`DataTable` from a mapping of column name -> values (a DataFrame works).

    Values become text as a CSV would hold them (missing values: empty cells); row numbers
    count as in a CSV file with the header in row 1.
    """
    names = [str(k) for k in columns.keys()]
    values = [list(columns[k]) for k in columns.keys()]
    length = max((len(v) for v in values), default=0)

    def cell(v):
        if v is None or (isinstance(v, float) and math.isnan(v)):
            return ""
        return str(v).strip()

    rows = tuple(
        (i + 2, tuple(cell(v[i]) if i < len(v) else "" for v in values)) for i in range(length)
    )
    return DataTable(label=label, header=tuple(names), header_row=1, rows=rows)
