"""Load and validate a case file (TOML, optional CSV cost tables) into model objects.

This is the only place that reads case files. Every problem is raised as
:class:`allocator.errors.CaseError`, whose text is one line::

    <file>: <field path>: <problem>

Field paths count from 1 and name an item once its own name has been checked, e.g.
``contributor[3] (spacer).limits``, ``contributor[2] (shim).process[1] (grinding).cost.b``,
``requirement[1] (end_play).chain.spacr``, ``allocation.models[2]``. Problems with the
file as a whole (missing, too large, not UTF-8, not TOML) have no field path.

The checks are hand-written rather than generated from a schema so that each message
can say, in plain words, what is wrong and what was found. See docs/case-file.md.
"""

from __future__ import annotations

import csv
import hashlib
import io
import keyword
import math
import os
import re
import tomllib
from pathlib import Path

from . import chain as chain_module
from .chain import ExpressionError, compile_expression
from .closure import ClosureError
from .costs import CURVES, check_curve, family
from .costs.table import BETWEEN as TABLE_BETWEEN
from .errors import CaseError, did_you_mean
from .ppm import PER_MILLION
from .model import (
    DEFAULT_FALLOUT_PPM,
    DEFAULT_MODELS,
    DISTRIBUTIONS,
    MODELS,
    AllocationSettings,
    Case,
    Contributor,
    CostCurve,
    Economics,
    Closure,
    FrontierSettings,
    Offer,
    Process,
    Requirement,
    Unknown,
)
from .offers import tolerance_problem

__all__ = [
    "load_case",
    "loads_case",
    "case_from_dict",
    "MAX_FILE_BYTES",
    "MAX_CONTRIBUTORS",
    "MAX_COUNT",
    "MAX_TABLE_ROWS",
]

MAX_FILE_BYTES = 16 * 1024 * 1024  # case files and CSV tables; refused before reading
MAX_CONTRIBUTORS = 100_000
MAX_COUNT = 1_000_000  # instances of one contributor per assembly
MAX_TABLE_ROWS = 100_000  # points in one cost table (inline or CSV)
MAX_FRONTIER_POINTS = 2000
MAX_UNKNOWNS = 200  # unknowns of the closure equations (a dense Jacobian per sampled assembly)
MAX_LABEL_CHARS = 24  # a units label is printed in table headers: short, one line

# names an expression reserves for its functions and constant
RESERVED_NAMES = frozenset(
    {"sqrt", "exp", "log", "sin", "cos", "tan", "asin", "acos", "atan", "atan2", "pi"}
) | frozenset(chain_module.FUNCTIONS) | frozenset(chain_module.CONSTANTS)

_IDENTIFIER = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")

# allowed keys per section; anything else is an error with a "did you mean" hint
TOP_KEYS = (
    "title", "units", "currency", "contributor", "requirement",
    "allocation", "economics", "frontier", "offer", "unknown", "closure",
)
UNKNOWN_KEYS = ("name", "guess", "description")
CLOSURE_KEYS = ("name", "equation")
CONTRIBUTOR_KEYS = (
    "name", "description", "nominal", "tolerance", "limits", "cp", "mean_shift",
    "distribution", "count", "fixed", "cost", "process", "units",
)
PROCESS_KEYS = ("name", "limits", "cost", "cp")
REQUIREMENT_KEYS = ("name", "chain", "expression", "lower", "upper", "fallout_ppm", "units")
ALLOCATION_KEYS = ("models", "rounding")
ECONOMICS_KEYS = ("volume", "scrap_cost")
FRONTIER_KEYS = ("requirement", "vary", "range", "points")
OFFER_KEYS = ("contributor", "tolerance", "price", "note")
# cost-curve keys: which parameters each curve takes (from the curve registry)
CURVE_PARAMETERS = {name: family(name).case_keys for name in CURVES}
COST_KEYS = ("curve",) + tuple(dict.fromkeys(k for keys in CURVE_PARAMETERS.values() for k in keys))
FRONTIER_VARY = ("lower", "upper", "fallout_ppm")


# --------------------------------------------------------------------------- values


class _Problem(Exception):
    """A value is wrong; the caller adds file and field path."""


