"""The economics of fallout: which fallout target costs least once scrap is paid for.

A tighter fallout target ``p`` [ppm] costs more to make (tighter tolerances) and less to
scrap (fewer assemblies outside the limits). With ``[economics] scrap_cost`` ``s`` (the
cost of one assembly outside the limits) the cost per assembly is

    ``K(p) = M(p) + s · p · 1e-6``

where ``M(p)`` is the least manufacturing cost per assembly that meets the target ``p``
under a statistical stack model (the allocation's optimum; every other requirement keeps
its own target). This module finds the ``p`` that minimises ``K`` and reports it next to
the requirement's current target, per assembly and, with ``[economics] volume``, per year.

This is a scrap-cost model: an assembly inside the limits costs nothing extra, one
outside costs ``s``. It is not a quadratic (Taguchi-style) loss function of the deviation
from nominal. The fallout is the one the statistical model predicts (normal response; for
the mean-shift model, with the mean at the worst place in its band; for the convolution
model, the exact fallout of the stated distributions there), so the result holds
only as far as that prediction does: stable, capable, centred processes.

Pure functions (:func:`scrap_cost_per_assembly`, :func:`cost_per_assembly`,
:func:`annual_cost`, :func:`minimise_log`) carry the arithmetic;
:func:`fallout_economics` runs the allocations through :class:`allocator.sweep.LimitSweep`
(one solver per model, re-solved with new targets, never rebuilt).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Callable, Sequence

import numpy as np
from numpy.typing import ArrayLike

from . import status as _status
from .errors import UsageError
from .model import Case
from .ppm import PER_MILLION, ppm_to_fraction
from .progress import progress_bar

if TYPE_CHECKING:  # pandas is imported where it is used
    import pandas as pd

__all__ = [
    "scrap_cost_per_assembly",
    "cost_per_assembly",
    "annual_cost",
    "minimise_log",
    "fallout_economics",
    "FalloutOptimum",
    "FalloutEconomics",
    "DEFAULT_BOUNDS",
]

DEFAULT_BOUNDS = (1e-3, 1e5)  # ppm: 1 in a billion to 10 %
SCAN_PER_DECADE = 6  # where the whole scan is one batched dual solve
SCAN_PER_DECADE_SLOW = 3  # where every scan point is a solver call of its own
REFINE_ESTIMATE = 20  # allocations after the scan, per model (for the progress estimate)
STATISTICAL = ("rss", "mean-shift", "convolution")


def scrap_cost_per_assembly(fallout_ppm: ArrayLike, scrap_cost: float) -> float | np.ndarray:
    """Expected scrap cost carried by one assembly.

    Parameters
    ----------
    fallout_ppm : float or array_like
        Fraction of assemblies outside the limits [ppm].
    scrap_cost : float
        Cost of one assembly outside the limits [currency].

    Returns
    -------
    float or numpy.ndarray
        ``scrap_cost · fallout_ppm · 1e-6`` [currency per assembly].

    Notes
    -----
    Every assembly outside the limits costs ``scrap_cost`` (scrap, rework or a field
    return, as the user prices it); every assembly inside costs nothing extra. The
    expectation per assembly is the cost times the probability of being outside.

    Examples
    --------
    >>> print(round(scrap_cost_per_assembly(100.0, 55.0), 6))  # 55 · 100 · 1e-6
    0.0055
    """
    return np.multiply(scrap_cost, ppm_to_fraction(np.asarray(fallout_ppm, dtype=float)))


def cost_per_assembly(
    manufacturing: ArrayLike, fallout_ppm: ArrayLike, scrap_cost: float
) -> float | np.ndarray:
    """Manufacturing plus expected scrap cost per assembly.

    Parameters
    ----------
    manufacturing : float or array_like
        Least manufacturing cost per assembly at the fallout target [currency].
    fallout_ppm : float or array_like
        The fallout target [ppm].
    scrap_cost : float
        Cost of one assembly outside the limits [currency].

    Returns
    -------
    float or numpy.ndarray
        ``K(p) = M(p) + s · p · 1e-6`` [currency per assembly].

    Notes
    -----
    At an interior minimum of ``K`` the marginal manufacturing saving of a looser target
    equals the marginal scrap cost: ``dM/dp = −s · 1e-6`` [currency/ppm].

    Examples
    --------
    >>> print(round(cost_per_assembly(7.5, 100.0, 55.0), 6))  # 7.5 + 55 · 100 · 1e-6
    7.5055
    """
    return np.add(manufacturing, scrap_cost_per_assembly(fallout_ppm, scrap_cost))


def annual_cost(per_assembly: ArrayLike, volume: float) -> float | np.ndarray:
    """Cost per year: per-assembly cost times assemblies per year (None without a volume).

    Examples
    --------
    >>> annual_cost(7.5055, 40000)
    300220.0
    """
    if volume is None or per_assembly is None:
        return None
    return float(per_assembly) * float(volume)


def minimise_log(
    func: Callable[[float], float], grid: ArrayLike, *, xatol: float = 1e-7
) -> tuple[float | None, float, np.ndarray]:
    """Minimise ``func`` over a positive 1-D interval: coarse scan, then Brent in log x.

    Parameters
    ----------
    func : callable
        ``func(x)`` [any]; ``inf`` or NaN where ``x`` is not allowed.
    grid : array_like
        Increasing positive scan points; the first and last are the bounds.
    xatol : float
        Absolute tolerance in ``ln x`` of the refinement.

    Returns
    -------
    (x, value, scan) : (float, float, numpy.ndarray)
        The minimiser (None when no scan point is finite), ``func`` there, and ``func`` at
        the grid points.

    Notes
    -----
    The scan picks the best grid point ``x_k``; :func:`scipy.optimize.minimize_scalar`
    (bounded Brent) then refines over ``[x_{k−1}, x_{k+1}]`` in ``ln x``. Points where
    ``func`` is not finite are kept out of the refinement bracket by shrinking it
    towards ``x_k``. A function with several separate minima is resolved only as
    finely as the grid.
    """
    from scipy import optimize

    grid = np.asarray(grid, dtype=float)
    scan = np.array([func(float(x)) for x in grid], dtype=float)
    finite = np.isfinite(scan)
    if not finite.any():
        return None, math.inf, scan
    k = int(np.nanargmin(np.where(finite, scan, np.nan)))
    lo = grid[k - 1] if k > 0 else grid[k]
    hi = grid[k + 1] if k + 1 < grid.size else grid[k]
    if k > 0 and not finite[k - 1]:
        lo = _finite_edge(func, grid[k - 1], grid[k])
    if k + 1 < grid.size and not finite[k + 1]:
        hi = _finite_edge(func, grid[k + 1], grid[k])
    best_x, best = float(grid[k]), float(scan[k])
    if hi > lo:
        res = optimize.minimize_scalar(
            lambda u: _finite_or_big(func(math.exp(u)), best),
            bounds=(math.log(lo), math.log(hi)),
            method="bounded",
            options={"xatol": xatol},
        )
        x = math.exp(float(res.x))
        value = func(x)
        if math.isfinite(value) and value <= best:
            best_x, best = x, value
        # the bounded method never evaluates the ends: a minimum at a bound is checked here
        for edge in (lo, hi):
            value = func(float(edge))
            if math.isfinite(value) and value < best:
                best_x, best = float(edge), value
    return best_x, best, scan


def _finite_or_big(value: float, reference: float) -> float:
    # outside the allowed region: a value larger than anything seen, never inf/NaN
    return value if math.isfinite(value) else abs(reference) * 10.0 + 1.0


def _finite_edge(func, bad: float, good: float) -> float:
    """The allowed end of ``[bad, good]`` (bisection in log x for where func turns finite)."""
    for _ in range(60):
        mid = math.sqrt(bad * good)
        if mid in (bad, good) or abs(math.log(good / bad)) < 1e-12:
            break
        if math.isfinite(func(mid)):
            good = mid
        else:
            bad = mid
    return good


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class FalloutOptimum:
    """The cheapest fallout target for one statistical model, and the current one
    (built complete by :func:`fallout_economics`, then never changed).

    Attributes
    ----------
    model : str
    status : str
        'optimal' (interior minimum, stationarity holds), 'boundary' (the minimum sits at
        the tightest target the tolerances can meet, at a search bound, or where every
        tolerance is already at its loosest), 'infeasible' (no target in the bounds can be
        met) or 'failed'.
    message : str
    optimal_ppm : float or None
        Fallout target that minimises cost per assembly [ppm].
    predicted_ppm : float or None
        Fallout the model predicts for that allocation (equals the target when it binds).
    manufacturing_cost, scrap_cost, total_cost : float or None
        Per assembly at the optimum [currency].
    annual_manufacturing, annual_scrap, annual_total : float or None
        Times ``volume`` [currency per year].
    current_ppm : float
        The requirement's own target [ppm].
    current_manufacturing, current_scrap, current_total, annual_current_total : float or None
        The same at the current target (least-cost allocation there).
    saving_per_assembly, annual_saving : float or None
        ``current_total − total_cost`` and per year.
    slope_shadow : float or None
        dM/dp at the optimum from the allocation's shadow price [currency/ppm].
    slope_numeric : float or None
        dM/dp by a central finite difference of re-solved allocations [currency/ppm].
    slope_expected : float
        ``−scrap_cost · 1e-6``: what both slopes equal at an interior optimum.
    curve_ppm, curve_manufacturing : tuple of float
        The coarse scan (for plots); NaN where the target cannot be met.
    """

    model: str
    status: str
    message: str
    current_ppm: float
    slope_expected: float
    optimal_ppm: float | None = None
    predicted_ppm: float | None = None
    manufacturing_cost: float | None = None
    scrap_cost: float | None = None
    total_cost: float | None = None
    annual_manufacturing: float | None = None
    annual_scrap: float | None = None
    annual_total: float | None = None
    current_manufacturing: float | None = None
    current_scrap: float | None = None
    current_total: float | None = None
    annual_current_total: float | None = None
    saving_per_assembly: float | None = None
    annual_saving: float | None = None
    slope_shadow: float | None = None
    slope_numeric: float | None = None
    curve_ppm: tuple = field(default=(), repr=False)
    curve_manufacturing: tuple = field(default=(), repr=False)

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal' or 'boundary' (:mod:`allocator.status`)."""
        return self.status in (_status.OPTIMAL, _status.BOUNDARY)

    def to_dict(self, *, curve: bool = False) -> dict:
        """JSON-ready dict of every field (the cost curve too when ``curve=True``)."""
        out = asdict(self)
        if not curve:
            out.pop("curve_ppm")
            out.pop("curve_manufacturing")
        else:
            out["curve_ppm"] = list(self.curve_ppm)
            out["curve_manufacturing"] = [None if not math.isfinite(x) else x for x in self.curve_manufacturing]
        return out


