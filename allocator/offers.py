"""A supplier's offer during a negotiation: what it saves, where it breaks even.

An offer names one contributor, a ± tolerance the supplier holds and a price per part.
:func:`evaluate_offers` answers, per offer and stack model: the least assembly cost with
that part held at the offered tolerance and paid at the offered price, everything else
re-optimised; the least cost without the offer; the saving; the price at which the offer
stops saving (break-even); and the counter-offer, the tolerance at which the part's own
cost curve costs the offered price. Several offers are evaluated each alone, then all
together.

Every number comes from :func:`allocator.solve.allocate`. The held part is solved as a
part without a cost curve (its options keep their ranges and cp), so the allocation's
total is the cost of everything else and the offered price is added to it; with several
processes that can make the offered tolerance the discrete solver chooses among them on
the cost of the rest alone. See docs/offers.md.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import TYPE_CHECKING, Iterable, Mapping, Sequence

from . import status as _status
from .errors import UsageError, did_you_mean
from .model import Offer

if TYPE_CHECKING:
    import pandas as pd

    from .model import Case, Contributor

__all__ = [
    "Offer", "OfferResult", "OfferEvaluation", "evaluate_offers", "check_offers", "parse_offer",
    "tolerance_problem", "counter_offer",
]

# the row that holds every offer at once is named by its contributors joined with this
TOGETHER = " + "


# --------------------------------------------------------------------------- input


def parse_offer(text: str) -> Offer:
    """An offer written ``NAME=T@PRICE`` (the command line's ``--offer``).

    Parameters
    ----------
    text : str
        ``spacer=0.05@0.9``: contributor ``spacer`` at ± 0.05 for 0.9 per part.

    Returns
    -------
    Offer
        Names and ranges are checked later, against the case (:func:`evaluate_offers`).

    Raises
    ------
    UsageError
        Not of the form ``NAME=T@PRICE``, or T or PRICE not a number (one line, naming
        the offer).

    Examples
    --------
    >>> parse_offer("spacer=0.05@0.9")
    Offer(contributor='spacer', tolerance=0.05, price=0.9, note='')
    """
    raw = str(text)
    name, eq, rest = raw.partition("=")
    tolerance, at, price = rest.partition("@")
    name = name.strip()
    if not (eq and at and name):
        raise UsageError(f"offer {raw!r}: expected NAME=T@PRICE, e.g. --offer spacer=0.05@0.9")
    values = []
    for what, value in (("tolerance", tolerance), ("price", price)):
        try:
            number = float(value)
        except ValueError:
            raise UsageError(f"offer {raw!r}: {what} {value.strip()!r} is not a number") from None
        if not math.isfinite(number):
            raise UsageError(f"offer {raw!r}: {what} must be finite (got {value.strip()!r})")
        values.append(number)
    return Offer(contributor=name, tolerance=values[0], price=values[1])


def tolerance_problem(contributor: Contributor, tolerance: float) -> str | None:
    """Why ``contributor`` cannot be made to ± ``tolerance``, or None when it can.

    Parameters
    ----------
    contributor : allocator.model.Contributor
    tolerance : float
        ± tolerance [length].

    Returns
    -------
    str or None
        A problem such as ``"tolerance 0.3 is outside its limits [0.005, 0.2]"``; None when
        one of its options makes it (:meth:`~allocator.model.Contributor.options_holding`).

    Examples
    --------
    >>> from allocator.model import Contributor, CostCurve
    >>> part = Contributor("p", 10.0, 0.02, (0.005, 0.05), CostCurve("reciprocal", a=1.0, b=0.01))
    >>> tolerance_problem(part, 0.3)
    'tolerance 0.3 is outside its limits [0.005, 0.05]'
    >>> tolerance_problem(part, 0.03) is None
    True
    """
    t = float(tolerance)
    if not (math.isfinite(t) and t > 0):
        return f"tolerance must be > 0 (got {t:g})"
    if contributor.options_holding(t):
        return None
    options = contributor.options()
    covering = [p for p in options if p.limits[0] <= t <= p.limits[1]]
    if covering:  # inside a range, but only choose tables cover it and none lists it
        listed = "; ".join(
            (f"{p.name}: " if contributor.processes else "") + ", ".join(f"{x:g}" for x in p.cost.points_tolerance)
            for p in covering
        )
        return f"tolerance {t:g} is not one of the listed tolerances ({listed})"
    if contributor.processes:
        ranges = ", ".join(f"{p.name} [{p.limits[0]:g}, {p.limits[1]:g}]" for p in options)
        return f"tolerance {t:g} is outside the range of every process ({ranges})"
    lo, hi = options[0].limits
    if lo == hi:
        return f"tolerance {t:g} differs from ±{lo:g}, the only one it has (fixed, without limits)"
    return f"tolerance {t:g} is outside its limits [{lo:g}, {hi:g}]"


def _checked(case: Case, offer) -> Offer:
    """``offer`` (an Offer or ``NAME=T@PRICE`` text) checked against ``case``; UsageError naming it."""
    if not isinstance(offer, Offer):
        offer = parse_offer(offer)
    where = f"offer {offer.label!r}"
    if offer.contributor not in case.names:
        raise UsageError(f"{where}: unknown contributor {offer.contributor!r}{did_you_mean(offer.contributor, case.names)}")
    if not (math.isfinite(offer.price) and offer.price >= 0):
        raise UsageError(f"{where}: price must be a number >= 0 (got {offer.price:g})")
    problem = tolerance_problem(case.contributor(offer.contributor), offer.tolerance)
    if problem:
        raise UsageError(f"{where}: {problem}")
    return replace(offer, tolerance=float(offer.tolerance), price=float(offer.price))


def check_offers(case: Case, offers: Iterable[Offer | str] | None = None) -> tuple[Offer, ...]:
    """The offers to evaluate on ``case``, checked before any solve.

    Parameters
    ----------
    case : allocator.model.Case
    offers : iterable of Offer or str, optional
        :class:`~allocator.model.Offer` objects or ``"NAME=T@PRICE"`` texts; default the
        case's ``[[offer]]`` tables.

    Returns
    -------
    tuple of Offer

    Raises
    ------
    UsageError
        No offers; an offer naming no contributor of the case, with a price < 0 or a
        tolerance no option of the part makes (one line, naming the offer).
    """
    given = tuple(case.offers if offers is None else offers)
    if not given:
        raise UsageError("no offers: give one as NAME=T@PRICE (--offer), or [[offer]] tables in the case")
    return tuple(_checked(case, o) for o in given)


# --------------------------------------------------------------------------- counter-offer


def counter_offer(contributor: Contributor, price: float) -> tuple[float | None, str]:
    """The tolerance at which the part's own cost curve costs ``price`` per part.

    Parameters
    ----------
    contributor : allocator.model.Contributor
    price : float
        Offered price per part [currency].

    Returns
    -------
    tolerance : float or None
        The tightest ± tolerance [length] at which one of the contributor's options costs
        exactly ``price`` on its curve, inside that option's range; None when no option's
        curve takes that value in its range.
    note : str
        Which process gives it, or why there is none (the price is below the cost at the
        loosest limit, above the cost at the tightest one, or a ``choose`` table lists no
        tolerance at that cost: its tightest listed tolerance costing at most ``price``
        is named).

    Notes
    -----
    Every cost curve decreases in the tolerance, so on one option ``C(t) = price`` has at
    most one root, between the option's limits ``[lo, hi]`` exactly when
    ``C(hi) <= price <= C(lo)``; it is found by Brent's method (``scipy.optimize.brentq``).
    For a part with several processes the tightest of the roots is reported: the tightest
    tolerance the shop's own curves would make at the supplier's price, the tolerance to
    ask for at that price. Only listed tolerances exist on a ``choose`` table, so its
    counter-offer is a listed tolerance whose cost equals the price.

    Examples
    --------
    >>> from allocator.model import Contributor, CostCurve
    >>> part = Contributor("p", 10.0, 0.02, (0.005, 0.05), CostCurve("reciprocal", a=1.0, b=0.01))
    >>> t, note = counter_offer(part, 2.0)   # 1 + 0.01 / t = 2  ->  t = 0.01
    >>> round(t, 9), note
    (0.01, '')
    >>> counter_offer(part, 0.5)[0] is None
    True
    """
    from . import costs

    price = float(price)
    options = contributor.options()
    found, reasons, listed_under = [], [], []
    for p in options:
        label = f"process {p.name!r}: " if contributor.processes else ""
        if p.cost is None:
            reasons.append(f"{label}no cost curve in the case")
            continue
        lo, hi = p.limits
        if p.cost.is_discrete:
            x = [float(v) for v in p.cost.points_tolerance if lo <= v <= hi]
            y = [float(costs.cost_value(p.cost, v)) for v in x]
            exact = [v for v, c in zip(x, y) if math.isclose(c, price, rel_tol=1e-12, abs_tol=0.0)]
            if exact:
                found.append((min(exact), p.name))
                continue
            under = [v for v, c in zip(x, y) if c <= price]
            if under:
                listed_under.append(min(under))
            reasons.append(f"{label}a 'choose' table lists no tolerance costing exactly {price:g}")
            continue
        c_lo, c_hi = float(costs.cost_value(p.cost, lo)), float(costs.cost_value(p.cost, hi))
        if price > c_lo:
            reasons.append(f"{label}the price is above the curve's {c_lo:.6g} at its tightest ±{lo:g}")
        elif price < c_hi:
            reasons.append(f"{label}the price is below the curve's {c_hi:.6g} at its loosest ±{hi:g}")
        elif price == c_lo:
            found.append((lo, p.name))
        elif price == c_hi:
            found.append((hi, p.name))
        else:
            from scipy.optimize import brentq

            root = brentq(lambda t: float(costs.cost_value(p.cost, t)) - price, lo, hi, xtol=1e-15 * hi, rtol=1e-13)
            found.append((float(root), p.name))
    if found:
        t, name = min(found)
        return t, (f"on process {name!r}" if contributor.processes else "")
    note = "; ".join(reasons)
    if listed_under:
        note += f"; the tightest listed tolerance costing at most {price:g} is ±{min(listed_under):g}"
    return None, note


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class OfferResult:
    """One offer (or every offer at once) under one stack model.

    Attributes
    ----------
    contributor : str
        The offered contributor; for the row holding every offer at once their names
        joined by ``" + "``.
    tolerance : float or None
        Offered ± tolerance [length] (None on the row holding every offer).
    price : float or None
        Offered price per part [currency] (None on the row holding every offer).
    model : str
    status : str
        'optimal', 'infeasible' (the offer is too loose for a requirement even with
        every other part at its tightest; ``message`` names the requirement and by how
        much it is missed) or 'failed' (:mod:`allocator.status`).
    total_cost : float or None
        Least assembly cost with the offer [currency per assembly]: everything else
        re-optimised plus ``count · price``.
    baseline_cost : float or None
        Least assembly cost without the offer (the plain allocation) [currency].
    saving : float or None
        ``baseline_cost − total_cost`` [currency per assembly]; negative when the offer
        costs more than it saves.
    break_even_price : float or None
        The price per part at which ``saving`` is 0 [currency]; below it the offer
        saves. None on the row holding every offer.
    count : int or None
        Instances of the part per assembly (each pays the price).
    curve_unit_cost : float or None
        The part's own cost curve at the offered tolerance (cheapest option making it)
        [currency per part].
    counter_tolerance : float or None
        Tolerance at which the part's own curve costs the offered price [length]; see
        :func:`counter_offer`.
    counter_note : str
        Which process gives it, or why there is none.
    process : str
        Process making the held part in the re-optimised assembly ('' without processes).
    tolerances : dict
        Every contributor's ± tolerance in the re-optimised assembly [length].
    offers : tuple of Offer
        The offers this row holds.
    note : str
        The offer's note from the case file.
    message : str
    units : str
        Units label of the tolerances.
    """

    contributor: str
    tolerance: float | None
    price: float | None
    model: str
    status: str
    total_cost: float | None = None
    baseline_cost: float | None = None
    saving: float | None = None
    break_even_price: float | None = None
    count: int | None = None
    curve_unit_cost: float | None = None
    counter_tolerance: float | None = None
    counter_note: str = ""
    process: str = ""
    tolerances: Mapping[str, float] = field(default_factory=lambda: MappingProxyType({}))
    offers: tuple = ()
    note: str = ""
    message: str = ""
    units: str = ""

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal'."""
        return self.status == _status.OPTIMAL

    @property
    def together(self) -> bool:
        """True for the row that holds every offer at once."""
        return len(self.offers) > 1

    def to_dict(self) -> dict:
        """JSON-ready dict; the contract keys are contributor, tolerance, price, model,
        status, total_cost, baseline_cost, saving, break_even_price."""
        return {
            "contributor": self.contributor,
            "tolerance": self.tolerance,
            "price": self.price,
            "model": self.model,
            "status": self.status,
            "total_cost": self.total_cost,
            "baseline_cost": self.baseline_cost,
            "saving": self.saving,
            "break_even_price": self.break_even_price,
            "count": self.count,
            "curve_unit_cost": self.curve_unit_cost,
            "counter_tolerance": self.counter_tolerance,
            "counter_note": self.counter_note,
            "process": self.process,
            "together": self.together,
            "offers": [{"contributor": o.contributor, "tolerance": o.tolerance, "price": o.price} for o in self.offers],
            "tolerances": dict(self.tolerances),
            "note": self.note,
            "message": self.message,
            "units": self.units,
        }


_FRAME_COLUMNS = (
    "contributor", "tolerance", "price", "model", "status", "total_cost", "baseline_cost", "saving",
    "break_even_price", "count", "curve_unit_cost", "counter_tolerance", "counter_note", "process",
    "together", "note", "message", "units",
)


@dataclass(frozen=True)
class OfferEvaluation:
    """Result of :func:`evaluate_offers`.

    Attributes
    ----------
    status : str
        'optimal' (every row optimal), 'partial' (some offers feasible, some not),
        'infeasible' (no offer is feasible) or 'failed' (:mod:`allocator.status`).
    message : str
    models : tuple of str
    offers : tuple of Offer
    rows : tuple of OfferResult
        Per offer (in the order given) and model, then, with several offers for
        different contributors, the row holding every offer at once per model.
    baselines : dict
        Model -> the :class:`~allocator.solve.Allocation` without any offer.
    currency : str
    """

    status: str
    message: str
    models: tuple
    offers: tuple
    rows: tuple
    baselines: Mapping = field(default_factory=dict)
    currency: str = ""

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal' or 'partial' (some offer is feasible)."""
        return self.status in (_status.OPTIMAL, _status.PARTIAL)

    def row(self, contributor: str, model: str) -> OfferResult:
        """The first row for ``contributor`` (or the ``" + "``-joined names) and ``model``."""
        for r in self.rows:
            if r.contributor == contributor and r.model == model:
                return r
        raise KeyError((contributor, model))

    def to_dict(self) -> dict:
        """JSON-ready dict: status, message, currency and ``offers``, one entry per row."""
        return {
            "status": self.status,
            "message": self.message,
            "currency": self.currency,
            "offers": [r.to_dict() for r in self.rows],
        }

    def to_frame(self) -> pd.DataFrame:
        """One row per offer and model (pandas DataFrame)."""
        import pandas as pd

        rows = [{k: v for k, v in r.to_dict().items() if k in _FRAME_COLUMNS} for r in self.rows]
        return pd.DataFrame(rows, columns=list(_FRAME_COLUMNS))

    def _repr_html_(self) -> str:
        from .display import result_html

        return result_html(f"Offers: {self.status}", self.to_frame(), self.message)

    def __repr__(self) -> str:
        lines = [f"OfferEvaluation(status={self.status!r}, models={list(self.models)}, offers={len(self.offers)})"]
        for r in self.rows:
            saving = "" if r.saving is None else f" saving {r.saving:+.6g}"
            lines.append(f"  {r.contributor} [{r.model}]: {r.status}{saving}")
        return "\n".join(lines)


# --------------------------------------------------------------------------- evaluation


def _held_case(case: Case, held: Mapping[str, float]) -> Case:
    """``case`` with each held contributor made a part without a cost curve.

    Its options keep their ranges and cp (so its σ stays what the process gives) but
    lose their costs; only the options that can make the held tolerance stay. The
    allocation of the result, held at ``held``, then costs everything but these parts.
    """
    contributors = []
    for c in case.contributors:
        if c.name not in held:
            contributors.append(c)
            continue
        t = float(held[c.name])
        if c.processes:
            makers = c.options_holding(t)
            processes = tuple(replace(c.processes[k], cost=None) for k in makers)
            contributors.append(replace(c, fixed=False, tolerance=t, processes=processes, limits=None, cost=None))
        else:
            contributors.append(replace(c, fixed=False, tolerance=t, limits=(t, t), cost=None))
    return replace(case, contributors=tuple(contributors))


def _curve_unit_cost(contributor: Contributor, t: float) -> float | None:
    from . import costs

    k = contributor.cheapest_option_holding(t)
    if k is None:
        return None
    curve = contributor.options()[k].cost
    if curve is None:
        return None
    value = float(costs.cost_value(curve, t))
    return value if math.isfinite(value) else None


def _one_row(case, model, offers, baseline, counters, allocate) -> OfferResult:
    """The row holding ``offers`` (one, or several for different contributors) under ``model``."""
    held = {o.contributor: o.tolerance for o in offers}
    result = allocate(_held_case(case, held), model, fix=held)
    single = len(offers) == 1
    first = offers[0]
    c = case.contributor(first.contributor)
    common = dict(
        contributor=TOGETHER.join(o.contributor for o in offers),
        tolerance=first.tolerance if single else None,
        price=first.price if single else None,
        model=model,
        count=c.count if single else None,
        curve_unit_cost=_curve_unit_cost(c, first.tolerance) if single else None,
        counter_tolerance=counters[first][0] if single else None,
        counter_note=counters[first][1] if single else "",
        offers=tuple(offers),
        note=first.note if single else "",
        units=case.contributor_units(first.contributor),
    )
    what = f"offer {first.label}" if single else "the offers together"
    if not result.success:
        return OfferResult(**common, status=result.status, baseline_cost=baseline.total_cost,
                           message=f"{what}: {result.message}")
    paid = sum(case.contributor(o.contributor).count * o.price for o in offers)
    total = result.total_cost + paid
    process = result.processes.get(first.contributor, "") if single else ""
    tolerances = MappingProxyType({n: float(v) for n, v in result.tolerances.items()})
    if not baseline.success:
        return OfferResult(**common, status=baseline.status, total_cost=total, process=process, tolerances=tolerances,
                           message=f"{what}: no least cost without the offer to compare with: {baseline.message}")
    saving = baseline.total_cost - total
    # total is linear in the price: rest + count · price, so saving = count · (break-even − price)
    break_even = (baseline.total_cost - result.total_cost) / c.count if single else None
    if single:
        verdict = "saves" if saving > 0 else "costs"
        message = (f"{what} {verdict} {abs(saving):.6g} per assembly; it breaks even at {break_even:.6g} per part")
    else:
        message = f"{what} {'save' if saving > 0 else 'cost'} {abs(saving):.6g} per assembly"
    return OfferResult(**common, status=_status.OPTIMAL, total_cost=total, baseline_cost=baseline.total_cost,
                       saving=saving, break_even_price=break_even, process=process, tolerances=tolerances,
                       message=message)


def evaluate_offers(
    case: Case,
    offers: Iterable[Offer | str] | None = None,
    models: Sequence[str] | None = None,
) -> OfferEvaluation:
    """Least assembly cost with each supplier offer, the saving and the break-even price.

    Parameters
    ----------
    case : allocator.model.Case
    offers : iterable of Offer or str, optional
        :class:`~allocator.model.Offer` objects or ``"NAME=T@PRICE"`` texts; default the
        case's ``[[offer]]`` tables.
    models : sequence of str, optional
        Stack models; default the case's ``[allocation].models``.

    Returns
    -------
    OfferEvaluation
        Rows per offer and model (each alone), then, when several offers name different
        contributors, one row per model holding them all at once.

    Raises
    ------
    UsageError
        No offers; an unknown model; an offer naming no contributor of the case, with a
        price < 0, or a tolerance no option of the part makes (outside its limits or
        every process range, or not listed on a ``choose`` table). One line, naming the
        offer.

    Notes
    -----
    With part ``k`` held at ``T`` and priced at ``P`` per part (``n_k`` instances):
    ``total(P) = R(T) + n_k P``, where ``R(T)`` is the least cost of every other part
    subject to every requirement with ``t_k = T``. The baseline ``B`` is the plain least
    cost; ``saving = B − R(T) − n_k P`` is linear in ``P`` and vanishes at the
    break-even price ``P* = (B − R(T)) / n_k``. Since holding ``t_k = T`` restricts the
    plain problem, ``P* ≤ C_k(T)`` (the part's own curve at ``T``): an offer at the price
    the curve already gives never saves; its worth is the room ``T`` leaves the others
    (Chase, Greenwood, Loosli & Hauglund (1990), "Least cost tolerance allocation for
    mechanical assemblies with automated process selection", Manufacturing Review 3(1),
    49-59, for the allocation itself).

    Examples
    --------
    >>> import allocator
    >>> case = allocator.load_case("cases/gearbox_end_play.toml")
    >>> result = evaluate_offers(case, ["spacer=0.03@0.6"], models=["rss"])
    >>> row = result.rows[0]
    >>> row.status, bool(abs(row.saving - (row.break_even_price - 0.6)) < 1e-9)
    ('optimal', True)
    """
    from .solve import allocate
    from .solve.dispatch import check_model

    checked = check_offers(case, offers)
    models = tuple(dict.fromkeys(models or case.allocation.models))
    for m in models:
        check_model(m)
    counters = {o: counter_offer(case.contributor(o.contributor), o.price) for o in checked}
    baselines = {m: allocate(case, m) for m in models}
    rows = [_one_row(case, m, (o,), baselines[m], counters, allocate) for o in checked for m in models]
    names = [o.contributor for o in checked]
    together_note = ""
    if len(checked) > 1:
        if len(set(names)) == len(names):
            rows += [_one_row(case, m, checked, baselines[m], counters, allocate) for m in models]
        else:
            together_note = "; not evaluated together: some offers are for the same contributor"
    feasible = [r for r in rows if r.success]
    if len(feasible) == len(rows):
        status = _status.OPTIMAL
    elif feasible:
        status = _status.PARTIAL
    elif any(r.status == _status.INFEASIBLE for r in rows):
        status = _status.INFEASIBLE
    else:
        status = _status.FAILED
    message = {
        _status.OPTIMAL: "every offer evaluated",
        _status.PARTIAL: f"{len(rows) - len(feasible)} of {len(rows)} rows cannot be met or failed",
        _status.INFEASIBLE: "no offer is feasible",
        _status.FAILED: "no offer could be evaluated",
    }[status] + together_note
    return OfferEvaluation(
        status=status, message=message, models=models, offers=checked, rows=tuple(rows),
        baselines=MappingProxyType(baselines), currency=case.currency,
    )