def _show(value) -> str:
    """A value as the user wrote it, short enough for a one-line message."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        text = value if len(value) <= 40 else value[:37] + "..."
        return f"text {text!r}"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, list):
        return f"a list of {len(value)}"
    if isinstance(value, dict):
        return "a table"
    return f"a {type(value).__name__}"  # TOML dates and times


def _number(value) -> float:
    """A finite float from a TOML int or float (bools are not numbers)."""
    if isinstance(value, bool):
        raise _Problem(f"must be a number, not {_show(value)}")
    if not isinstance(value, (int, float)):
        raise _Problem(f"must be a number (got {_show(value)})")
    try:
        result = float(value)
    except OverflowError:
        result = math.inf
    if not math.isfinite(result):
        raise _Problem(f"must be a finite number (got {_show(value)})")
    return result


def _num(x) -> str:
    """A bound as written in a message: 0, 1000000, 0.5."""
    return str(int(x)) if float(x).is_integer() else repr(float(x))


def _bounded(value, *, gt=None, ge=None, lt=None, le=None) -> float:
    """A finite number within the given bounds (gt/ge below, lt/le above)."""
    x = _number(value)
    ok = (
        (gt is None or x > gt) and (ge is None or x >= ge)
        and (lt is None or x < lt) and (le is None or x <= le)
    )
    if not ok:
        wanted = [
            f"{op} {_num(bound)}"
            for op, bound in ((">", gt), (">=", ge), ("<", lt), ("<=", le))
            if bound is not None
        ]
        raise _Problem(f"must be {' and '.join(wanted)} (got {_show(value)})")
    return x


def _integer(value, *, minimum: int, maximum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise _Problem(f"must be a whole number (got {_show(value)})")
    if not minimum <= value <= maximum:
        raise _Problem(f"must be between {minimum} and {maximum} (got {value})")
    return value


def _text(value, *, nonempty: bool = False) -> str:
    if not isinstance(value, str):
        raise _Problem(f"must be text (got {_show(value)})")
    if nonempty and not value.strip():
        raise _Problem("must not be empty")
    return value


def _units_label(value) -> str:
    """A units label: text printed beside numbers, never used to convert them.

    Refused, because no table or report can honour it: anything but text, an empty or
    blank label, more than MAX_LABEL_CHARS characters, and line breaks, tabs or other
    non-printable characters.
    """
    if not isinstance(value, str):
        raise _Problem(f'must be a text label such as "mm" (got {_show(value)})')
    value = value.strip(" ")  # spaces around a label are layout, not part of it
    if not value:
        raise _Problem('must not be empty (a label such as "mm"; lengths are never converted)')
    if len(value) > MAX_LABEL_CHARS:
        raise _Problem(
            f'must be a short label such as "mm" (at most {MAX_LABEL_CHARS} characters, got {len(value)})'
        )
    if not value.isprintable():
        bad = next(ch for ch in value if not ch.isprintable())
        raise _Problem(f'must be one line of printable text such as "mm" (got the character {bad!r})')
    return value


def _choice(value, options) -> str:
    if not isinstance(value, str):
        raise _Problem(f"must be one of {', '.join(options)} (got {_show(value)})")
    if value not in options:
        hint = did_you_mean(value, options, clause=True)
        raise _Problem(f"must be one of {', '.join(options)} (got {value!r}{hint})")
    return value


def _name(value, *, reserved: bool) -> str:
    """An identifier usable in a chain or expression."""
    name = _text(value, nonempty=True)
    if not _IDENTIFIER.match(name):
        raise _Problem(
            f"{name!r} is not a valid name (letters, digits and _, not starting with a digit)"
        )
    if keyword.iskeyword(name):
        raise _Problem(f"{name!r} is a Python keyword and cannot be a name")
    if name.startswith("__"):
        raise _Problem(f"{name!r} starts with '__', which is reserved")
    if reserved and name in RESERVED_NAMES:
        raise _Problem(f"{name!r} is reserved for a function or constant in expressions")
    return name


def _fmt_pair(pair) -> str:
    return f"[{pair[0]!r}, {pair[1]!r}]"


# --------------------------------------------------------------------------- tables


class _Source:
    """Where a case came from: the label used in messages and the folder for CSV files."""

    def __init__(self, label: str, base_dir: Path | None):
        self.label = label
        self.base_dir = base_dir

    def fail(self, field: str | None, problem: str):
        raise CaseError(problem, file=self.label, field=field)


class _Table:
    """One TOML table being validated, with its field path for messages."""

    def __init__(self, source: _Source, data: dict, path: str):
        self.source = source
        self.data = data
        self.path = path

    def field(self, key: str | None = None) -> str | None:
        if key is None:
            return self.path or None
        return f"{self.path}.{key}" if self.path else key

    def fail(self, key: str | None, problem: str):
        self.source.fail(self.field(key), problem)

    def named(self, name: str) -> None:
        """Add the item's (checked) name to its path: ``contributor[3] (spacer)``."""
        self.path = f"{self.path} ({name})"

    def has(self, key: str) -> bool:
        return key in self.data

    def check_keys(self, allowed) -> None:
        for key in self.data:
            if key not in allowed:
                self.fail(None, f"unknown key {key!r}{did_you_mean(key, allowed)}")

    def get(self, key: str, convert, *, required: str | None = None, default=None):
        """``convert(value)`` with its :class:`_Problem` turned into a CaseError.

        ``required`` is the explanation shown when the key is missing (None: optional).
        """
        if key not in self.data:
            if required is not None:
                self.fail(key, f"missing ({required})")
            return default
        try:
            return convert(self.data[key])
        except _Problem as problem:
            self.fail(key, str(problem))

    def pair(self, key: str, what: str) -> tuple[float, float] | None:
        """A two-number list ``[first, second]``; ``what`` names the two ends."""
        if key not in self.data:
            return None
        value = self.data[key]
        if not isinstance(value, list) or len(value) != 2:
            got = f"{len(value)} values" if isinstance(value, list) else _show(value)
            self.fail(key, f"must be a list of two numbers {what} (got {got})")
        first, second = self.numbers(key, value)
        return first, second

    def numbers(self, key: str, items: list) -> list[float]:
        """Every item of the list under ``key`` as a finite float; a bad one fails as ``key[i]``."""
        out = []
        for i, item in enumerate(items, start=1):
            try:
                out.append(_number(item))
            except _Problem as problem:
                self.fail(f"{key}[{i}]", str(problem))
        return out

    def limits(self) -> tuple[float, float] | None:
        pair = self.pair("limits", "[tightest, loosest]")
        if pair is not None and not 0 < pair[0] <= pair[1]:
            self.fail(
                "limits",
                f"must be [tightest, loosest] with 0 < tightest <= loosest (got {_fmt_pair(pair)})",
            )
        return pair

    def sub(self, key: str, *, required: str | None = None) -> "_Table | None":
        """A nested table (inline ``{...}`` or ``[section]``)."""
        if key not in self.data:
            if required is not None:
                self.fail(key, f"missing ({required})")
            return None
        value = self.data[key]
        if not isinstance(value, dict):
            self.fail(key, f"must be a table (got {_show(value)})")
        return _Table(self.source, value, self.field(key))

    def array(self, key: str, *, header: str, at_least: int, at_most: int) -> list["_Table"]:
        """An array of tables (``[[header]]``), each with a 1-based path."""
        if key not in self.data:
            if at_least:
                self.fail(key, f"missing (at least one [[{header}]] table is required)")
            return []
        value = self.data[key]
        if not isinstance(value, list):
            self.fail(key, f"must be an array of tables, written [[{header}]] (got {_show(value)})")
        if len(value) < at_least:
            self.fail(key, f"needs at least {at_least} [[{header}]] table")
        if len(value) > at_most:
            self.fail(key, f"too many entries ({len(value)}; the limit is {at_most})")
        tables = []
        for i, item in enumerate(value, start=1):
            path = f"{self.field(key)}[{i}]"
            if not isinstance(item, dict):
                self.source.fail(path, f"must be a table (got {_show(item)})")
            tables.append(_Table(self.source, item, path))
        return tables