@dataclass(frozen=True)
class FalloutEconomics:
    """Cost-optimal fallout targets per statistical model for one requirement.

    Attributes
    ----------
    status : str
        'optimal' when every model has a result ('boundary' counts), 'infeasible' when no
        model can meet any target in the bounds, 'failed' otherwise.
    success : bool
    message : str
    requirement : str
    scrap_cost : float
        Cost of one assembly outside the limits [currency].
    volume : float or None
        Assemblies per year.
    current_ppm : float
        The requirement's target in the case [ppm].
    bounds : (float, float)
        Search interval of the target [ppm].
    results : tuple of FalloutOptimum
    notes : tuple of str
    """

    title: str
    currency: str
    requirement: str
    scrap_cost: float
    volume: float | None
    current_ppm: float
    bounds: tuple
    results: tuple
    notes: tuple = ()
    status: str = "optimal"
    message: str = ""

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal' (:mod:`allocator.status`)."""
        return self.status == _status.OPTIMAL

    def result(self, model: str) -> FalloutOptimum:
        """The optimum of ``model`` (KeyError if it was not solved)."""
        for r in self.results:
            if r.model == model:
                return r
        raise KeyError(model)

    def to_frame(self) -> pd.DataFrame:
        """One row per model: optimum, costs per assembly and per year, the check."""
        import pandas as pd

        return pd.DataFrame([r.to_dict() for r in self.results]).set_index("model")

    def _repr_html_(self) -> str:
        from .display import result_html

        return result_html(f"Fallout economics of {self.requirement}: {self.status}", self.to_frame(), self.message)

    def curve_frame(self) -> pd.DataFrame:
        """The coarse scan as a tidy frame: ppm, model, manufacturing, scrap, total."""
        import pandas as pd

        rows = []
        for r in self.results:
            for p, m in zip(r.curve_ppm, r.curve_manufacturing):
                scrap = float(scrap_cost_per_assembly(p, self.scrap_cost))
                rows.append({"ppm": p, "model": r.model, "manufacturing": m, "scrap": scrap,
                             "total": m + scrap})
        return pd.DataFrame(rows)

    def to_dict(self, *, curve: bool = False) -> dict:
        """JSON-ready dict: the requirement and one entry per model (curves when ``curve=True``)."""
        return {
            "requirement": self.requirement,
            "scrap_cost": self.scrap_cost,
            "volume": self.volume,
            "currency": self.currency,
            "current_ppm": self.current_ppm,
            "bounds_ppm": list(self.bounds),
            "status": self.status,
            "success": self.success,
            "message": self.message,
            "notes": list(self.notes),
            "models": [r.to_dict(curve=curve) for r in self.results],
        }

    def __repr__(self) -> str:
        parts = [
            f"{r.model}: {r.optimal_ppm:.4g} ppm, {r.total_cost:.6g}" if r.optimal_ppm is not None
            else f"{r.model}: {r.status}"
            for r in self.results
        ]
        return (f"FalloutEconomics(requirement={self.requirement!r}, scrap_cost={self.scrap_cost:g}, "
                f"status={self.status!r}, {'; '.join(parts)})")


