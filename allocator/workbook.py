"""A case as an .xlsx workbook, and back: the sheets ``settings``, ``contributors``,
``processes``, ``tables``, ``unknowns``, ``closures``, ``requirements`` and ``offers``
(layout in docs/spreadsheets.md).

Reading builds the same dict a TOML case file parses to and hands it to the one case
loader (:func:`allocator.case.case_from_dict`), so a workbook is checked exactly as a
case file is. The loader names a field by its path (``contributor[3] (spacer).cost.b``);
:class:`_Places` turns that path into the sheet, row and column it came from
(``sheet contributors, row 4, column b (cell P4)``). Checks that only a workbook needs
(a missing sheet or column, an unknown column, a process row for an unknown contributor)
are made here, before the loader, with messages of the same form.

Writing goes the other way through :func:`allocator.caseout.case_to_dict`, so a case
read back from its own workbook equals it (path and hash aside; a number that needs 17
significant digits comes back within one unit in its 16th, see docs/spreadsheets.md).

A case file's array of flat tables (``[[unknown]]``, ``[[closure]]``, ``[[offer]]``) is a
sheet with one row per table and one column per key: a line in :data:`LIST_SHEETS`. A
later section of the same shape is one more line there and in :data:`SHEETS`.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Iterable
from pathlib import Path
from typing import TYPE_CHECKING

from .costs import CURVES, family
from .errors import CaseError, UsageError, did_you_mean

if TYPE_CHECKING:
    import pandas as pd

    from .model import Case
    from .sheets import SheetTable

__all__ = ["case_sheets", "write_case_workbook", "load_workbook_case", "convert_case", "SHEETS"]

# the case's sheets, in the order they are written; settings, contributors and requirements are required
SHEETS = ("settings", "contributors", "processes", "tables", "unknowns", "closures", "requirements", "offers")
REQUIRED_SHEETS = ("settings", "contributors", "requirements")

# setting (its row in the settings sheet) -> what it is (the description column)
SETTINGS = {
    "title": "title of the case (required)",
    "units": "units label of lengths (default mm)",
    "currency": "currency label of costs",
    "allocation.models": "stack models, comma-separated: worst-case, rss, mean-shift",
    "allocation.rounding": "rounding step of allocated tolerances, or iso286",
    "economics.volume": "assemblies per year",
    "economics.scrap_cost": "cost of one assembly outside the limits",
    "frontier.requirement": "requirement the frontier sweeps",
    "frontier.vary": "lower, upper or fallout_ppm",
    "frontier.range.from": "first value of the sweep",
    "frontier.range.to": "last value of the sweep",
    "frontier.points": "number of values swept",
}
SETTINGS_COLUMNS = ("setting", "value", "description")

# cost columns: the curve, every parameter of the formula families, a table's `between`
_PARAMETERS = tuple(dict.fromkeys(
    p.name for name in CURVES if not family(name).piecewise for p in family(name).parameters
))
COST_COLUMNS = ("curve", *_PARAMETERS, "between")
CONTRIBUTOR_COLUMNS = (
    "name", "description", "units", "nominal", "tolerance", "distribution", "cp", "mean_shift",
    "count", "fixed", "tightest", "loosest", *COST_COLUMNS,
)
PROCESS_COLUMNS = ("contributor", "process", "cp", "tightest", "loosest", *COST_COLUMNS)
TABLE_COLUMNS = ("contributor", "process", "tolerance", "cost")
REQUIREMENT_COLUMNS = ("name", "units", "expression", "lower", "upper", "fallout_ppm")
OFFER_COLUMNS = ("contributor", "tolerance", "price", "note")
UNKNOWN_COLUMNS = ("name", "guess", "description")
CLOSURE_COLUMNS = ("name", "equation")
# sheet -> the case file's array of flat tables it holds: one row per table, one column per
# key (the first column names the item in messages)
LIST_SHEETS = {
    "unknowns": ("unknown", UNKNOWN_COLUMNS),
    "closures": ("closure", CLOSURE_COLUMNS),
    "offers": ("offer", OFFER_COLUMNS),
}
# list sheets whose rows are named: a repeated name is refused at its second row
UNIQUE_NAMES = {"unknowns": "name", "closures": "name"}
CHAIN_PREFIX = "chain."  # requirements: one column chain.NAME per contributor (its coefficient)

# columns a sheet cannot do without, and why
REQUIRED_COLUMNS = {
    "settings": {"setting": "the name of each setting", "value": "the value of each setting"},
    "contributors": {"name": "the name of each contributor", "nominal": "the nominal value of each contributor",
                     "tolerance": "the current ± tolerance of each contributor"},
    "processes": {"contributor": "the contributor each process makes", "process": "the name of each process"},
    "tables": {"contributor": "the contributor each point belongs to", "tolerance": "the tolerance of each point",
               "cost": "the cost of each point"},
    "requirements": {"name": "the name of each requirement"},
    "offers": {"contributor": "the contributor offered", "tolerance": "the offered ± tolerance",
               "price": "the offered price per part"},
    "unknowns": {"name": "the name of each unknown", "guess": "where the nominal solve starts"},
    "closures": {"equation": "the closure equation, 0 when the loop closes"},
}
COLUMNS = {
    "settings": SETTINGS_COLUMNS,
    "contributors": CONTRIBUTOR_COLUMNS,
    "processes": PROCESS_COLUMNS,
    "tables": TABLE_COLUMNS,
    "requirements": REQUIREMENT_COLUMNS,
    "offers": OFFER_COLUMNS,
    "unknowns": UNKNOWN_COLUMNS,
    "closures": CLOSURE_COLUMNS,
}
_FREE_TEXT = ("title", "currency", "description", "note")  # a number typed there is meant as text
# a spreadsheet program takes a cell typed as "-a + b" for a formula; saved, it holds an error value
_ERROR_VALUES = ("#NULL!", "#DIV/0!", "#VALUE!", "#REF!", "#NAME?", "#NUM!", "#N/A")
_FORMULA_TEXT = {"closures": "equation", "requirements": "expression"}


# --------------------------------------------------------------------------- writing


def case_sheets(case: Case) -> dict[str, pd.DataFrame]:
    """The case as the sheets of its workbook (every column written, empty where unused).

    Parameters
    ----------
    case : Case

    Returns
    -------
    dict of str to pandas.DataFrame
        The sheets of :data:`SHEETS`, in that order (see docs/spreadsheets.md).
    """
    import pandas as pd

    from .caseout import case_to_dict

    data = case_to_dict(case)
    values = {
        "title": data["title"], "units": data.get("units"), "currency": data.get("currency"),
        "allocation.models": ", ".join(data["allocation"]["models"]),
        "allocation.rounding": data["allocation"].get("rounding"),
    }
    for key in ("volume", "scrap_cost"):
        values[f"economics.{key}"] = data.get("economics", {}).get(key)
    frontier = data.get("frontier", {})
    span = frontier.get("range") or (None, None)
    values.update({"frontier.requirement": frontier.get("requirement"), "frontier.vary": frontier.get("vary"),
                   "frontier.range.from": span[0], "frontier.range.to": span[1],
                   "frontier.points": frontier.get("points")})
    settings = [{"setting": k, "value": values.get(k), "description": what} for k, what in SETTINGS.items()]

    contributors, processes, tables = [], [], []
    for c in data["contributor"]:
        row = {k: c[k] for k in ("name", "description", "units", "nominal", "tolerance", "distribution", "cp",
                                 "mean_shift", "count", "fixed") if k in c}
        row.update(_limits_and_cost(c, tables, c["name"], None))
        contributors.append(row)
        for p in c.get("process", ()):
            prow = {"contributor": c["name"], "process": p["name"]}
            if "cp" in p:
                prow["cp"] = p["cp"]
            prow.update(_limits_and_cost(p, tables, c["name"], p["name"]))
            processes.append(prow)

    names = [c["name"] for c in data["contributor"]]
    requirements = []
    for r in data["requirement"]:
        row = {k: r[k] for k in REQUIREMENT_COLUMNS if k in r}
        for name, coeff in (r.get("chain") or {}).items():
            row[CHAIN_PREFIX + name] = coeff
        requirements.append(row)

    def frame(rows, columns):
        return pd.DataFrame(rows, columns=list(columns), dtype=object)

    sheets = {
        "settings": frame(settings, SETTINGS_COLUMNS),
        "contributors": frame(contributors, CONTRIBUTOR_COLUMNS),
        "processes": frame(processes, PROCESS_COLUMNS),
        "tables": frame(tables, TABLE_COLUMNS),
        "requirements": frame(requirements, (*REQUIREMENT_COLUMNS, *(CHAIN_PREFIX + n for n in names))),
    }
    for sheet, (key, columns) in LIST_SHEETS.items():
        sheets[sheet] = frame(data.get(key, []), columns)
    return {name: sheets[name] for name in SHEETS}


def _limits_and_cost(item: dict, tables: list, contributor: str, process: str | None) -> dict:
    """The tightest/loosest and cost columns of a contributor or process row (points go to ``tables``)."""
    row = {}
    if "limits" in item:
        row["tightest"], row["loosest"] = item["limits"]
    cost = item.get("cost")
    if cost is not None:
        row["curve"] = cost["curve"]
        for key in (*_PARAMETERS, "between"):
            if key in cost:
                row[key] = cost[key]
        for t, c in zip(cost.get("tolerance", ()), cost.get("cost", ())):
            tables.append({"contributor": contributor, "process": process, "tolerance": t, "cost": c})
    return row


def write_case_workbook(
    case: Case, path: str | os.PathLike, *, protect: Iterable[str | os.PathLike | None] = ()
) -> Path:
    """Write ``case`` as an .xlsx workbook (atomic; never over a path in ``protect``).

    Returns
    -------
    pathlib.Path
        The written file.
    """
    from .sheets import write_workbook

    return write_workbook(path, case_sheets(case), protect=protect)


# --------------------------------------------------------------------------- reading


class _Places:
    """Where each field of the built dict came from: loader field path -> sheet, row, column."""

    def __init__(self, file: str, tables: dict):
        self.file = file
        self.tables = tables
        self.exact: dict[str, str] = {}
        self.items: list[tuple[str, object]] = []  # (path prefix, resolver of the rest)

    def cell(self, sheet: str, row: int | None = None, column: str | None = None) -> str:
        """``sheet contributors, row 4, column b (cell P4)``; shorter when less is known."""
        text = f"sheet {sheet}"
        if row is None:
            return text
        text += f", row {row}"
        if column is None:
            return text
        text += f", column {column}"
        table = self.tables.get(sheet)
        letter = table.column_letter(column) if table is not None else None
        return text + (f" (cell {letter}{row})" if letter else "")

    def fail(self, where: str | None, problem: str):
        raise CaseError(problem, file=self.file, field=where)

    def add(self, prefixes, resolve) -> None:
        for prefix in prefixes:
            self.items.append((prefix, resolve))

    def locate(self, field: str | None) -> str | None:
        """The place of a loader field path (the nearest known one)."""
        if field is None:
            return None
        if field in self.exact:
            return self.exact[field]
        for prefix, resolve in sorted(self.items, key=lambda item: -len(item[0])):
            if field == prefix or field.startswith(prefix + "."):
                return resolve(field[len(prefix):].lstrip("."))
        head = field.split(".")[0].split("[")[0]
        return self.exact.get(head, field)


def _index(rest: str) -> tuple[str, int | None]:
    """``limits[2]`` -> (``limits``, 2); ``limits`` -> (``limits``, None)."""
    key, _, tail = rest.partition("[")
    if tail.endswith("]") and tail[:-1].isdigit():
        return key, int(tail[:-1])
    return rest, None


def _item_resolver(places: _Places, sheet: str, row: int, columns: Iterable[str], points: list[int],
                   renames: dict | None = None):
    """A resolver for the fields of one contributor, process or requirement row."""
    columns = set(columns)
    renames = renames or {}

    def resolve(rest: str) -> str:
        if not rest:
            return places.cell(sheet, row)
        head, _, tail = rest.partition(".")
        key, i = _index(head)
        if key == "limits":
            return places.cell(sheet, row, "loosest" if i == 2 else "tightest")
        if key == "chain":
            return places.cell(sheet, row, CHAIN_PREFIX + tail if tail else None)
        if key == "cost":
            if not tail:
                return places.cell(sheet, row, "curve")
            sub, j = _index(tail)
            if sub in ("tolerance", "cost"):
                if not points:
                    return places.cell(sheet, row, "curve")
                at = points[j - 1] if j is not None and 0 < j <= len(points) else points[0]
                return places.cell("tables", at, sub)
            return places.cell(sheet, row, sub)
        key = renames.get(key, key)
        return places.cell(sheet, row, key if key in columns or key in COLUMNS.get(sheet, ()) else None)

    return resolve


# case-file keys that a workbook spreads over other columns
_LIMITS_HINT = " (in a workbook, limits are the two columns tightest and loosest)"
_COST_HINT = " (in a workbook, a cost is the columns curve, " + ", ".join(_PARAMETERS) + " and between)"
_LAYOUT_HINTS = {
    ("contributors", "limits"): _LIMITS_HINT,
    ("contributors", "cost"): _COST_HINT,
    ("processes", "limits"): _LIMITS_HINT,
    ("processes", "cost"): _COST_HINT,
    ("processes", "name"): " (a process's name goes in the column process)",
    ("requirements", "chain"): f" (in a workbook, a chain is one column {CHAIN_PREFIX}NAME per contributor)",
    ("closures", "expression"): " (a closure's equation goes in the column equation)",
}


def _unique(places: _Places, sheet: str, rows, column: str, within: str | None = None) -> None:
    """Two rows of ``sheet`` with the same text in ``column`` (per ``within``): the second is named."""
    first: dict = {}
    for row, values in rows:
        name, group = values.get(column), values.get(within) if within else None
        if not isinstance(name, str):
            continue  # the loader says what is wrong with it
        if (group, name) in first:
            whose = f" of {group!r}" if within else ""
            places.fail(places.cell(sheet, row, column),
                        f"{name!r}{whose} is already used by row {first[group, name]}")
        first.setdefault((group, name), row)


def _check_sheets(places: _Places, tables: dict) -> None:
    for name in tables:
        if name not in SHEETS:
            places.fail(places.cell(name), f"unknown sheet {name!r}{did_you_mean(name, SHEETS)} "
                                           f"(a case workbook has the sheets {', '.join(SHEETS)})")
    for name in REQUIRED_SHEETS:
        if name not in tables:
            optional = [s for s in SHEETS if s not in REQUIRED_SHEETS]
            places.fail(None, f"missing sheet {name!r} (a case workbook needs the sheets "
                              f"{', '.join(REQUIRED_SHEETS)}; {', '.join(optional[:-1])} and "
                              f"{optional[-1]} are optional)")
    for name, table in tables.items():
        allowed = COLUMNS[name]
        for column in table.columns:
            if name == "requirements" and column.startswith(CHAIN_PREFIX) and len(column) > len(CHAIN_PREFIX):
                continue
            if column not in allowed:
                hint = _LAYOUT_HINTS.get((name, column)) or did_you_mean(column, allowed)
                if not hint and name == "requirements":
                    hint = f" (a chain coefficient goes in a column named {CHAIN_PREFIX}NAME)"
                places.fail(places.cell(name, 1, column), f"unknown column {column!r}{hint}")
        for column, why in REQUIRED_COLUMNS[name].items():
            if column not in table.columns and (table.rows or name in REQUIRED_SHEETS):
                places.fail(places.cell(name, 1), f"missing column {column!r} ({why})")


def _check_formula_text(places: _Places, tables: dict) -> None:
    """An equation or expression cell that a spreadsheet program turned into a failed formula."""
    for sheet, column in _FORMULA_TEXT.items():
        for row, values in tables[sheet].rows if sheet in tables else ():
            value = values.get(column)
            if isinstance(value, str) and value in _ERROR_VALUES:
                places.fail(places.cell(sheet, row, column),
                            f"holds the spreadsheet error {value} (the program took the {column} for a "
                            "formula, as it does with text that starts with = + or -: type an apostrophe "
                            "' before it)")


def _text_cells(values: dict) -> dict:
    """A number typed into a free-text column is meant as text."""
    return {k: (str(v) if k in _FREE_TEXT and isinstance(v, (int, float)) and not isinstance(v, bool) else v)
            for k, v in values.items()}


def _read_settings(places: _Places, table: SheetTable) -> dict:
    data: dict = {}
    seen: dict[str, int] = {}
    for row, values in table.rows:
        key = values.get("setting")
        if key is None:
            places.fail(places.cell("settings", row, "setting"), "missing (the name of the setting)")
        if not isinstance(key, str) or key not in SETTINGS:
            places.fail(places.cell("settings", row, "setting"),
                        f"unknown setting {key!r}{did_you_mean(key, SETTINGS)}")
        if key in seen:
            places.fail(places.cell("settings", row, "setting"), f"{key!r} is already set in row {seen[key]}")
        seen[key] = row
        where = places.cell("settings", row, "value")
        value = values.get("value")
        path = key.removesuffix(".from").removesuffix(".to")
        places.exact.setdefault(path, where)
        if key.startswith("frontier.range."):
            places.exact[f"frontier.range[{1 if key.endswith('from') else 2}]"] = where
        if key == "allocation.models":
            places.exact.setdefault("allocation.models", where)
        if value is None:
            continue
        if key in _FREE_TEXT and isinstance(value, (int, float)) and not isinstance(value, bool):
            value = str(value)
        if key == "allocation.models" and isinstance(value, str):
            value = [m.strip() for m in value.split(",")]
            for i in range(1, len(value) + 1):
                places.exact[f"allocation.models[{i}]"] = where
        section, _, name = path.partition(".")
        if key.startswith("frontier.range."):
            span = data.setdefault("frontier", {}).setdefault("range", [None, None])
            span[0 if key.endswith("from") else 1] = value
        elif name:
            data.setdefault(section, {})[name] = value
        else:
            data[section] = value
    span = data.get("frontier", {}).get("range")
    if span is not None and None in span:
        missing = "frontier.range.to" if span[1] is None else "frontier.range.from"
        places.fail(places.cell("settings", seen.get(missing)) if missing in seen else places.cell("settings"),
                    f"{missing} missing (give both ends of the frontier range, or neither)")
    for section in ("allocation", "economics", "frontier"):
        places.exact.setdefault(section, places.cell("settings"))
    for key in SETTINGS:  # a setting without a row: say which row is wanted
        path = key.removesuffix(".from").removesuffix(".to")
        places.exact.setdefault(path, f"{places.cell('settings')}, setting {key}")
    return data


def _limits(places: _Places, sheet: str, row: int, values: dict, out: dict) -> None:
    tightest, loosest = values.get("tightest"), values.get("loosest")
    if tightest is None and loosest is None:
        return
    if tightest is None or loosest is None:
        empty = "tightest" if tightest is None else "loosest"
        places.fail(places.cell(sheet, row, empty), "missing (give both tightest and loosest, or neither)")
    out["limits"] = [tightest, loosest]


def _cost(values: dict, points: list) -> dict | None:
    cost = {k: values[k] for k in COST_COLUMNS if k in values}
    if points:
        cost["tolerance"] = [t for t, _ in points]
        cost["cost"] = [c for _, c in points]
    return cost or None


def _read_points(places: _Places, table: SheetTable | None, owners: dict) -> dict:
    """``tables`` rows -> {(contributor, process or None): [(row, tolerance, cost), ...]}."""
    points: dict = {}
    if table is None:
        return points
    for row, values in table.rows:
        name = values.get("contributor")
        if name is None:
            places.fail(places.cell("tables", row, "contributor"), "missing (the contributor the point belongs to)")
        if name not in owners:
            places.fail(places.cell("tables", row, "contributor"),
                        f"unknown contributor {name!r}"
                        f"{did_you_mean(name, [n for n in owners if isinstance(n, str)])}")
        process = values.get("process")
        if process is not None and process not in owners[name]:
            known = owners[name]
            have = f" (the processes of {name!r}: {', '.join(map(str, known))})" if known else \
                f" ({name!r} has no processes: leave the process cell empty)"
            places.fail(places.cell("tables", row, "process"), f"unknown process {process!r}{have}")
        for column in ("tolerance", "cost"):
            if column not in values:
                places.fail(places.cell("tables", row, column), "missing (a point needs a tolerance and a cost)")
        points.setdefault((name, process), []).append((row, values["tolerance"], values["cost"]))
    return points


def _workbook_to_dict(places: _Places, tables: dict) -> dict:
    _check_sheets(places, tables)
    _check_formula_text(places, tables)
    data = _read_settings(places, tables["settings"])

    contributor_rows = tables["contributors"].rows
    places.exact["contributor"] = places.cell("contributors")
    places.exact["requirement"] = places.cell("requirements")

    # processes and points are found by name: a repeated name is refused at its second row
    _unique(places, "contributors", contributor_rows, "name")
    _unique(places, "requirements", tables["requirements"].rows, "name")
    names = [values.get("name") for _, values in contributor_rows]

    # process rows per contributor, in order
    process_rows: dict = {}
    if "processes" in tables:
        _unique(places, "processes", tables["processes"].rows, "process", within="contributor")
        for row, values in tables["processes"].rows:
            owner = values.get("contributor")
            if owner is None:
                places.fail(places.cell("processes", row, "contributor"),
                            "missing (the contributor this process makes)")
            if owner not in names:
                known = [n for n in names if isinstance(n, str)]
                places.fail(places.cell("processes", row, "contributor"),
                            f"unknown contributor {owner!r}{did_you_mean(owner, known)}")
            process_rows.setdefault(owner, []).append((row, values))
    owners = {n: [v.get("process") for _, v in process_rows.get(n, [])] for n in names}
    points = _read_points(places, tables.get("tables"), owners)

    contributors = []
    for i, (row, values) in enumerate(contributor_rows, start=1):
        values = _text_cells(values)
        name = values.get("name")
        item = {k: values[k] for k in ("name", "description", "units", "nominal", "tolerance", "distribution",
                                       "cp", "mean_shift", "count", "fixed") if k in values}
        if isinstance(item.get("fixed"), str) and item["fixed"].lower() in ("true", "false"):
            item["fixed"] = item["fixed"].lower() == "true"
        _limits(places, "contributors", row, values, item)
        own = points.get((name, None), [])
        cost = _cost(values, [(t, c) for _, t, c in own])
        if cost is not None:
            item["cost"] = cost
        prefix = f"contributor[{i}]"
        resolve = _item_resolver(places, "contributors", row, values, [r for r, _, _ in own])
        places.add([prefix, f"{prefix} ({name})"], resolve)
        procs = []
        for j, (prow, pvalues) in enumerate(process_rows.get(name, []), start=1):
            pname = pvalues.get("process")
            proc = {"name": pname} if pname is not None else {}
            if "cp" in pvalues:
                proc["cp"] = pvalues["cp"]
            _limits(places, "processes", prow, pvalues, proc)
            mine = points.get((name, pname), [])
            pcost = _cost(pvalues, [(t, c) for _, t, c in mine])
            if pcost is not None:
                proc["cost"] = pcost
            procs.append(proc)
            presolve = _item_resolver(places, "processes", prow, pvalues, [r for r, _, _ in mine],
                                      renames={"name": "process"})
            for base in (prefix, f"{prefix} ({name})"):
                places.add([f"{base}.process[{j}]", f"{base}.process[{j}] ({pname})"], presolve)
        if procs:
            item["process"] = procs
            first = process_rows[name][0][0]
            places.add([f"{p}.process" for p in (prefix, f"{prefix} ({name})")],
                       lambda rest, first=first: places.cell("processes", first))
        contributors.append(item)
    if contributors:
        data["contributor"] = contributors

    requirements = []
    for i, (row, values) in enumerate(tables["requirements"].rows, start=1):
        item = {k: values[k] for k in REQUIREMENT_COLUMNS if k in values}
        chain = {k[len(CHAIN_PREFIX):]: v for k, v in values.items() if k.startswith(CHAIN_PREFIX)}
        if chain:
            item["chain"] = chain
        prefix = f"requirement[{i}]"
        resolve = _item_resolver(places, "requirements", row, values, [])
        places.add([prefix, f"{prefix} ({values.get('name')})"], resolve)
        requirements.append(item)
    if requirements:
        data["requirement"] = requirements

    for sheet, (key, columns) in LIST_SHEETS.items():
        places.exact[key] = places.cell(sheet)
        if sheet in UNIQUE_NAMES and sheet in tables:
            _unique(places, sheet, tables[sheet].rows, UNIQUE_NAMES[sheet])
        items = []
        for i, (row, values) in enumerate(tables[sheet].rows if sheet in tables else (), start=1):
            item = {k: v for k, v in _text_cells(values).items() if k in columns}
            resolve = _item_resolver(places, sheet, row, values, [])
            places.add([f"{key}[{i}]", f"{key}[{i}] ({values.get(columns[0])})"], resolve)
            items.append(item)
        if items:
            data[key] = items
    return data


def load_workbook_case(path: str | os.PathLike) -> Case:
    """Read and validate a case workbook (.xlsx) with the case file's loader.

    Parameters
    ----------
    path : str or path-like
        A workbook as :func:`write_case_workbook` writes it (docs/spreadsheets.md).

    Returns
    -------
    Case
        With ``path`` the workbook and ``sha256`` the hash of its bytes.

    Raises
    ------
    CaseError
        One line ``"<file>: sheet <s>, row <r>, column <c> (cell <X9>): <problem>"``:
        the loader's problem, at the cell it came from.
    UsageError
        openpyxl is not installed (the message says ``pip install "allocator[sheets]"``).
    """
    from .case import case_from_dict
    from .sheets import read_workbook

    file = str(path)
    tables = read_workbook(path)
    places = _Places(file, tables)
    data = _workbook_to_dict(places, tables)
    sha256 = hashlib.sha256(Path(path).read_bytes()).hexdigest()
    try:
        return case_from_dict(data, source=file, path=path, sha256=sha256)
    except CaseError as err:
        raise CaseError(err.problem, file=file, field=places.locate(err.field)) from None


# --------------------------------------------------------------------------- converting


def _kind(path: str | os.PathLike, role: str) -> str:
    suffix = Path(path).suffix.lower()
    if suffix not in (".toml", ".xlsx"):
        raise UsageError(f"{path}: the {role} must be a .toml case file or an .xlsx workbook "
                         f"(got '{suffix or 'no extension'}')")
    return suffix


def convert_case(source: str | os.PathLike, target: str | os.PathLike) -> Case:
    """Convert a case between a TOML case file and an .xlsx workbook (either way).

    The input is read and validated whole (the one case loader) before anything is
    written; the output is written atomically and never over the input.

    Parameters
    ----------
    source : str or path-like
        ``.toml`` or ``.xlsx``.
    target : str or path-like
        ``.xlsx`` or ``.toml`` (the same kind as the input is allowed: it writes the case
        in the tool's own layout).

    Returns
    -------
    Case
        The case read from ``source``.

    Raises
    ------
    CaseError
        The input is not a valid case (one line naming the field, or the sheet, row and column).
    UsageError
        Unknown file kinds, the output is the input or in a missing folder, or openpyxl
        is not installed for a workbook.
    """
    from .files import check_output_path

    into, out = _kind(source, "input"), _kind(target, "output")
    if out == ".xlsx" or into == ".xlsx":
        from .sheets import require_openpyxl

        require_openpyxl()
    check_output_path(target, protect=(source,), input_name="input file")
    if into == ".xlsx":
        case = load_workbook_case(source)
    else:
        from .case import load_case

        case = load_case(source)
    if out == ".xlsx":
        write_case_workbook(case, target, protect=(source,))
    else:
        from .caseout import write_case

        name = " ".join(Path(source).name.split())  # one comment line, whatever the name
        write_case(case, target, comment=f"Written by `allocator convert` from {name}.", protect=(source,))
    return case
