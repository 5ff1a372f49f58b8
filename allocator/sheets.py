"""Workbooks (.xlsx) out and in: tables as sheets, numbers as numbers, units in the headers.

Writing goes through pandas (``DataFrame.to_excel``) and openpyxl; reading through
openpyxl, cell by cell, so that every value keeps its type (a whole number stays an int,
text stays text) and its sheet, row and column can be named in a message. openpyxl is
the optional extra ``sheets`` (``pip install "allocator[sheets]"``) and is imported only
here, inside the functions that need it.

- :func:`write_workbook` writes ``{sheet name: DataFrame}`` atomically, never over an
  input (:mod:`allocator.files`);
- :func:`read_workbook` reads every sheet as a header row and data rows with their
  spreadsheet row numbers (:class:`SheetTable`);
- :func:`allocation_sheets`, :func:`frontier_sheets` and :func:`verification_sheets`
  are the tables of ``allocate``, ``frontier`` and ``verify --xlsx``, with each
  column's units label in its header (``allocated [mm]``, ``total_cost [EUR]``).
"""

from __future__ import annotations

import io
import os
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .errors import CaseError, UsageError

if TYPE_CHECKING:
    import pandas as pd

    from .economics import FalloutEconomics
    from .importance import ImportanceVerification
    from .model import Case
    from .simulate import Verification
    from .sweep import Frontier

__all__ = [
    "INSTALL_HINT",
    "SUFFIX",
    "SheetTable",
    "require_openpyxl",
    "check_workbook_path",
    "write_workbook",
    "read_workbook",
    "allocation_sheets",
    "frontier_sheets",
    "verification_sheets",
]

INSTALL_HINT = 'pip install "allocator[sheets]"'
SUFFIX = ".xlsx"
MAX_WORKBOOK_BYTES = 16 * 1024 * 1024  # as for case files: refused before reading
# an .xlsx is a zip of XML: a small file may unpack to gigabytes, so the sizes its entries
# declare (zipfile never reads past them) are added up first
MAX_UNPACKED_BYTES = 256 * 1024 * 1024
MAX_SHEET_NAME = 31  # Excel's limit
_SHEET_NAME_FORBIDDEN = set("[]:*?/\\")


def require_openpyxl(what: str = "reading and writing .xlsx workbooks") -> None:
    """Raise a one-line :class:`UsageError` (exit 2) when openpyxl is not installed.

    The message tells the user what to install: ``pip install "allocator[sheets]"``.
    """
    try:
        import openpyxl  # noqa: F401
    except ImportError:
        raise UsageError(f"{what} needs openpyxl, which is not installed: {INSTALL_HINT}") from None


def check_workbook_path(
    path: str | os.PathLike, *, protect: Iterable[str | os.PathLike | None] = (), option: str = "--xlsx"
) -> Path:
    """Refuse (UsageError) an output workbook that is not ``.xlsx``, an input, or in a missing folder.

    Also checks that openpyxl is installed, so that a command fails before its work.
    """
    from .files import check_output_path

    target = Path(path)
    if target.suffix.lower() != SUFFIX:
        raise UsageError(f"{path}: {option} writes an .xlsx workbook, not '{target.suffix or 'no extension'}'")
    require_openpyxl()
    return check_output_path(target, protect=protect, input_name="input file")


def _check_sheet_name(name: str) -> None:
    if not isinstance(name, str) or not name or len(name) > MAX_SHEET_NAME:
        raise UsageError(f"sheet name {name!r}: must be text of 1 to {MAX_SHEET_NAME} characters")
    bad = _SHEET_NAME_FORBIDDEN.intersection(name)
    if bad:
        raise UsageError(f"sheet name {name!r}: must not contain {''.join(sorted(bad))!r}")


# a spreadsheet number is a double: whole numbers beyond 2**53 (a 64-bit seed) would not
# come back as written, so they are written as text
_EXACT_INTEGERS = 2**53


def _flat(frame: pd.DataFrame) -> pd.DataFrame:
    """The frame as written: a named index becomes ordinary columns (so the header is one
    row), a plain one is dropped; whole numbers too large for a double become text."""
    if any(n is not None for n in frame.index.names):
        frame = frame.reset_index()
    else:
        frame = frame.reset_index(drop=True)
    for column in frame.columns:
        values = frame[column]
        if any(isinstance(v, int) and not isinstance(v, bool) and abs(v) > _EXACT_INTEGERS
               for v in values.tolist()):
            frame[column] = [str(v) if isinstance(v, int) and not isinstance(v, bool) else v
                             for v in values.tolist()]
    return frame


