"""What a looser tolerance on one part costs the rest of the assembly.

For a supplier talk the question is rarely "what is the optimum" but "if this supplier
could only hold a little less, what would that do to everybody else?". :func:`supplier_sheet`
answers it per contributor by re-solving the allocation with that contributor held one
step looser (``allocate(case, model, fix={name: looser})``) and comparing the result with
the optimum: the change of the total cost, the part of it saved on the contributor itself
and the part paid elsewhere, and which other tolerances had to tighten.

Every number comes from :func:`allocator.solve.allocate`; this module only chooses the
looser tolerance and takes differences of two allocations.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from . import status as _status
from .errors import UsageError, did_you_mean
from .model import MODELS

if TYPE_CHECKING:
    import pandas as pd

    from .model import Case, Contributor
    from .solve.result import Allocation

__all__ = ["DEFAULT_STEP", "Loosening", "SupplierSheet", "looser_tolerance", "supplier_sheet"]

DEFAULT_STEP = 0.10  # loosen by 10 % (then up to the case's rounding step)
# a tolerance counts as "tightened" when it drops by more than this fraction: well above
# the solvers' accuracy, well below any change a supplier would notice
CHANGE_FRACTION = 1e-4


def _loosest(contributor) -> float:
    """The largest achievable ± tolerance of a contributor over all its options [length]."""
    return max(p.limits[1] for p in contributor.options())


def _listed(contributor) -> np.ndarray | None:
    """The only tolerances that exist for a contributor whose options are all 'choose' tables."""
    options = contributor.options()
    if all(p.cost is not None and p.cost.is_discrete for p in options):
        return np.unique(np.concatenate([np.asarray(p.cost.points_tolerance, dtype=float) for p in options]))
    return None


def looser_tolerance(
    contributor: Contributor, tolerance: float, *, step: float = DEFAULT_STEP, rounding: float | str | None = None
) -> float | None:
    """The next looser ± tolerance to offer a supplier, or None when there is none.

    Parameters
    ----------
    contributor : allocator.model.Contributor
    tolerance : float
        The allocated ± tolerance [length].
    step : float
        Relative loosening, e.g. 0.10 for +10 % [-].
    rounding : float, str or None
        The case's ``[allocation].rounding``; a numeric step rounds the looser value up
        to the next multiple of it (an ``"iso286"`` rounding is not applied here).

    Returns
    -------
    float or None
        ``min(t·(1 + step) rounded up to the rounding step, loosest)`` [length], moved up
        to the next value an option can make when it falls between the ranges of the
        processes (or between the listed tolerances of a ``choose`` table there); for a
        contributor whose tolerances come from ``choose`` tables only, the next listed
        tolerance above ``t``. None when ``t`` already is the loosest achievable value.

    Examples
    --------
    >>> from allocator.model import Contributor
    >>> part = Contributor(name="p", nominal=10.0, tolerance=0.02, limits=(0.005, 0.05))
    >>> looser_tolerance(part, 0.02, rounding=0.001)
    0.022
    >>> looser_tolerance(part, 0.05) is None
    True
    """
    t = float(tolerance)
    listed = _listed(contributor)
    if listed is not None:
        above = listed[listed > t * (1.0 + 1e-9)]
        return float(above[0]) if above.size else None
    loosest = _loosest(contributor)
    if t >= loosest * (1.0 - 1e-9):
        return None
    looser = t * (1.0 + step)
    if isinstance(rounding, (int, float)) and not isinstance(rounding, bool) and rounding > 0:
        # up to the next multiple of the step that lies above t (tolerance against float noise)
        looser = math.ceil(looser / rounding - 1e-9) * rounding
        looser = round(looser, 12)
        if looser <= t:
            looser = t + rounding
    looser = float(min(looser, loosest))
    if not contributor.options_holding(looser):
        looser = _next_achievable(contributor, looser)
    return looser


def _next_achievable(contributor, t: float) -> float:
    """The least tolerance ≥ ``t`` one of the contributor's options can make [length].

    ``t`` is at most the loosest limit of some option, so there is one.
    """
    best = []
    for p in contributor.options():
        lo, hi = p.limits
        if p.cost is not None and p.cost.is_discrete:
            x = np.asarray(p.cost.points_tolerance, dtype=float)
            x = x[(x >= max(t, lo) * (1.0 - 1e-9)) & (x <= hi * (1.0 + 1e-9))]
            best.extend(x.tolist())
        elif t <= hi * (1.0 + 1e-9):
            best.append(max(t, lo))
    return float(min(best))


@dataclass(frozen=True)
class Loosening:
    """One contributor held one step looser, compared with the optimum.

    Attributes
    ----------
    contributor : str
    count : int
    tolerance : float
        ± tolerance at the optimum [length].
    unit_cost : float or None
        Unit cost at that tolerance [currency].
    bound : str
        Bound the optimum presses against ('tightest', 'loosest', 'fixed' or '').
    looser : float or None
        The ± tolerance tried (see :func:`looser_tolerance`) [length].
    status : str
        'optimal', 'infeasible' or 'failed' (the re-solve's status, see
        :mod:`allocator.status`); 'fixed' (held by the case) or 'at loosest' (nothing
        looser exists) when there was nothing to re-solve.
    total_cost_change : float or None
        Total cost with the looser tolerance minus the optimum's [currency per assembly];
        never negative up to solver accuracy, since the optimum was the least cost.
    own_change : float or None
        ``count · (unit cost at looser − unit cost at optimum)`` [currency per assembly]:
        usually negative, the saving on this part.
    elsewhere_change : float or None
        ``total_cost_change − own_change``: what the other parts cost more [currency].
    tightened : tuple of (name, from, to)
        Other contributors whose tolerance tightened, largest relative change first
        (each in its own contributor's units).
    message : str
    units : str
        Units label of ``tolerance`` and ``looser`` (the contributor's).
    """

    contributor: str
    count: int
    tolerance: float
    unit_cost: float | None
    bound: str
    looser: float | None
    status: str
    total_cost_change: float | None = None
    own_change: float | None = None
    elsewhere_change: float | None = None
    tightened: tuple = field(default=())
    message: str = ""
    units: str = ""

    def to_dict(self) -> dict:
        """JSON-ready dict of the row."""
        return {
            "contributor": self.contributor,
            "count": self.count,
            "tolerance": self.tolerance,
            "unit_cost": self.unit_cost,
            "bound": self.bound,
            "looser": self.looser,
            "status": self.status,
            "total_cost_change": self.total_cost_change,
            "own_change": self.own_change,
            "elsewhere_change": self.elsewhere_change,
            "tightened": [{"name": n, "from": a, "to": b} for n, a, b in self.tightened],
            "message": self.message,
            "units": self.units,
        }


@dataclass(frozen=True)
class SupplierSheet:
    """Result of :func:`supplier_sheet`.

    Attributes
    ----------
    model : str
    status : str
        'optimal' (every row computed), or the base allocation's status when that is
        not optimal (no rows then); see :mod:`allocator.status`.
    success : bool
    message : str
    step : float
        Relative loosening tried [-].
    base : Allocation
        The optimum every row is compared with.
    rows : list of Loosening
    """

    model: str
    status: str
    message: str
    step: float
    base: object
    rows: list

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal' (:mod:`allocator.status`)."""
        return self.status == _status.OPTIMAL

    def __getitem__(self, name: str) -> Loosening:
        for row in self.rows:
            if row.contributor == name:
                return row
        raise KeyError(name)

    def to_dict(self) -> dict:
        """JSON-ready dict: model, status, step and one entry per row."""
        return {
            "model": self.model,
            "status": self.status,
            "message": self.message,
            "step": self.step,
            "rows": [r.to_dict() for r in self.rows],
        }

    def to_frame(self) -> pd.DataFrame:
        """One row per contributor (pandas DataFrame); ``tightened`` as 'name ±a→±b' text."""
        import pandas as pd

        rows = []
        for r in self.rows:
            d = r.to_dict()
            d["tightened"] = "; ".join(f"{n} ±{a:.4g}→±{b:.4g}" for n, a, b in r.tightened)
            rows.append(d)
        columns = list(Loosening.__dataclass_fields__)
        return pd.DataFrame(rows, columns=columns).set_index("contributor")

    def _repr_html_(self) -> str:
        from .display import result_html

        return result_html(f"Supplier sheet {self.model}: {self.status}", self.to_frame(), self.message)

    def __repr__(self) -> str:
        lines = [f"SupplierSheet(model={self.model!r}, status={self.status!r}, step={self.step:g})"]
        for r in self.rows:
            change = "" if r.total_cost_change is None else f" total {r.total_cost_change:+.4g}"
            lines.append(f"  {r.contributor}: ±{r.tolerance:.4g} -> {r.looser} [{r.status}]{change}")
        return "\n".join(lines)


def supplier_sheet(case: Case, model: str, *, allocation: Allocation | None = None,
                   step: float = DEFAULT_STEP) -> SupplierSheet:
    """Per contributor: the cost elsewhere of loosening its allocated tolerance by one step.

    Parameters
    ----------
    case : allocator.model.Case
    model : {'worst-case', 'rss', 'mean-shift'}
    allocation : Allocation, optional
        The optimum for ``model`` (solved here when not given).
    step : float
        Relative loosening, > 0 [-] (see :func:`looser_tolerance`).

    Returns
    -------
    SupplierSheet

    Raises
    ------
    UsageError
        Unknown model, a step that is not > 0.

    Notes
    -----
    For contributor ``k`` with optimum ``t*`` and total cost ``C*``, the re-solve holds
    ``t_k = t'`` (one step looser) and minimises over the others, giving ``C'``. Reported:
    ``ΔC = C' − C* ≥ 0``, the own part ``n_k (c_k(t') − c_k(t*_k))`` and the rest
    ``ΔC − own``, the cost the other suppliers' tighter tolerances add. For a small step
    ``ΔC`` is second order in the step when ``t*_k`` is an interior optimum (the first-order
    terms cancel, a property of the Lagrange conditions) and first order when ``t*_k`` sits
    on its tightest limit.
    """
    from .solve import allocate

    if model not in MODELS:
        raise UsageError(f"unknown model {model!r}{did_you_mean(model, MODELS)} (choose from {', '.join(MODELS)})")
    if not step > 0:
        raise UsageError(f"step must be > 0 (got {step!r})")
    base = allocation if allocation is not None else allocate(case, model)
    if not base.success:
        return SupplierSheet(
            model=model,
            status=base.status,
            message=f"no optimum to compare with: {base.message}",
            step=step,
            base=base,
            rows=[],
        )
    names = list(case.names)
    t_base = base.tolerances
    unit_base = base.unit_cost
    bounds = base.active
    rows = []
    for c in case.contributors:
        t = float(t_base[c.name])
        unit = _maybe(unit_base[c.name])
        common = dict(contributor=c.name, count=c.count, tolerance=t, unit_cost=unit, bound=str(bounds[c.name]),
                      units=case.contributor_units(c.name))
        if c.fixed:
            rows.append(Loosening(**common, looser=None, status=_status.FIXED, message="held by the case"))
            continue
        looser = looser_tolerance(c, t, step=step, rounding=case.allocation.rounding)
        if looser is None:
            rows.append(
                Loosening(**common, looser=None, status=_status.AT_LOOSEST, message="already at its loosest achievable value")
            )
            continue
        # an exception here is a failure of the sheet, never a row: the looser value lies
        # inside the contributor's limits (and cost table), so the hold is always valid
        trial = allocate(case, model, fix={c.name: looser})
        if not trial.success:
            rows.append(Loosening(**common, looser=looser, status=trial.status, message=trial.message))
            continue
        delta = trial.cost_delta(base)
        own = c.count * (float(trial.unit_cost[c.name]) - unit) if unit is not None else None
        elsewhere = None if own is None else delta - own
        t_trial = trial.tolerances
        tightened = [
            (n, float(t_base[n]), float(t_trial[n]))
            for n in names
            if n != c.name and float(t_trial[n]) < float(t_base[n]) * (1.0 - CHANGE_FRACTION)
        ]
        tightened.sort(key=lambda item: item[2] / item[1])
        rows.append(
            Loosening(
                **common,
                looser=looser,
                status=_status.OPTIMAL,
                total_cost_change=delta,
                own_change=own,
                elsewhere_change=elsewhere,
                tightened=tuple(tightened),
                message=trial.message,
            )
        )
    return SupplierSheet(
        model=model,
        status=_status.OPTIMAL,
        message=f"each contributor loosened by one step ({step:.0%}, then the rounding step) and re-solved",
        step=step,
        base=base,
        rows=rows,
    )


def _maybe(x):
    x = float(x)
    return x if math.isfinite(x) else None