# --------------------------------------------------------------------------- costs


def _curve_checker():
    """The check of a curve over its limits (:func:`allocator.costs.check_curve`)."""
    return check_curve


def _read_cost(cost: _Table, limits: tuple[float, float] | None):
    """A cost table -> (CostCurve, limits); a ``table`` curve implies or narrows limits.

    ``limits`` are those given next to the cost (None if not given). The returned
    limits are the ones the contributor or process will have.
    """
    cost.check_keys(COST_KEYS)
    curve = cost.get("curve", lambda v: _choice(v, CURVES), required="one of " + ", ".join(CURVES))
    for key in cost.data:
        if key != "curve" and key not in CURVE_PARAMETERS[curve]:
            cost.fail(key, f"{key!r} is not a parameter of the {curve} curve")
    fam = family(curve)
    if fam.piecewise:
        return _read_table_cost(cost, limits)
    values = {}
    for p in fam.parameters:
        check = lambda v, p=p: _bounded(v, **p.bound_keywords)  # noqa: E731
        if p.default is None:
            values[p.name] = cost.get(p.name, check, required=f"{p.name} {p.bound} for the {curve} curve")
        else:
            values[p.name] = cost.get(p.name, check, default=p.default)
    return CostCurve(curve=curve, **values), limits


def _read_table_cost(cost: _Table, limits):
    between = cost.get("between", lambda v: _choice(v, TABLE_BETWEEN), default="interpolate")
    has_lists = cost.has("tolerance") or cost.has("cost")
    if cost.has("file") and has_lists:
        cost.fail("file", "give either file or tolerance and cost lists, not both")
    if cost.has("file"):
        tolerances, costs = _read_table_file(cost)
    elif has_lists:
        tolerances, costs = _read_table_lists(cost)
    else:
        cost.fail(None, "a table cost needs tolerance = [...] and cost = [...], or file = \"x.csv\"")

    span = (tolerances[0], tolerances[-1])
    if limits is None:
        limits = span
    elif limits[0] < span[0] or limits[1] > span[1]:
        # the limits sit next to the cost: one level up from cost's path
        cost.source.fail(
            cost.path.rsplit(".", 1)[0] + ".limits",
            f"limits {_fmt_pair(limits)} reach outside the cost table's tolerances "
            f"{_fmt_pair(span)}",
        )
    if between == "choose":
        # only listed tolerances exist: keep those inside the limits
        kept = [(t, c) for t, c in zip(tolerances, costs) if limits[0] <= t <= limits[1]]
        if not kept:
            cost.fail(None, f"no tolerance of the table lies inside limits {_fmt_pair(limits)}")
        limits = (kept[0][0], kept[-1][0])
        if len(kept) >= 2:
            tolerances = [t for t, _ in kept]
            costs = [c for _, c in kept]
        # with one point left the table stays whole (a table needs two points) and the
        # limits (t, t) alone say that only t is allowed
    curve = CostCurve(
        curve="table",
        points_tolerance=tuple(tolerances),
        points_cost=tuple(costs),
        between=between,
    )
    return curve, limits


def _check_points(tolerances, costs, fail_at) -> None:
    """Tolerances > 0 and strictly increasing, costs >= 0; ``fail_at(i, column, problem)``."""
    for i, (t, c) in enumerate(zip(tolerances, costs)):
        if not t > 0:
            fail_at(i, "tolerance", f"must be > 0 (got {t!r})")
        if i and not t > tolerances[i - 1]:
            fail_at(
                i, "tolerance",
                f"must be greater than the previous tolerance {tolerances[i - 1]!r} "
                f"(tolerances must be strictly increasing; got {t!r})",
            )
        if not c >= 0:
            fail_at(i, "cost", f"must be >= 0 (got {c!r})")


def _read_table_lists(cost: _Table):
    columns = {}
    for key in ("tolerance", "cost"):
        value = cost.data.get(key)
        if value is None:
            cost.fail(key, "missing (a table cost needs both tolerance and cost lists)")
        if not isinstance(value, list):
            cost.fail(key, f"must be a list of numbers (got {_show(value)})")
        if len(value) > MAX_TABLE_ROWS:
            cost.fail(key, f"too many points ({len(value)}; the limit is {MAX_TABLE_ROWS})")
        columns[key] = cost.numbers(key, value)
    tolerances, costs = columns["tolerance"], columns["cost"]
    if len(tolerances) != len(costs):
        cost.fail(
            None,
            f"tolerance and cost lists must have the same length "
            f"(got {len(tolerances)} and {len(costs)})",
        )
    if len(tolerances) < 2:
        cost.fail("tolerance", f"needs at least 2 points (got {len(tolerances)})")

    def fail_at(i, column, problem):
        cost.fail(f"{column}[{i + 1}]", problem)

    _check_points(tolerances, costs, fail_at)
    return tolerances, costs