# --------------------------------------------------------------------------- the search


def _economics_solver(case: Case, model: str):
    """The model's solver, unrounded: rounding makes M(p) a staircase with no slope."""
    from .solve import solver_for

    solver = solver_for(case, model)
    note = ""
    if case.allocation.rounding is not None and hasattr(solver, "unrounded_solver"):
        solver = solver.unrounded_solver()
        note = "the fallout economics use unrounded allocations (rounding makes cost a staircase in the target)"
    return solver, note


def fallout_economics(
    case: Case,
    *,
    requirement: str | None = None,
    models: Sequence[str] | None = None,
    scrap_cost: float | None = None,
    volume: float | None = None,
    bounds: tuple[float, float] = DEFAULT_BOUNDS,
    progress: bool = False,
) -> FalloutEconomics:
    """The fallout target that minimises manufacturing plus scrap cost per assembly.

    Parameters
    ----------
    case : Case
    requirement : str, optional
        Default: ``[frontier].requirement``, else the first requirement.
    models : sequence of str, optional
        Statistical models to use (worst case ignores the target and is left out).
        Default: the statistical models among ``[allocation].models``, else rss.
    scrap_cost : float, optional
        Cost of one assembly outside the limits [currency]; default
        ``[economics].scrap_cost``.
    volume : float, optional
        Assemblies per year; default ``[economics].volume``.
    bounds : (float, float)
        Search interval of the target [ppm], default 1e-3 .. 1e5.
    progress : bool
        Show a progress bar on stderr, with an estimate of the time left, updated after
        every allocation (the scan's points first, then the refinement's, whose number is
        estimated at :data:`REFINE_ESTIMATE` per model and grows when there are more).

    Returns
    -------
    FalloutEconomics

    Raises
    ------
    UsageError
        No scrap cost, unknown requirement or model, bad bounds.

    Notes
    -----
    Minimises ``K(p) = M(p) + s·p·1e-6`` (:func:`cost_per_assembly`) over ``ln p`` in
    ``bounds`` with :func:`minimise_log` (a scan of 6 points per decade, 3 where every
    point needs a solver call of its own, refined by bounded Brent). ``M(p)`` is the least-cost allocation with the requirement's target
    set to ``p`` (:class:`allocator.sweep.LimitSweep`). At an interior optimum
    ``dM/dp = −s·1e-6``; both the allocation's shadow price and a central finite
    difference of ``M`` are reported so that this can be checked.
    """
    from .sweep import LimitSweep, _resolve_models, _resolve_requirement

    req = _resolve_requirement(case, requirement)
    scrap = case.economics.scrap_cost if scrap_cost is None else scrap_cost
    if scrap is None:
        raise UsageError("the fallout economics need a scrap cost: set [economics] scrap_cost in the case")
    try:
        scrap = float(scrap)
    except (TypeError, ValueError):
        raise UsageError(f"scrap_cost must be a number (got {scrap!r})") from None
    if not (math.isfinite(scrap) and scrap >= 0):
        raise UsageError(f"scrap_cost must be a finite number >= 0 (got {scrap:g})")
    volume = case.economics.volume if volume is None else volume
    lo, hi = (float(b) for b in bounds)
    if not (0 < lo < hi < PER_MILLION):
        raise UsageError(f"bounds must satisfy 0 < from < to < 1000000 ppm (got {lo:g}, {hi:g})")

    notes = []
    if models is None:
        chosen = tuple(m for m in case.allocation.models if m in STATISTICAL) or ("rss",)
    else:
        chosen = _resolve_models(case, models)
        if "worst-case" in chosen:
            notes.append("worst case does not use the fallout target: left out of the economics")
        chosen = tuple(m for m in chosen if m in STATISTICAL)
        if not chosen:
            raise UsageError("the fallout economics need a statistical model (rss, mean-shift or convolution)")

    decades = math.log10(hi / lo)
    sweeps = []
    for model in chosen:
        solver, note = _economics_solver(case, model)
        if note and note not in notes:
            notes.append(note)
        sweep = LimitSweep(case, model, req.name, "fallout_ppm", solver=solver)
        density = SCAN_PER_DECADE if sweep.batch is not None else SCAN_PER_DECADE_SLOW
        sweeps.append((sweep, np.geomspace(lo, hi, max(int(round(decades * density)) + 1, 3))))
    planned = sum(grid.size + REFINE_ESTIMATE for _, grid in sweeps)
    bar = progress_bar(planned, desc="fallout economics", unit="allocation", enabled=progress,
                       slow=any(sweep.slow for sweep, _ in sweeps))
    results = []
    try:
        planned = 0
        for sweep, grid in sweeps:
            bar.describe(sweep.model)
            results.append(_optimise(sweep, grid, scrap, volume, float(req.target_ppm), (lo, hi), bar))
            planned += grid.size + REFINE_ESTIMATE
            if bar.done < planned:  # fewer refinement steps than estimated: drop the rest
                bar.grow(bar.done - planned)
                planned = bar.done
    finally:
        bar.close()

    statuses = [r.status for r in results]
    unmet = (_status.FAILED, _status.INFEASIBLE)
    if all(s == _status.INFEASIBLE for s in statuses):
        status = _status.INFEASIBLE
        message = results[0].message
    elif any(s in unmet for s in statuses):
        status = _status.FAILED
        message = "; ".join(f"{r.model}: {r.message}" for r in results if r.status in unmet)
    else:
        status = _status.OPTIMAL
        message = "; ".join(
            f"{r.model}: {r.optimal_ppm:.4g} ppm" + (" (boundary)" if r.status == _status.BOUNDARY else "")
            for r in results
        )
    return FalloutEconomics(
        title=case.title,
        currency=case.currency,
        requirement=req.name,
        scrap_cost=scrap,
        volume=volume,
        current_ppm=float(req.target_ppm),
        bounds=(lo, hi),
        results=tuple(results),
        notes=tuple(notes),
        status=status,
        message=message,
    )


