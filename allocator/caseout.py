"""A case written back: the dict the case loader reads, its TOML text, and the file.

:func:`case_to_dict` is the inverse of the loader (:func:`allocator.case.case_from_dict`):
loading its output gives an equal :class:`~allocator.model.Case` (the file path and hash
aside). The text is made from the validated objects, not by editing an input file, so
what is written is exactly the case the library computes with. Values equal to the
loader's defaults are left out, so the text reads like a hand-written case; comments of
an input are not carried over; a cost table read from a CSV file (``file = "x.csv"``) is
written with its points inline, so the written case stands on its own (a copy in another
folder would lose the file).

Every command that writes a case (``convert``, ``fit-costs --write``, ``capability
--write``) goes through :func:`write_case`: the text is read back through the loader and
must give the same case before the file is written, whole, through a temporary file.

A section of the case file is one entry here: a ``[[name]]`` array of flat tables is a
line in :data:`_ARRAYS` (the key, the :class:`Case` attribute, the function that writes
one item and whether it goes before the requirements) and a line in :data:`WRITTEN_FIELDS`.
"""

from __future__ import annotations

import os
from dataclasses import replace
from pathlib import Path
from typing import Iterable

from .costs import family
from .model import (
    DEFAULT_FALLOUT_PPM,
    Case,
    Closure,
    Contributor,
    CostCurve,
    FrontierSettings,
    Offer,
    Process,
    Requirement,
    Unknown,
)

__all__ = ["case_to_dict", "cost_to_dict", "dumps_case", "write_case", "WRITTEN_FIELDS"]

# the fields of each model class that case_to_dict writes (or, for path and sha256, leaves
# out on purpose); tests/test_tomlout.py compares them with the classes, so a field added
# to the case format later cannot be dropped from a written case without notice
WRITTEN_FIELDS = {
    "Case": ("title", "contributors", "requirements", "units", "currency", "allocation", "economics",
             "frontier", "offers", "unknowns", "closures", "path", "sha256"),
    "Contributor": ("name", "nominal", "tolerance", "limits", "cost", "processes", "description", "cp",
                    "mean_shift", "distribution", "count", "fixed", "units"),
    "Process": ("name", "limits", "cost", "cp"),
    "Requirement": ("name", "chain", "expression", "lower", "upper", "fallout_ppm", "units"),
    "AllocationSettings": ("models", "rounding"),
    "Economics": ("volume", "scrap_cost"),
    "FrontierSettings": ("requirement", "vary", "range", "points"),
    "CostCurve": ("curve", "a", "b", "c", "k", "points_tolerance", "points_cost", "between"),
    "Offer": ("contributor", "tolerance", "price", "note"),
    "Unknown": ("name", "guess", "description"),
    "Closure": ("equation", "name"),
}


def case_to_dict(case: Case) -> dict:
    """The case as the TOML-shaped dict the loader validates.

    Parameters
    ----------
    case : Case

    Returns
    -------
    dict
        Keys as in a case file (``title``, ``contributor``, ``unknown``, ``closure``,
        ``requirement``, ``allocation`` ...); lists for ``limits`` and ``range``.

    Examples
    --------
    >>> from allocator.case import case_from_dict, load_case
    >>> case = load_case("cases/gearbox_end_play.toml")
    >>> again = case_from_dict(case_to_dict(case))
    >>> again.contributors == case.contributors, again.requirements == case.requirements
    (True, True)
    """
    out: dict = {"title": case.title, "units": case.units}
    if case.currency:
        out["currency"] = case.currency
    out["contributor"] = [_contributor(c) for c in case.contributors]
    _arrays(out, case, before_requirements=True)
    out["requirement"] = [_requirement(r) for r in case.requirements]
    allocation: dict = {"models": list(case.allocation.models)}
    if case.allocation.rounding is not None:
        allocation["rounding"] = case.allocation.rounding
    out["allocation"] = allocation
    economics = {k: v for k, v in (("volume", case.economics.volume), ("scrap_cost", case.economics.scrap_cost))
                 if v is not None}
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
    _arrays(out, case, before_requirements=False)
    return out


def _arrays(out: dict, case: Case, *, before_requirements: bool) -> None:
    """The case's arrays of flat tables (:data:`_ARRAYS`) that go at this place, if any."""
    for key, attribute, item, before in _ARRAYS:
        items = getattr(case, attribute)
        if items and before == before_requirements:
            out[key] = [item(x) for x in items]


def dumps_case(case: Case, *, comment: str = "") -> str:
    """The case as TOML text that loads to an equal case (see :func:`case_to_dict`).

    Parameters
    ----------
    case : Case
    comment : str, optional
        Lines written first, each as a ``#`` comment (where the case came from).

    Examples
    --------
    >>> from allocator.case import load_case
    >>> print(dumps_case(load_case("cases/divider_output.toml"), comment="a copy").splitlines()[0])
    # a copy
    """
    from .tomlout import dumps

    lines = [f"# {line}".rstrip() for line in comment.splitlines()]
    head = "\n".join(lines) + "\n\n" if lines else ""
    return head + dumps(case_to_dict(case))