def _table_file_path(cost: _Table, text: str) -> Path:
    """Resolve ``file`` inside the case's folder; anything leaving that folder is refused."""
    source = cost.source
    if source.base_dir is None:
        cost.fail("file", "a cost table file needs a case read from disk (no folder to look in)")
    if not text.strip():
        cost.fail("file", "must not be empty")
    relative = Path(text)
    if relative.is_absolute() or text.startswith(("/", "\\", "~")) or re.match(r"[A-Za-z]:", text):
        cost.fail("file", f"must be a path relative to the case's folder (got absolute path {text!r})")
    base = Path(source.base_dir).resolve()
    target = (base / relative).resolve()  # follows symlinks, so a link leaving the folder is caught
    if not target.is_relative_to(base):
        cost.fail("file", f"{text!r} leads outside the case's folder, which is not allowed")
    if not target.exists():
        cost.fail("file", f"{text!r} not found in the case's folder")
    if not target.is_file():
        cost.fail("file", f"{text!r} is not a file")
    return target


def _read_table_file(cost: _Table):
    text = cost.get("file", lambda v: _text(v))
    target = _table_file_path(cost, text)
    try:
        size = target.stat().st_size
        if size > MAX_FILE_BYTES:
            cost.fail("file", f"{text} is larger than {MAX_FILE_BYTES // 2**20} MB")
        data = _read_capped(target, size)
    except OSError as err:
        cost.fail("file", f"cannot read {text} ({(err.strerror or str(err)).lower()})")
    if len(data) > MAX_FILE_BYTES:
        cost.fail("file", f"{text} is larger than {MAX_FILE_BYTES // 2**20} MB")
    try:
        content = data.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        row = data.count(b"\n", 0, err.start) + 1
        cost.fail("file", f"{text} row {row}: not UTF-8 text")

    reader = csv.reader(io.StringIO(content, newline=""))
    tolerances, costs, rows = [], [], []
    header_seen = False
    try:
        for fields in reader:
            if not fields or all(not f.strip() for f in fields):
                continue  # blank line
            row = reader.line_num
            if not header_seen:
                header = [f.strip().lower() for f in fields]
                if header != ["tolerance", "cost"]:
                    cost.fail(
                        "file",
                        f"{text} row {row}: the header must be 'tolerance,cost' "
                        f"(got {','.join(fields)!r})",
                    )
                header_seen = True
                continue
            if len(fields) != 2:
                cost.fail("file", f"{text} row {row}: expected 2 values (tolerance,cost), got {len(fields)}")
            if len(rows) >= MAX_TABLE_ROWS:
                cost.fail("file", f"{text} has more than {MAX_TABLE_ROWS} rows")
            for column, field, out in (("tolerance", fields[0], tolerances), ("cost", fields[1], costs)):
                try:
                    value = float(field.strip())
                except ValueError:
                    cost.fail("file", f"{text} row {row}: {column} {field.strip()!r} is not a number")
                if not math.isfinite(value):
                    cost.fail("file", f"{text} row {row}: {column} must be a finite number (got {field.strip()!r})")
                out.append(value)
            rows.append(row)
    except csv.Error as err:
        cost.fail("file", f"{text} row {reader.line_num}: not valid CSV ({err})")
    if not header_seen:
        cost.fail("file", f"{text} is empty (expected a header 'tolerance,cost' and rows)")
    if len(rows) < 2:
        cost.fail("file", f"{text} needs at least 2 rows of points (got {len(rows)})")

    def fail_at(i, column, problem):
        cost.fail("file", f"{text} row {rows[i]}: {column} {problem}")

    _check_points(tolerances, costs, fail_at)
    return tolerances, costs


def _check_curve(owner: _Table, curve: CostCurve, limits) -> None:
    checker = _curve_checker()
    if checker is None:
        return
    problem = checker(curve, limits)
    if problem:
        owner.fail("cost", problem)


# --------------------------------------------------------------------------- contributors


def _within(t: float, limits) -> bool:
    lo, hi = limits
    slack = 1e-12 * max(abs(hi), 1.0)  # a tolerance written equal to a limit is inside
    return lo - slack <= t <= hi + slack


def _read_process(proc: _Table, seen: dict, distribution: str) -> Process:
    name = proc.get("name", lambda v: _text(v, nonempty=True), required="a name for the process")
    _claim_name(proc, seen, name, "process", " of this contributor")
    proc.check_keys(PROCESS_KEYS)
    cp = proc.get("cp", lambda v: _bounded(v, gt=0))
    if cp is not None and distribution != "normal":
        proc.fail("cp", f"cp applies only to the normal distribution (this contributor is {distribution})")
    limits = proc.limits()
    cost_table = proc.sub("cost", required="the cost curve of this process")
    curve, limits = _read_cost(cost_table, limits)
    if limits is None:
        proc.fail("limits", f"missing (the achievable [tightest, loosest] range of a {curve.curve} cost)")
    _check_curve(proc, curve, limits)
    return Process(name=name, limits=limits, cost=curve, cp=cp)


