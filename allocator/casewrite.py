"""Writing a case back to TOML: the inverse of :mod:`allocator.case`.

Commands that derive a new case from data (``fit-costs --write``, ``capability --write``)
build a changed :class:`~allocator.model.Case` and write it with :func:`write_case`. The
text is made from the validated objects, not by editing the input file, so what is
written is exactly the case the library computes with: reading it back with
:func:`allocator.case.loads_case` gives an equal case (checked before anything is
written). Comments of the input are not carried over; a cost table read from a CSV file
is written inline (a copy in another folder would lose the file), and a value equal to
the contract's default is left out.

The TOML emitter covers what a case holds (text, numbers, booleans, lists of those,
inline tables, tables and arrays of tables). It is a few dozen lines, so the package
needs no TOML-writing dependency; tomllib (standard library) reads the result back.
"""

from __future__ import annotations

import math
import os
import re
from dataclasses import replace
from pathlib import Path
from typing import Iterable

from .costs import family
from .errors import InternalError
from .files import atomic_write, check_output_path
from .model import (
    DEFAULT_FALLOUT_PPM,
    AllocationSettings,
    Case,
    Contributor,
    CostCurve,
    FrontierSettings,
    Process,
    Requirement,
)

__all__ = ["case_data", "dumps_toml", "case_to_toml", "write_case"]

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+\Z")


# --------------------------------------------------------------------------- case -> data


def _curve_data(curve: CostCurve) -> dict:
    fam = family(curve.curve)
    out: dict = {"curve": curve.curve}
    if fam.piecewise:
        out["tolerance"] = list(curve.points_tolerance)
        out["cost"] = list(curve.points_cost)
        if curve.between != "interpolate":
            out["between"] = curve.between
        return out
    for p in fam.parameters:
        out[p.name] = float(getattr(curve, p.name))
    return out


def _process_data(p: Process) -> dict:
    out: dict = {"name": p.name, "limits": list(p.limits)}
    if p.cp is not None:
        out["cp"] = p.cp
    if p.cost is not None:
        out["cost"] = _curve_data(p.cost)
    return out


def _contributor_data(c: Contributor) -> dict:
    out: dict = {"name": c.name}
    if c.description:
        out["description"] = c.description
    out["nominal"] = c.nominal
    out["tolerance"] = c.tolerance
    if c.limits is not None and not c.processes:
        out["limits"] = list(c.limits)
    if c.distribution == "normal" and c.cp != 1.0:
        out["cp"] = c.cp
    if c.mean_shift:
        out["mean_shift"] = c.mean_shift
    if c.distribution != "normal":
        out["distribution"] = c.distribution
    if c.count != 1:
        out["count"] = c.count
    if c.fixed:
        out["fixed"] = True
    if c.units is not None:
        out["units"] = c.units
    if c.cost is not None and not c.processes:
        out["cost"] = _curve_data(c.cost)
    if c.processes:
        out["process"] = [_process_data(p) for p in c.processes]
    return out


def _requirement_data(r: Requirement) -> dict:
    out: dict = {"name": r.name}
    if r.chain is not None:
        out["chain"] = {name: float(coeff) for name, coeff in r.chain.items()}
    else:
        out["expression"] = r.expression
    if r.lower is not None:
        out["lower"] = r.lower
    if r.upper is not None:
        out["upper"] = r.upper
    if r.fallout_ppm != DEFAULT_FALLOUT_PPM:
        out["fallout_ppm"] = r.fallout_ppm
    if r.units is not None:
        out["units"] = r.units
    return out


def case_data(case: Case) -> dict:
    """The case as the nested dict a case file holds (defaults left out).

    Parameters
    ----------
    case : allocator.model.Case

    Returns
    -------
    dict
        Keys and values as in docs/case-file.md; :func:`dumps_toml` writes it.
    """
    out: dict = {"title": case.title, "units": case.units}
    if case.currency:
        out["currency"] = case.currency
    out["contributor"] = [_contributor_data(c) for c in case.contributors]
    out["requirement"] = [_requirement_data(r) for r in case.requirements]
    if case.allocation != AllocationSettings():
        allocation: dict = {"models": list(case.allocation.models)}
        if case.allocation.rounding is not None:
            allocation["rounding"] = case.allocation.rounding
        out["allocation"] = allocation
    economics = {k: v for k, v in (("volume", case.economics.volume),
                                   ("scrap_cost", case.economics.scrap_cost)) if v is not None}
    if economics:
        out["economics"] = economics
    if case.frontier != FrontierSettings():
        f = case.frontier
        frontier: dict = {}
        if f.requirement is not None:
            frontier["requirement"] = f.requirement
        frontier["vary"] = f.vary
        if f.range is not None:
            frontier["range"] = list(f.range)
        frontier["points"] = f.points
        out["frontier"] = frontier
    return out