def write_workbook(
    path: str | os.PathLike,
    sheets: Mapping[str, pd.DataFrame],
    *,
    protect: Iterable[str | os.PathLike | None] = (),
) -> Path:
    """Write DataFrames as the sheets of one .xlsx workbook, whole or not at all.

    Parameters
    ----------
    path : str or path-like
        The workbook to write (``.xlsx``); written through a temporary file and renamed.
    sheets : mapping of str to pandas.DataFrame
        Sheet name (at most 31 characters, none of ``[]:*?/\\``) -> table, in order. A
        named index is written as the first column(s); numbers stay numbers (with
        openpyxl's 16 significant digits: a double that needs 17 comes back within one
        unit in the 16th); NaN and None are empty cells. The header row is frozen and
        columns are sized to their text.
    protect : iterable of path-like
        Inputs never to overwrite.

    Returns
    -------
    pathlib.Path
        The written file.

    Raises
    ------
    UsageError
        openpyxl missing (with the install hint), a bad sheet name, a path that is an
        input or in a missing folder, or a failed write.
    """
    require_openpyxl()
    import pandas as pd

    from .files import atomic_write, check_output_path

    check_output_path(path, protect=protect)
    if not sheets:
        raise UsageError(f"{path}: a workbook needs at least one sheet")
    for name in sheets:
        _check_sheet_name(name)
    buffer = io.BytesIO()
    with pd.ExcelWriter(buffer, engine="openpyxl") as writer:
        for name, frame in sheets.items():
            table = _flat(frame)
            table.to_excel(writer, sheet_name=name, index=False)
            _layout(writer.sheets[name], table)
    return atomic_write(path, buffer.getvalue(), protect=protect)


def _layout(sheet, table: pd.DataFrame) -> None:
    """Freeze the header row and size each column to its longest text (capped)."""
    from openpyxl.utils import get_column_letter

    sheet.freeze_panes = "A2"
    for i, column in enumerate(table.columns, start=1):
        cells = [str(column)] + [str(v) for v in table[column].head(200) if v is not None]
        width = min(max(len(c) for c in cells) + 2, 60)
        sheet.column_dimensions[get_column_letter(i)].width = width


# --------------------------------------------------------------------------- reading


@dataclass(frozen=True)
class SheetTable:
    """One sheet read as a table: header row 1, data from row 2.

    Attributes
    ----------
    name : str
        The sheet's name.
    columns : dict
        Header text -> column number (1-based, as A = 1); empty headers are left out.
    rows : list of (int, dict)
        Per non-empty data row: its row number in the sheet and header -> value, with
        empty cells and blank text left out, text stripped, and numbers as int or float.
    """

    name: str
    columns: dict
    rows: list

    def column_letter(self, header: str) -> str | None:
        """The column's letter (``"E"``), None when the sheet has no such column."""
        from openpyxl.utils import get_column_letter

        number = self.columns.get(header)
        return None if number is None else get_column_letter(number)


def _cell(value: Any) -> Any:
    """A cell value as the loader expects it: None for empty, stripped text, plain numbers."""
    if value is None:
        return None
    if isinstance(value, str):
        value = value.strip()
        return value or None
    if isinstance(value, float) and value != value:  # NaN
        return None
    return value


def _check_unpacked_size(data: bytes, file: str) -> None:
    import zipfile

    try:
        with zipfile.ZipFile(io.BytesIO(data)) as archive:
            unpacked = sum(info.file_size for info in archive.infolist())
    except (zipfile.BadZipFile, ValueError) as err:
        raise CaseError(f"not an .xlsx workbook ({type(err).__name__}: {' '.join(str(err).split())[:80]})",
                        file=file) from None
    if unpacked > MAX_UNPACKED_BYTES:
        raise CaseError(f"unpacks to {unpacked / 2**20:.0f} MB, more than {MAX_UNPACKED_BYTES // 2**20} MB; "
                        "refusing to read it", file=file)