def _read_contributor(item: _Table, seen: dict) -> Contributor:
    name = item.get("name", lambda v: _name(v, reserved=True), required="a name used in requirements")
    _claim_name(item, seen, name, "contributor")
    item.check_keys(CONTRIBUTOR_KEYS)

    description = item.get("description", _text, default="")
    nominal = item.get("nominal", _number, required="the nominal value")
    tolerance = item.get("tolerance", lambda v: _bounded(v, gt=0), required="the current ± tolerance")
    distribution = item.get("distribution", lambda v: _choice(v, DISTRIBUTIONS), default="normal")
    cp = item.get("cp", lambda v: _bounded(v, gt=0))
    if cp is not None and distribution != "normal":
        item.fail("cp", f"cp applies only to the normal distribution (this contributor is {distribution})")
    mean_shift = item.get("mean_shift", lambda v: _bounded(v, ge=0, le=1), default=0.0)
    count = item.get("count", lambda v: _integer(v, minimum=1, maximum=MAX_COUNT), default=1)
    fixed = item.get("fixed", _boolean, default=False)
    units = item.get("units", _units_label)

    processes = ()
    limits = curve = None
    if item.has("process"):
        for key in ("limits", "cost"):
            if item.has(key):
                item.fail(key, f"cannot be given together with process entries (give {key} per process)")
        seen_processes: dict = {}
        processes = tuple(
            _read_process(p, seen_processes, distribution)
            for p in item.array("process", header="contributor.process", at_least=1, at_most=MAX_TABLE_ROWS)
        )
        if not fixed and not any(_within(tolerance, p.limits) for p in processes):
            ranges = ", ".join(f"{p.name} {_fmt_pair(p.limits)}" for p in processes)
            item.fail("tolerance", f"tolerance {tolerance!r} is outside the limits of every process ({ranges})")
    else:
        limits = item.limits()
        cost_table = item.sub("cost")
        if cost_table is not None:
            curve, limits = _read_cost(cost_table, limits)
        if not fixed:
            if curve is None:
                item.fail(
                    None,
                    "needs a cost (with limits), a table cost or process entries; "
                    "or set fixed = true",
                )
            if limits is None:
                item.fail(
                    "limits",
                    f"missing (the achievable [tightest, loosest] range; required with a {curve.curve} cost)",
                )
            if not _within(tolerance, limits):
                item.fail("tolerance", f"tolerance {tolerance!r} is outside limits {_fmt_pair(limits)}")
        if curve is not None:
            _check_curve(item, curve, limits if limits is not None else (tolerance, tolerance))

    return Contributor(
        name=name,
        nominal=nominal,
        tolerance=tolerance,
        limits=limits,
        cost=curve,
        processes=processes,
        description=description,
        cp=cp if cp is not None else 1.0,
        mean_shift=mean_shift,
        distribution=distribution,
        count=count,
        fixed=fixed,
        units=units,
    )


def _boolean(value) -> bool:
    if not isinstance(value, bool):
        raise _Problem(f"must be true or false (got {_show(value)})")
    return value


def _claim_name(item: _Table, seen: dict, name: str, section: str, suffix: str = "") -> None:
    """Record ``name`` as the next ``section`` entry's name (``seen``: name -> entry number, from 1)
    and name ``item`` by it in later messages; a name used before is an error."""
    if name in seen:
        item.fail("name", f"{name!r} is already used by {section}[{seen[name]}]{suffix}")
    seen[name] = len(seen) + 1
    item.named(name)


# --------------------------------------------------------------------------- requirements


def _read_chain(item: _Table, names, unknowns=()) -> dict[str, float]:
    table = item.sub("chain")
    if not table.data:
        table.fail(None, "must name at least one contributor")
    chain = {}
    for name, value in table.data.items():
        if name in unknowns:
            table.fail(
                name,
                f"{name!r} is an unknown of the closure equations; a chain names contributors "
                "only (write the requirement as an expression to use an unknown)",
            )
        if name not in names:
            table.fail(name, f"unknown contributor {name!r}{did_you_mean(name, names)}")
        try:
            coeff = _number(value)
        except _Problem as problem:
            table.fail(name, str(problem))
        if coeff == 0:
            table.fail(name, "coefficient must not be 0 (leave the contributor out instead)")
        chain[name] = coeff
    return chain


def _read_requirement(item: _Table, seen: dict, names, unknowns=()) -> Requirement:
    name = item.get("name", lambda v: _name(v, reserved=False), required="a name for the requirement")
    _claim_name(item, seen, name, "requirement")
    item.check_keys(REQUIREMENT_KEYS)

    has_chain, has_expression = item.has("chain"), item.has("expression")
    if has_chain and has_expression:
        item.fail(None, "give either chain or expression, not both")
    if not has_chain and not has_expression:
        item.fail(None, "needs a chain = { name = coefficient, ... } or an expression")
    chain = expression = None
    if has_chain:
        chain = _read_chain(item, names, unknowns)
    else:
        expression = item.get("expression", lambda v: _text(v, nonempty=True))
        what = "a contributor or unknown" if unknowns else "a contributor"
        try:
            compiled = compile_expression(expression, tuple(names) + tuple(unknowns), what=what)
        except ExpressionError as err:
            item.fail("expression", str(err))
        if not compiled.names:
            item.fail("expression", "uses no contributor" + (" or unknown" if unknowns else ""))

    lower = item.get("lower", _number)
    upper = item.get("upper", _number)
    if lower is None and upper is None:
        item.fail(None, "needs lower, upper or both")
    if lower is not None and upper is not None and not lower < upper:
        item.fail("upper", f"must be greater than lower (got lower {lower!r}, upper {upper!r})")
    fallout_ppm = item.get("fallout_ppm", lambda v: _bounded(v, gt=0, lt=PER_MILLION), default=DEFAULT_FALLOUT_PPM)
    units = item.get("units", _units_label)
    return Requirement(
        name=name, chain=chain, expression=expression, lower=lower, upper=upper, fallout_ppm=fallout_ppm,
        units=units,
    )