# --------------------------------------------------------------------------- data -> TOML


def _key(key: str) -> str:
    return key if _BARE_KEY.match(key) else _string(key)


def _string(text: str) -> str:
    """A TOML basic string: backslash, quote and control characters escaped."""
    out = []
    for ch in text:
        if ch == "\\":
            out.append("\\\\")
        elif ch == '"':
            out.append('\\"')
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\t":
            out.append("\\t")
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04X}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ValueError(f"a case holds finite numbers only (got {value!r})")
        return repr(value)  # the shortest text that reads back as the same float
    if isinstance(value, str):
        return _string(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_value(v)}" for k, v in value.items()) + " }"
    raise TypeError(f"cannot write {type(value).__name__} to TOML")


def _is_table_array(value) -> bool:
    return isinstance(value, list) and bool(value) and all(isinstance(v, dict) for v in value)


def _table_body(data: dict, path: str, lines: list[str]) -> None:
    """Plain keys first (dicts inline), then arrays of tables and tables, each under its header."""
    nested = []
    for key, value in data.items():
        if _is_table_array(value) or (isinstance(value, dict) and not path):
            nested.append((key, value))
        else:
            lines.append(f"{_key(key)} = {_value(value)}")
    for key, value in nested:
        full = f"{path}.{_key(key)}" if path else _key(key)
        if isinstance(value, dict):
            lines.extend(["", f"[{full}]"])
            _table_body(value, full, lines)
        else:
            for item in value:
                lines.extend(["", f"[[{full}]]"])
                _table_body(item, full, lines)


def dumps_toml(data: dict, *, comment: str = "") -> str:
    """TOML text of ``data`` (a case's dict, see :func:`case_data`).

    Top-level dicts become ``[table]`` sections, lists of dicts ``[[array]]`` tables (also
    nested, ``[[contributor.process]]``); dicts below the top level are written inline.

    Parameters
    ----------
    data : dict
    comment : str, optional
        Lines written first, each as a ``#`` comment.

    Examples
    --------
    >>> print(dumps_toml({"title": "a \\"b\\"", "part": [{"x": 1.5, "cost": {"curve": "reciprocal"}}]}))
    title = "a \\"b\\""
    <BLANKLINE>
    [[part]]
    x = 1.5
    cost = { curve = "reciprocal" }
    <BLANKLINE>
    """
    lines = [f"# {line}".rstrip() for line in comment.splitlines()]
    if lines:
        lines.append("")
    _table_body(data, "", lines)
    return "\n".join(lines) + "\n"


def case_to_toml(case: Case, *, comment: str = "") -> str:
    """TOML text of a whole case; reading it back gives an equal case.

    Examples
    --------
    >>> from allocator.case import load_case, loads_case
    >>> case = load_case("cases/gearbox_end_play.toml")
    >>> again = loads_case(case_to_toml(case))
    >>> again.contributors == case.contributors and again.requirements == case.requirements
    True
    """
    return dumps_toml(case_data(case), comment=comment)


def _same_case(a: Case, b: Case) -> bool:
    return replace(a, path=None, sha256=None) == replace(b, path=None, sha256=None)


def write_case(
    case: Case,
    path: str | os.PathLike,
    *,
    comment: str = "",
    protect: Iterable[str | os.PathLike | None] = (),
) -> Path:
    """Write ``case`` to ``path`` atomically, never over an input.

    The text is read back with :func:`allocator.case.loads_case` first and must give the
    same case; only then is the file written (whole, through a temporary file).

    Parameters
    ----------
    case : allocator.model.Case
    path : str or path-like
        The new case file (.toml).
    comment : str, optional
        Comment lines at the top (where the case came from).
    protect : iterable of path
        Inputs never to overwrite (the source case and data files).

    Returns
    -------
    pathlib.Path

    Raises
    ------
    UsageError
        ``path`` is one of ``protect`` or its folder does not exist.
    """
    from .case import loads_case

    target = check_output_path(path, protect=protect, input_name="input file")
    text = case_to_toml(case, comment=comment)
    again = loads_case(text, source=str(target), base_dir=target.parent)
    if not _same_case(again, case):  # the emitter lost or changed something: a bug
        raise InternalError("writing the case", ValueError("the written text reads back as another case"))
    return atomic_write(target, text, protect=protect)