def read_workbook(path: str | os.PathLike) -> dict[str, SheetTable]:
    """Every sheet of an .xlsx workbook as a :class:`SheetTable` (formulas: their saved values).

    Raises
    ------
    CaseError
        File missing, larger than 16 MB (or unpacking to more than 256 MB), not an
        .xlsx workbook, or a sheet whose data
        column has no header; the message names the file (and sheet and cell).
    UsageError
        openpyxl is not installed.
    """
    require_openpyxl()
    import openpyxl
    from openpyxl.utils import get_column_letter

    file = str(path)
    try:
        size = Path(path).stat().st_size
        if size > MAX_WORKBOOK_BYTES:
            raise CaseError(f"file is larger than {MAX_WORKBOOK_BYTES // 2**20} MB; refusing to read it", file=file)
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise CaseError("file not found", file=file) from None
    except IsADirectoryError:
        raise CaseError("is a folder, not a workbook", file=file) from None
    except OSError as err:
        raise CaseError(f"cannot read the file ({(err.strerror or str(err)).lower()})", file=file) from None
    _check_unpacked_size(data, file)
    try:
        # not read-only: that mode trusts the file's own note of its size, which some
        # programs write wrongly; 16 MB at most is read whole
        book = openpyxl.load_workbook(io.BytesIO(data), data_only=True)
    except Exception as err:  # zipfile.BadZipFile, KeyError, InvalidFileException ...
        raise CaseError(f"not an .xlsx workbook ({type(err).__name__}: {' '.join(str(err).split())[:80]})",
                        file=file) from None
    out = {}
    try:
        for sheet in book.worksheets:
            grid = [tuple(_cell(v) for v in row) for row in sheet.iter_rows(min_row=1, values_only=True)]
            header = grid[0] if grid else ()
            columns = {}
            for j, text in enumerate(header, start=1):
                if text is None:
                    continue
                text = str(text)
                if text in columns:
                    raise CaseError(f"column {text!r} appears twice (columns {get_column_letter(columns[text])} "
                                    f"and {get_column_letter(j)})", file=file, field=f"sheet {sheet.title}, row 1")
                columns[text] = j
            rows = []
            for i, row in enumerate(grid[1:], start=2):
                values = {}
                for j, value in enumerate(row, start=1):
                    if value is None:
                        continue
                    if j > len(header) or header[j - 1] is None:
                        raise CaseError(f"a value ({value!r}) in a column without a header",
                                        file=file, field=f"sheet {sheet.title}, cell {get_column_letter(j)}{i}")
                    values[str(header[j - 1])] = value
                if values:
                    rows.append((i, values))
            out[sheet.title] = SheetTable(sheet.title, columns, rows)
    finally:
        book.close()
    return out


# --------------------------------------------------------------------------- result tables


def _header(column: str, label: str | None) -> str:
    return f"{column} [{label}]" if label else column


def _label_columns(frame: pd.DataFrame, columns: Sequence[str], label_column: str = "units") -> pd.DataFrame:
    """Put the per-row units label into the headers of ``columns`` when every row shares it.

    With one shared label the ``units`` column goes and ``allocated`` becomes
    ``allocated [mm]``; with mixed labels the headers stay and the ``units`` column stays.
    """
    if label_column not in frame.columns or frame.empty:
        return frame
    labels = set(frame[label_column])
    if len(labels) != 1:
        return frame
    label = next(iter(labels))
    return frame.drop(columns=label_column).rename(columns={c: _header(c, label) for c in columns})


def study_sheets(study) -> dict[str, pd.DataFrame]:
    """The tables of ``study``: ``cases`` (one row per case and model) and ``totals``.

    Money columns carry the currency in their header when every row shares one
    (``total_cost [EUR]``); with mixed currencies the ``currency`` column stays.
    """
    money = ("current_cost", "total_cost", "saving", "saving_per_year")
    return {name: _label_columns(frame, money, label_column="currency") for name, frame in study.frames().items()}


def allocation_sheets(results: Sequence) -> dict[str, pd.DataFrame]:
    """The tables of ``allocate``: ``summary``, ``tolerances`` and ``requirements``, all models.

    Parameters
    ----------
    results : sequence of Allocation
        One per stack model (:func:`allocator.allocate`).

    Returns
    -------
    dict of str to pandas.DataFrame
        ``summary`` (one row per model: status, costs [currency], solver, message),
        ``tolerances`` (one row per model and contributor: process, count, current and
        allocated ± tolerance, limits [length], unit costs [currency]) and
        ``requirements`` (one row per model and requirement: ranges and σ [response],
        fallout and target [ppm], shadow prices [currency per response, currency/ppm]).
    """
    import pandas as pd

    from .model import per_unit

    money = results[0].currency if results else ""
    summary = pd.DataFrame([
        {
            "model": r.model, "status": r.status,
            _header("total_cost", money): r.total_cost,
            _header("current_cost", money): r.current_cost,
            _header("savings", money): r.savings,
            "savings [%]": r.savings_percent,
            _header("unrounded_cost", money): r.unrounded_cost,
            "rounding": r.rounding or "",
            "solver": r.solver, "iterations": r.iterations, "gap": r.gap,
            "message": r.message,
        }
        for r in results
    ])
    rows = []
    for r in results:
        for row in r.rows():
            grade = {"grade": r.grades.get(row["contributor"], "")} if any(x.grades for x in results) else {}
            rows.append({"model": r.model, **row, **grade})
    tolerances = pd.DataFrame(rows)
    if not tolerances.empty:
        tolerances = tolerances.rename(columns={
            "unit_cost_current": _header("unit_cost_current", money),
            "unit_cost_allocated": _header("unit_cost_allocated", money),
        })
        tolerances = _label_columns(tolerances, ("current", "allocated", "tightest", "loosest"))
    rows = []
    for r in results:
        for q in r.requirements:
            d = q.to_dict()
            units = d.pop("units")
            rows.append({
                "model": r.model, "requirement": d.pop("name"),
                **{_header(k, units): d[k] for k in ("nominal", "lower", "upper", "worst_case_min",
                                                      "worst_case_max", "sigma", "mean_shift")},
                "fallout_ppm [ppm]": d["fallout_ppm"], "target_ppm [ppm]": d["target_ppm"],
                "linear": d["linear"], "binding": d["binding"],
                _header("shadow_price", per_unit(money or "cost", units)): d["shadow_price"],
                _header("shadow_lower", per_unit(money or "cost", units)): d["shadow_lower"],
                _header("shadow_upper", per_unit(money or "cost", units)): d["shadow_upper"],
                _header("shadow_ppm", per_unit(money or "cost", "ppm")): d["shadow_ppm"],
            })
    requirements = pd.DataFrame(rows)
    return {"summary": summary, "tolerances": tolerances, "requirements": requirements}