def _bare(case: Case) -> Case:
    return replace(case, path=None, sha256=None)


def write_case(
    case: Case,
    path: str | os.PathLike,
    *,
    comment: str = "",
    protect: Iterable[str | os.PathLike | None] = (),
) -> Path:
    """Write ``case`` as a TOML case file, atomically and never over an input.

    The text is read back with :func:`allocator.case.loads_case` first and must give the
    same case (path and hash aside); only then is the file written, whole, through a
    temporary file.

    Parameters
    ----------
    case : Case
    path : str or path-like
        The new case file (.toml).
    comment : str, optional
        Comment lines at the top (where the case came from).
    protect : iterable of path
        Inputs never to overwrite (the source case and data files).

    Returns
    -------
    pathlib.Path
        ``path``, now holding the case.

    Raises
    ------
    UsageError
        ``path`` is one of ``protect`` or its folder does not exist.
    InternalError
        The text does not read back as the same case (a bug in the writer; nothing is written).
    """
    from .case import loads_case
    from .errors import CaseError, InternalError
    from .files import atomic_write, check_output_path

    target = check_output_path(path, protect=protect, input_name="input file")
    text = dumps_case(case, comment=comment)
    try:
        again = loads_case(text, source=str(target), base_dir=target.parent)
    except CaseError as err:
        raise InternalError("writing the case", err) from err
    if _bare(again) != _bare(case):
        raise InternalError("writing the case", ValueError("the written text reads back as another case"))
    return atomic_write(target, text, protect=protect)


def _contributor(c: Contributor) -> dict:
    d: dict = {"name": c.name}
    if c.description:
        d["description"] = c.description
    if c.units is not None:
        d["units"] = c.units
    d["nominal"] = c.nominal
    d["tolerance"] = c.tolerance
    if c.distribution != "normal":
        d["distribution"] = c.distribution
    elif c.cp != 1.0:
        d["cp"] = c.cp
    if c.mean_shift:
        d["mean_shift"] = c.mean_shift
    if c.count != 1:
        d["count"] = c.count
    if c.fixed:
        d["fixed"] = True
    if c.processes:
        d["process"] = [_process(p) for p in c.processes]
    else:
        _limits_and_cost(d, c.limits, c.cost)
    return d


def _process(p: Process) -> dict:
    d: dict = {"name": p.name}
    if p.cp is not None:
        d["cp"] = p.cp
    _limits_and_cost(d, p.limits, p.cost)
    return d


def _limits_and_cost(d: dict, limits, cost: CostCurve | None) -> None:
    """``limits`` and ``cost``; a table's limits only where they differ from its points."""
    implied = None
    if cost is not None and family(cost.curve).piecewise:
        implied = (cost.points_tolerance[0], cost.points_tolerance[-1])
    if limits is not None and tuple(limits) != implied:
        d["limits"] = list(limits)
    if cost is not None:
        d["cost"] = cost_to_dict(cost)


def cost_to_dict(cost: CostCurve) -> dict:
    """A cost curve as the case file's ``cost`` table (a table's points inline)."""
    fam = family(cost.curve)
    d: dict = {"curve": cost.curve}
    if fam.piecewise:
        if cost.between != "interpolate":
            d["between"] = cost.between
        d["tolerance"] = list(cost.points_tolerance)
        d["cost"] = list(cost.points_cost)
        return d
    for p in fam.parameters:
        d[p.name] = getattr(cost, p.name)
    return d


def _requirement(r: Requirement) -> dict:
    d: dict = {"name": r.name}
    if r.units is not None:
        d["units"] = r.units
    if r.chain is not None:
        d["chain"] = dict(r.chain)
    else:
        d["expression"] = r.expression
    if r.lower is not None:
        d["lower"] = r.lower
    if r.upper is not None:
        d["upper"] = r.upper
    if r.fallout_ppm != DEFAULT_FALLOUT_PPM:
        d["fallout_ppm"] = r.fallout_ppm
    return d


def _offer(o: Offer) -> dict:
    d: dict = {"contributor": o.contributor, "tolerance": o.tolerance, "price": o.price}
    if o.note:
        d["note"] = o.note
    return d


def _unknown(u: Unknown) -> dict:
    d: dict = {"name": u.name, "guess": u.guess}
    if u.description:
        d["description"] = u.description
    return d


def _closure(c: Closure) -> dict:
    d: dict = {"name": c.name} if c.name else {}
    d["equation"] = c.equation
    return d


# the case file's arrays of flat tables, in the order they are written: (key in the file,
# attribute of Case, the dict of one item, written before the requirements); the unknowns
# and closure equations go before the requirements that name the unknowns, as in
# docs/closure.md; a later section is one more line here (and one in WRITTEN_FIELDS)
_ARRAYS = (
    ("unknown", "unknowns", _unknown, True),
    ("closure", "closures", _closure, True),
    ("offer", "offers", _offer, False),
)