# --------------------------------------------------------------------------- closure


def _read_unknown(item: _Table, seen: dict, names) -> Unknown:
    name = item.get("name", lambda v: _name(v, reserved=True), required="a name for the unknown")
    if name in names:
        item.fail("name", f"{name!r} is already a contributor (an unknown must not shadow a contributor)")
    _claim_name(item, seen, name, "unknown")
    item.check_keys(UNKNOWN_KEYS)
    guess = item.get("guess", _number, required="a start value for the nominal solve")
    description = item.get("description", _text, default="")
    return Unknown(name=name, guess=guess, description=description)


def _read_closure(item: _Table, seen: dict, names, unknowns) -> tuple[Closure, frozenset]:
    """One closure equation and the names it uses."""
    label = item.get("name", lambda v: _name(v, reserved=False), default="")
    if label:
        _claim_name(item, seen, label, "closure")
    item.check_keys(CLOSURE_KEYS)
    equation = item.get(
        "equation", lambda v: _text(v, nonempty=True),
        required='the equation, an expression that is 0 when the loop closes, e.g. "a + b - c"',
    )
    try:
        compiled = compile_expression(equation, tuple(names) + tuple(unknowns), what="a contributor or unknown")
    except ExpressionError as err:
        item.fail("equation", str(err))
    used = frozenset(compiled.names)
    if not used & set(unknowns):
        item.fail(
            "equation",
            "names no unknown (an equation among contributors alone cannot settle the assembly)",
        )
    return Closure(equation=equation, name=label), used


def _read_loop(top: _Table, names) -> tuple[tuple[Unknown, ...], tuple[Closure, ...]]:
    """The ``[[unknown]]`` and ``[[closure]]`` tables, checked against each other."""
    seen: dict = {}
    unknown_tables = top.array("unknown", header="unknown", at_least=0, at_most=MAX_UNKNOWNS)
    unknowns = tuple(_read_unknown(item, seen, set(names)) for item in unknown_tables)
    unknown_names = tuple(u.name for u in unknowns)
    seen = {}
    closure_tables = top.array("closure", header="closure", at_least=0, at_most=MAX_UNKNOWNS)
    read = [_read_closure(item, seen, names, unknown_names) for item in closure_tables]
    closures = tuple(c for c, _ in read)
    if len(closures) != len(unknowns):
        field = "closure" if closures or not unknowns else "unknown"
        top.fail(
            field,
            f"{len(closures)} closure equation{'s' if len(closures) != 1 else ''} for "
            f"{len(unknowns)} unknown{'s' if len(unknowns) != 1 else ''} "
            "(one equation per unknown: a 2-D vector loop gives an x and a y equation)",
        )
    used = frozenset().union(*(u for _, u in read)) if read else frozenset()
    for i, u in enumerate(unknowns, start=1):
        if u.name not in used:
            top.fail(
                f"unknown[{i}] ({u.name})",
                "is used by no closure equation (nothing settles it; name it in an equation or remove it)",
            )
    return unknowns, closures


# --------------------------------------------------------------------------- settings


def _read_allocation(table: _Table | None) -> AllocationSettings:
    if table is None:
        return AllocationSettings()
    table.check_keys(ALLOCATION_KEYS)
    models = DEFAULT_MODELS
    if table.has("models"):
        value = table.data["models"]
        if not isinstance(value, list) or not value:
            table.fail("models", f"must be a non-empty list of model names from {', '.join(MODELS)}")
        seen = set()
        for i, model in enumerate(value, start=1):
            try:
                _choice(model, MODELS)
            except _Problem as problem:
                table.fail(f"models[{i}]", str(problem))
            if model in seen:
                table.fail(f"models[{i}]", f"{model!r} is listed twice")
            seen.add(model)
        models = tuple(value)
    rounding = table.get("rounding", _rounding)
    return AllocationSettings(models=models, rounding=rounding)


def _rounding(value):
    if isinstance(value, str):
        if value != "iso286":
            hint = did_you_mean(value, ["iso286"], clause=True)
            raise _Problem(f"must be a positive step or 'iso286' (got {value!r}{hint})")
        return value
    try:
        return _bounded(value, gt=0)
    except _Problem as problem:
        raise _Problem(f"{problem} (a positive step or 'iso286')") from None


def _read_economics(table: _Table | None) -> Economics:
    if table is None:
        return Economics()
    table.check_keys(ECONOMICS_KEYS)
    return Economics(
        volume=table.get("volume", lambda v: _bounded(v, gt=0)),
        scrap_cost=table.get("scrap_cost", lambda v: _bounded(v, ge=0)),
    )