def _optimise(sweep, grid, scrap, volume, current_ppm, bounds, bar=None) -> FalloutOptimum:
    """One model: scan, refine, check stationarity, compare with the current target.

    ``bar`` (see :func:`allocator.progress.progress_bar`) is told of every allocation.
    """
    expected = -scrap_cost_per_assembly(1.0, scrap)  # minus the scrap cost of one more ppm
    cache: dict[float, object] = {}
    tick = bar.update if bar is not None else (lambda k=1: None)

    def allocation(p: float):
        if p not in cache:
            cache[p] = sweep.solve(p)
            tick(1)
        return cache[p]

    # the scan reuses the sweep machinery (batched where the exact dual applies)
    points = sweep.sweep(grid, tick)
    manufacturing = np.array([np.nan if pt.total_cost is None else pt.total_cost for pt in points])
    failed = [pt.message for pt in points if pt.status == "failed"]

    def total(p: float) -> float:
        alloc = allocation(p)
        if alloc.status != "optimal" or alloc.total_cost is None:
            return math.inf
        return float(cost_per_assembly(alloc.total_cost, p, scrap))

    scan_lookup = dict(zip(grid.tolist(), manufacturing.tolist()))

    def total_scanned(p: float) -> float:
        m = scan_lookup.get(p)
        if m is not None:  # a scan point: already solved
            return float(cost_per_assembly(m, p, scrap)) if math.isfinite(m) else math.inf
        return total(p)

    common = dict(model=sweep.model, current_ppm=current_ppm, slope_expected=expected,
                  curve_ppm=tuple(grid.tolist()), curve_manufacturing=tuple(manufacturing.tolist()))
    current = allocation(current_ppm)
    at_current = {}
    if current.status == _status.OPTIMAL:
        current_scrap = float(scrap_cost_per_assembly(current_ppm, scrap))
        current_total = current.total_cost + current_scrap
        at_current = dict(current_manufacturing=current.total_cost, current_scrap=current_scrap,
                          current_total=current_total, annual_current_total=annual_cost(current_total, volume))

    if not np.isfinite(manufacturing).any():
        message = failed[0] if failed else (
            f"no fallout target in [{bounds[0]:g}, {bounds[1]:g}] ppm can be met"
            + (f": {points[-1].message}" if points and points[-1].message else "")
        )
        return FalloutOptimum(status=_status.FAILED if failed else _status.INFEASIBLE, message=message,
                              **common, **at_current)

    p_opt, k_opt, _ = minimise_log(total_scanned, grid)
    alloc = allocation(p_opt)
    req_result = next(r for r in alloc.requirements if r.name == sweep.requirement)
    predicted = req_result.fallout_ppm
    manufacturing_cost = alloc.total_cost
    scrap_cost = float(scrap_cost_per_assembly(p_opt, scrap))
    total_cost = manufacturing_cost + scrap_cost
    optimum = dict(
        optimal_ppm=p_opt,
        predicted_ppm=predicted,
        manufacturing_cost=manufacturing_cost,
        scrap_cost=scrap_cost,
        total_cost=total_cost,
        annual_manufacturing=annual_cost(manufacturing_cost, volume),
        annual_scrap=annual_cost(scrap_cost, volume),
        annual_total=annual_cost(total_cost, volume),
        slope_shadow=req_result.shadow_ppm,
        slope_numeric=_slope(lambda p: allocation(p), p_opt),
    )
    if at_current:
        saving = at_current["current_total"] - total_cost
        optimum.update(saving_per_assembly=saving, annual_saving=annual_cost(saving, volume))

    # where does the optimum sit?
    at_bound = p_opt <= bounds[0] * (1 + 1e-6) or p_opt >= bounds[1] * (1 - 1e-6)
    tight_edge = not math.isfinite(total(p_opt * (1 - 1e-4)))
    slack = predicted < p_opt * (1 - 1e-6)  # the target does not bind
    status = _status.BOUNDARY
    if at_bound:
        message = f"the optimum sits at the search bound {p_opt:.4g} ppm"
    elif tight_edge:
        message = (f"the optimum sits at the tightest target the tolerances can meet ({p_opt:.4g} ppm): "
                   "scrap outweighs any saving from looser tolerances")
    elif slack:
        message = (f"the target does not bind at {p_opt:.4g} ppm (predicted {predicted:.4g} ppm): "
                   "a looser target buys nothing more")
    else:
        status = _status.OPTIMAL
        numeric = optimum["slope_numeric"]
        slope = numeric if numeric is not None else optimum["slope_shadow"]
        error = abs(slope - expected) / abs(expected) if expected else abs(slope)
        # in words: −dM/dp (manufacturing saved) against s·1e-6 (scrap added), per 1000 ppm
        balance = "the two balance" if error <= 1e-3 else f"they differ by {100 * error:.2g} %"
        message = (f"interior optimum: there each further 1000 ppm of fallout saves {-1000 * slope:.4g} "
                   f"of manufacturing cost per assembly and adds {-1000 * expected:.4g} of scrap cost; "
                   f"{balance}")
    return FalloutOptimum(status=status, message=message, **common, **at_current, **optimum)


def _slope(allocation, p: float, rel_step: float = 1e-4):
    """dM/dp by a central difference (one-sided where one neighbour cannot be met)."""
    h = rel_step * p
    up, down = allocation(p + h), allocation(p - h)
    mid = allocation(p)
    ok = lambda a: a.status == "optimal" and a.total_cost is not None  # noqa: E731
    if ok(up) and ok(down):
        return (up.total_cost - down.total_cost) / (2 * h)
    if ok(up) and ok(mid):
        return (up.total_cost - mid.total_cost) / h
    if ok(down) and ok(mid):
        return (mid.total_cost - down.total_cost) / h
    return None