def frontier_sheets(result: Frontier, economics: FalloutEconomics | None = None) -> dict[str, pd.DataFrame]:
    """The tables of ``frontier``: ``frontier`` (one row per value and model) and, with
    fallout economics, ``economics`` (one row per model).

    Parameters
    ----------
    result : Frontier
        :func:`allocator.frontier`.
    economics : FalloutEconomics, optional
        :func:`allocator.fallout_economics` for the same requirement.

    Returns
    -------
    dict of str to pandas.DataFrame
        The swept value in its own units ([ppm] for a fallout target, else the
        requirement's), costs and savings [currency] and savings [%].
    """
    from .model import per_unit

    money = result.currency
    unit = "ppm" if result.vary == "fallout_ppm" else result.units
    frame = result.to_frame().rename(columns={
        "value": _header(result.vary, unit),
        "total_cost": _header("total_cost", money),
        "saving_vs_worst_case": _header("saving_vs_worst_case", money),
        "saving_percent": "saving [%]",
    })
    out = {"frontier": frame}
    if economics is not None:
        table = economics.to_frame().drop(columns=["curve_ppm", "curve_manufacturing"], errors="ignore")
        renames = {}
        for column in table.columns:
            if column.endswith("_ppm"):
                renames[column] = _header(column, "ppm")
            elif column.startswith(("annual_",)):
                renames[column] = _header(column, f"{money}/year" if money else "per year")
            elif column.startswith("slope_"):
                renames[column] = _header(column, per_unit(money or "cost", "ppm"))
            elif column.endswith(("_cost", "_manufacturing", "_scrap", "_total", "_saving")) or column in (
                "saving_per_assembly",
            ):
                renames[column] = _header(column, money)
        out["economics"] = table.rename(columns=renames)
    return out


def verification_sheets(
    result: Verification | ImportanceVerification, case: Case | None = None
) -> dict[str, pd.DataFrame]:
    """The tables of ``verify``: ``verification`` (one row per requirement),
    ``tolerances`` (what was simulated) and ``run`` (samples, seed, status).

    Parameters
    ----------
    result : Verification
        :func:`allocator.verify`.
    case : Case, optional
        For the units of each contributor's tolerance (without it: no units column).

    Returns
    -------
    dict of str to pandas.DataFrame
        Counts as whole numbers, fallout and its interval [ppm], limits, mean and σ of
        the response in its units.
    """
    import pandas as pd

    frame = result.to_frame().reset_index()
    ppm = [c for c in frame.columns if c.endswith("_ppm")]
    frame = frame.rename(columns={c: _header(c, "ppm") for c in ppm})
    frame = _label_columns(frame, ("lower", "upper", "nominal", "sigma", "shifted_mean", "mean", "std"))
    tolerances = pd.DataFrame({"contributor": list(result.tolerances),
                               "tolerance": [float(t) for t in result.tolerances.values()]})
    if case is not None:
        tolerances["units"] = [case.contributor_units(n) for n in tolerances["contributor"]]
        tolerances = _label_columns(tolerances, ("tolerance",))
    run = pd.DataFrame([{
        "status": result.status, "samples": result.samples, "seed": result.seed,
        "confidence": result.confidence, "shift_means": result.shift_means,
        "allocated_with": result.allocated_with or "", "message": result.message,
    }])
    return {"verification": frame, "tolerances": tolerances, "run": run}