def _read_frontier(table: _Table | None, requirements) -> FrontierSettings:
    if table is None:
        return FrontierSettings()
    table.check_keys(FRONTIER_KEYS)
    by_name = {r.name: r for r in requirements}
    name = table.get("requirement", lambda v: _text(v, nonempty=True))
    if name is not None and name not in by_name:
        table.fail("requirement", f"unknown requirement {name!r}{did_you_mean(name, by_name)}")
    vary = table.get("vary", lambda v: _choice(v, FRONTIER_VARY), default="upper")
    if name is not None and vary in ("lower", "upper") and getattr(by_name[name], vary) is None:
        table.fail("vary", f"requirement {name!r} has no {vary} limit to vary")
    span = table.pair("range", "[from, to]")
    if span is not None:
        if not span[0] < span[1]:
            table.fail("range", f"must be [from, to] with from < to (got {_fmt_pair(span)})")
        if vary == "fallout_ppm" and not (0 < span[0] and span[1] < PER_MILLION):
            table.fail("range", f"fallout_ppm values must be > 0 and < 1000000 (got {_fmt_pair(span)})")
    points = table.get(
        "points", lambda v: _integer(v, minimum=2, maximum=MAX_FRONTIER_POINTS), default=25
    )
    return FrontierSettings(requirement=name, vary=vary, range=span, points=points)


def _read_offer(item: _Table, contributors) -> Offer:
    """One ``[[offer]]`` table: a supplier's tolerance and price for one contributor."""
    item.check_keys(OFFER_KEYS)
    by_name = {c.name: c for c in contributors}
    name = item.get("contributor", lambda v: _text(v, nonempty=True), required="the contributor offered")
    if name not in by_name:
        item.fail("contributor", f"unknown contributor {name!r}{did_you_mean(name, by_name)}")
    item.named(name)
    tolerance = item.get("tolerance", lambda v: _bounded(v, gt=0), required="the offered ± tolerance")
    problem = tolerance_problem(by_name[name], tolerance)
    if problem:
        item.fail("tolerance", problem)
    price = item.get("price", lambda v: _bounded(v, ge=0), required="the offered price per part")
    note = item.get("note", _text, default="")
    return Offer(contributor=name, tolerance=tolerance, price=price, note=note)


# --------------------------------------------------------------------------- whole case


def _build(data: dict, source: _Source, path: Path | None, sha256: str) -> Case:
    top = _Table(source, data, "")
    top.check_keys(TOP_KEYS)
    title = top.get("title", lambda v: _text(v, nonempty=True), required="a title for the case")
    units = top.get("units", _units_label, default="mm")
    currency = top.get("currency", _text, default="")

    seen: dict = {}
    contributor_tables = top.array("contributor", header="contributor", at_least=1, at_most=MAX_CONTRIBUTORS)
    contributors = tuple(_read_contributor(item, seen) for item in contributor_tables)
    names = tuple(c.name for c in contributors)
    unknowns, closures = _read_loop(top, names)
    unknown_names = tuple(u.name for u in unknowns)
    seen = {}
    requirement_tables = top.array("requirement", header="requirement", at_least=1, at_most=MAX_CONTRIBUTORS)
    requirements = tuple(_read_requirement(item, seen, names, unknown_names) for item in requirement_tables)

    allocation = _read_allocation(top.sub("allocation"))
    if allocation.rounding == "iso286":
        _check_iso286_units(top, units, contributor_tables, contributors)

    case = Case(
        title=title,
        contributors=contributors,
        requirements=requirements,
        units=units,
        currency=currency,
        allocation=allocation,
        economics=_read_economics(top.sub("economics")),
        frontier=_read_frontier(top.sub("frontier"), requirements),
        path=path,
        sha256=sha256,
        offers=tuple(
            _read_offer(item, contributors)
            for item in top.array("offer", header="offer", at_least=0, at_most=MAX_CONTRIBUTORS)
        ),
        unknowns=unknowns,
        closures=closures,
    )
    if unknowns:  # the loop must close at the nominals (solved once, kept on the case)
        try:
            case.loop
        except ClosureError as err:
            top.fail("closure", str(err))
    # an expression must be finite and differentiable at the nominals to be analysed
    for table, requirement in zip(requirement_tables, requirements):
        if requirement.expression is not None:
            try:
                chain_module.linearise(case, requirement)
            except ExpressionError as err:
                table.fail("expression", str(err))
    return case


def _check_iso286_units(top: _Table, units: str, tables, contributors) -> None:
    """ISO 286 grades are tabulated in millimetres: the one place a units label is a scale.

    Every contributor that is rounded (not ``fixed``) needs a length unit: its own
    ``units``, else the case's; the error names the field that set the label.
    """
    from .grades import mm_per_unit

    for table, c in zip(tables, contributors):
        if c.fixed:
            continue
        label = units if c.units is None else c.units
        try:
            mm_per_unit(label)
        except ValueError:
            where, key = (top, "units") if c.units is None else (table, "units")
            where.fail(
                key,
                f'{label!r} cannot be converted to millimetres for rounding = "iso286" '
                "(use mm, m, um, μm, µm or in, or a numeric rounding step)",
            )


# a line that opens one more [[contributor]] / [[requirement]] table (spaces allowed)
_ARRAY_HEADER = re.compile(r"^[ \t]*\[\[[ \t]*(contributor|requirement)[ \t]*\]\]", re.MULTILINE)


def _count_headers(text: str, source: _Source) -> None:
    """Refuse too many [[contributor]] / [[requirement]] tables before parsing.

    tomllib builds the whole document first (10^6 contributor headers fit in 16 MB and
    take seconds and ~100 MB to parse); counting header lines is one cheap pass. The
    count is exact for ordinary files; the same limits are checked again after parsing.
    """
    if text.count("[[") <= MAX_CONTRIBUTORS:  # C-speed upper bound: the usual case
        return
    counts = {"contributor": 0, "requirement": 0}
    for match in _ARRAY_HEADER.finditer(text):
        counts[match.group(1)] += 1
    for key, count in counts.items():
        if count > MAX_CONTRIBUTORS:
            source.fail(key, f"too many entries ({count}; the limit is {MAX_CONTRIBUTORS})")


