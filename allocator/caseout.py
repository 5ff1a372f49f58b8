"""A case written back: the dict the case loader reads, and its TOML text.

:func:`case_to_dict` is the inverse of the loader (:func:`allocator.case.case_from_dict`):
loading its output gives an equal :class:`~allocator.model.Case` (the file path and hash
aside). Values equal to the loader's defaults are left out, so the text reads like a
hand-written case; a cost table read from a CSV file (``file = "x.csv"``) is written
with its points inline, so the written case stands on its own.
"""

from __future__ import annotations

from .costs import family
from .model import DEFAULT_FALLOUT_PPM, Case, Contributor, CostCurve, FrontierSettings, Process, Requirement

__all__ = ["case_to_dict", "cost_to_dict", "dumps_case", "WRITTEN_FIELDS"]

# the fields of each model class that case_to_dict writes (or, for path and sha256, leaves
# out on purpose); tests/test_tomlout.py compares them with the classes, so a field added
# to the case format later cannot be dropped from a converted case without notice
WRITTEN_FIELDS = {
    "Case": ("title", "contributors", "requirements", "units", "currency", "allocation", "economics",
             "frontier", "path", "sha256"),
    "Contributor": ("name", "nominal", "tolerance", "limits", "cost", "processes", "description", "cp",
                    "mean_shift", "distribution", "count", "fixed", "units"),
    "Process": ("name", "limits", "cost", "cp"),
    "Requirement": ("name", "chain", "expression", "lower", "upper", "fallout_ppm", "units"),
    "AllocationSettings": ("models", "rounding"),
    "Economics": ("volume", "scrap_cost"),
    "FrontierSettings": ("requirement", "vary", "range", "points"),
    "CostCurve": ("curve", "a", "b", "c", "k", "points_tolerance", "points_cost", "between"),
}


def case_to_dict(case: Case) -> dict:
    """The case as the TOML-shaped dict the loader validates.

    Parameters
    ----------
    case : Case

    Returns
    -------
    dict
        Keys as in a case file (``title``, ``contributor``, ``requirement``,
        ``allocation`` ...); lists for ``limits`` and ``range``.

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
    return out


def dumps_case(case: Case) -> str:
    """The case as TOML text that loads to an equal case (see :func:`case_to_dict`)."""
    from .tomlout import dumps

    return dumps(case_to_dict(case))


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