def _parse(text: str, source: _Source) -> dict:
    if not text.strip():
        source.fail(None, "file is empty")
    _count_headers(text, source)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        message = str(err)
        source.fail(None, f"not valid TOML: {message[:1].lower()}{message[1:]}")
    except RecursionError:
        source.fail(None, "not valid TOML: nested too deeply")
    if not data:
        source.fail(None, "file is empty (nothing but comments and blank lines)")
    return data


def _decode(data: bytes, source: _Source) -> str:
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as err:
        line = data.count(b"\n", 0, err.start) + 1
        source.fail(None, f"not UTF-8 text (invalid byte 0x{data[err.start]:02x} on line {line})")
    return text.removeprefix("\ufeff")  # tolerate a byte-order mark


def _read_capped(path: Path, size: int) -> bytes:
    """At most MAX_FILE_BYTES + 1 bytes of ``path`` whose size was ``size`` at stat time.

    Asks for ``size + 1`` bytes first: ``read(n)`` reserves ``n`` bytes up front, so
    asking for the cap every time would hold 16 MB for a 1 kB file. Only a file that grew
    since its stat (or a special file reporting size 0) is read on, up to the cap.
    """
    with open(path, "rb") as fh:
        data = fh.read(size + 1)
        if len(data) > size:
            data += fh.read(MAX_FILE_BYTES + 1 - len(data))
    return data


def _too_large(size: int) -> str:
    return (
        f"file is larger than {MAX_FILE_BYTES // 2**20} MB "
        f"({size / 2**20:.1f} MB); refusing to read it"
    )


def loads_case(text: str, *, source: str = "<string>", base_dir: str | os.PathLike | None = None) -> Case:
    """Validate case-file text and build a :class:`~allocator.model.Case`.

    Parameters
    ----------
    text : str
        The TOML text of a case.
    source : str, optional
        Name used for the file in error messages.
    base_dir : str or path-like, optional
        Folder in which ``cost.file`` tables are looked up. Without it, a case that
        refers to a CSV table is refused.

    Returns
    -------
    Case
        With ``path`` None and ``sha256`` the hash of ``text`` encoded as UTF-8.

    Raises
    ------
    CaseError
        One line ``"<source>: <field path>: <problem>"`` for any problem.
    """
    src = _Source(str(source), Path(base_dir) if base_dir is not None else None)
    if not isinstance(text, str):
        src.fail(None, f"case text must be a str (got {type(text).__name__})")
    data = text.encode("utf-8", errors="surrogatepass")
    if len(data) > MAX_FILE_BYTES:
        src.fail(None, _too_large(len(data)))
    return _build(_parse(text, src), src, None, hashlib.sha256(data).hexdigest())


def case_from_dict(
    data: dict,
    *,
    source: str = "<dict>",
    base_dir: str | os.PathLike | None = None,
    path: str | os.PathLike | None = None,
    sha256: str | None = None,
) -> Case:
    """Validate a case given as the dict a TOML case file parses to, and build it.

    The checks and messages are those of :func:`load_case`; other readers (a workbook,
    see :mod:`allocator.workbook`) build this dict and translate the field paths of a
    :class:`CaseError` into their own places.

    Parameters
    ----------
    data : dict
        As ``tomllib`` returns it: ``title``, ``contributor`` (a list of dicts) ...
    source : str, optional
        Name used for the file in error messages.
    base_dir : str or path-like, optional
        Folder in which ``cost.file`` tables are looked up (None: such tables are refused).
    path, sha256 : optional
        Recorded on the case (the file it came from and the hash of its bytes).

    Returns
    -------
    Case

    Raises
    ------
    CaseError
        One line ``"<source>: <field path>: <problem>"`` for any problem.
    """
    src = _Source(str(source), Path(base_dir) if base_dir is not None else None)
    if not isinstance(data, dict):
        src.fail(None, f"a case must be a table of keys (got {type(data).__name__})")
    return _build(data, src, Path(path) if path is not None else None, sha256)


def load_case(path: str | os.PathLike) -> Case:
    """Read, validate and build the case in ``path``.

    Parameters
    ----------
    path : str or path-like
        A TOML case file; ``cost.file`` tables are read relative to its folder.

    Returns
    -------
    Case
        With ``path`` the file's path and ``sha256`` the hash of its bytes.

    Raises
    ------
    CaseError
        One line ``"<path>: <field path>: <problem>"`` for any problem, including a
        missing or unreadable file, a file larger than 16 MB (refused before it is
        read), text that is not UTF-8 and text that is not TOML.

    Examples
    --------
    >>> case = load_case("cases/gearbox_end_play.toml")
    >>> case.names
    ('housing_depth', 'gasket', 'bearing_width', 'retaining_ring', 'spacer', 'cover_spigot')
    """
    file = Path(path)
    src = _Source(str(path), file.parent)
    try:
        if file.is_dir():
            src.fail(None, "is a folder, not a case file")
        size = file.stat().st_size
        if size > MAX_FILE_BYTES:
            src.fail(None, _too_large(size))
        data = _read_capped(file, size)
    except FileNotFoundError:
        src.fail(None, "file not found")
    except OSError as err:
        src.fail(None, f"cannot read the file ({(err.strerror or str(err)).lower()})")
    if len(data) > MAX_FILE_BYTES:  # grew while we looked, or a special file
        src.fail(None, _too_large(len(data)))
    text = _decode(data, src)
    return _build(_parse(text, src), src, file, hashlib.sha256(data).hexdigest())
