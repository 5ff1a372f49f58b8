"""Trade-off frontier: the least cost of a design against one requirement's limit or target.

For each value of the swept quantity (the ``lower`` or ``upper`` limit, or the
``fallout_ppm`` target, of one requirement) and each stack model, the frontier holds the
least total cost per assembly of a complete allocation that meets every requirement with
that value in force. Reading it tells what a looser (or tighter) requirement is worth.

Work is reused across points; nothing is rebuilt or recompiled per point:

- every model gets one solver (:func:`allocator.solve.solver_for`) whose ``solve`` takes
  limit overrides: the compiled conic problem re-solves with new cvxpy Parameter values
  (DPP); the discrete solver keeps its candidates, its conic polish solvers and its
  mean-shift cuts (re-derived for each point's limits), starts each point from the
  previous point's process choice as the incumbent (a pruning cutoff for the lower-bound
  MILP) and from a grid that is fine only near the previous optimum. Every point is still
  re-checked and its lower bound proven to the same gap as a single allocation;
- the value of the case's own limit, when it is on the grid, is not solved twice;
- where the exact 1-D Lagrange dual applies (one requirement; worst case, rss, or mean
  shift without free mean shifts; formula or convex table cost curves), the whole sweep
  is one call of the same solver core a single allocation uses, with one right-hand side
  per point (:meth:`allocator.solve.exact.ExactAllocation.roots`): the minimisers
  ``t(λ)`` are evaluated on a (points × contributors) array and all roots in ``log λ``
  are found in lock step. Every point is then re-checked against the requirement in plain
  numpy, exactly as a single allocation is; a point that fails the check is solved again
  by the model's solver;
- under worst case the fallout target plays no part, so a fallout sweep solves worst case
  once and says that its cost is flat.

A value at which a model cannot meet the requirement is part of the frontier: its status
is ``'infeasible'`` and its cost None.
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import dataclass
from typing import TYPE_CHECKING, Callable, NamedTuple, Sequence

import numpy as np
from numpy.typing import ArrayLike

from .errors import UsageError, did_you_mean
from .model import MODELS, Case
from .ppm import PER_MILLION
from .progress import progress_bar

if TYPE_CHECKING:  # pandas is imported where it is used
    import pandas as pd

    from .solve.result import Allocation

__all__ = ["Frontier", "frontier", "LimitSweep", "VARY", "MAX_POINTS", "automatic_range"]

VARY = ("lower", "upper", "fallout_ppm")
MAX_POINTS = 2000
MIN_POINTS = 2
AUTO_FALLOUT_RANGE = (0.1, 10000.0)  # ppm: the span shown when nothing else is said
STATUSES = ("optimal", "partial", "infeasible", "failed")


def _g(x) -> str:
    return f"{x:.4g}"


# --------------------------------------------------------------------------- result


@dataclass(frozen=True, eq=False)
class Frontier:
    """Least cost per model at each value of one requirement's limit or fallout target.

    Built complete by :func:`frontier` and not changed afterwards. In a notebook it shows
    as a table: one row per value, a cost column per model and a saving column per
    statistical model (:meth:`to_wide`).

    Attributes
    ----------
    status : str
        'optimal' (every point solved and re-checked), 'partial' (some values cannot be
        met by some model; they are flagged), 'infeasible' (no value can be met by any
        model) or 'failed' (a solver gave no verified optimum at some point).
    success : bool
        ``status`` is 'optimal' or 'partial'.
    message : str
    title, currency : str
        From the case.
    units : str
        Units label of the swept requirement (its own ``units``, else the case's).
    requirement : str
    vary : str
        'lower', 'upper' or 'fallout_ppm'.
    values : numpy.ndarray
        The swept values, increasing [length or response] or [ppm].
    models : tuple of str
    costs : dict
        Model -> list of least total costs per assembly [currency] (None where the
        value cannot be met).
    statuses, messages : dict
        Model -> per-value allocation status ('optimal' | 'infeasible' | 'failed') and
        message ('' when optimal).
    solvers : dict
        Model -> how the sweep was solved.
    flat_models : tuple of str
        Models whose cost does not depend on the swept quantity (worst case in a fallout
        sweep).
    current : dict
        ``value`` (the case's own limit or target), ``total_cost`` (cost of the current
        tolerances, the current design) and ``optimal`` (model -> least cost at that
        value).
    range_source : str
        Where the values came from: 'values', 'argument', 'case' or 'automatic'.
    notes : tuple of str
        Things a reader should know (automatic range, flat models, fallbacks).
    elapsed : float
        Wall time of the sweep [s].
    solves : int
        Points solved one by one (the batched dual counts as one per model).
    """

    title: str
    units: str
    currency: str
    requirement: str
    vary: str
    values: np.ndarray
    models: tuple
    costs: dict
    statuses: dict
    messages: dict
    solvers: dict
    flat_models: tuple
    current: dict
    range_source: str
    notes: tuple
    elapsed: float
    solves: int
    status: str
    message: str

    def __post_init__(self):
        values = np.array(self.values, dtype=float)
        values.setflags(write=False)  # frozen like the rest
        object.__setattr__(self, "values", values)

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal' or 'partial' (:mod:`allocator.status`)."""
        return self.status in ("optimal", "partial")

    @property
    def points(self) -> list[dict]:
        """One dict per (value, model): ``value``, ``model``, ``total_cost``, ``status``."""
        out = []
        for i, value in enumerate(self.values):
            for model in self.models:
                out.append(
                    {
                        "value": float(value),
                        "model": model,
                        "total_cost": self.costs[model][i],
                        "status": self.statuses[model][i],
                    }
                )
        return out

    def savings(self, model: str) -> list:
        """Worst-case cost minus ``model``'s cost at each value (None where either is missing)."""
        if "worst-case" not in self.models or model == "worst-case":
            return [None] * len(self.values)
        base = self.costs["worst-case"]
        return [
            None if b is None or c is None else b - c for b, c in zip(base, self.costs[model])
        ]

    def rows(self) -> list[dict]:
        """Tidy rows: value, model, total_cost, status, saving over worst case (and in %)."""
        saving = {m: self.savings(m) for m in self.models}
        out = []
        for i, value in enumerate(self.values):
            base = self.costs["worst-case"][i] if "worst-case" in self.models else None
            for model in self.models:
                s = saving[model][i]
                out.append(
                    {
                        "value": float(value),
                        "model": model,
                        "total_cost": self.costs[model][i],
                        "status": self.statuses[model][i],
                        "saving_vs_worst_case": s,
                        "saving_percent": None if s is None or not base else 100.0 * s / base,
                    }
                )
        return out

    def to_frame(self) -> pd.DataFrame:
        """Tidy DataFrame: one row per (value, model)."""
        import pandas as pd

        frame = pd.DataFrame(self.rows())
        for column in ("total_cost", "saving_vs_worst_case", "saving_percent"):
            frame[column] = frame[column].astype(float)
        return frame

    def to_wide(self) -> pd.DataFrame:
        """One row per value, a cost column per model and a saving column per statistical model."""
        import pandas as pd

        data = {m: [np.nan if c is None else c for c in self.costs[m]] for m in self.models}
        if "worst-case" in self.models:
            for m in self.models:
                if m != "worst-case":
                    data[f"{m} saving"] = [np.nan if s is None else s for s in self.savings(m)]
        return pd.DataFrame(data, index=pd.Index(np.asarray(self.values, dtype=float), name=self.vary))

    def to_dict(self) -> dict:
        """JSON-ready: the contract's ``points`` plus the context to read them."""
        return {
            "requirement": self.requirement,
            "vary": self.vary,
            "units": self.units,
            "currency": self.currency,
            "status": self.status,
            "success": self.success,
            "message": self.message,
            "models": list(self.models),
            "flat_models": list(self.flat_models),
            "range_source": self.range_source,
            "notes": list(self.notes),
            "solvers": dict(self.solvers),
            "current": self.current,
            "points": [
                dict(p, saving_vs_worst_case=r["saving_vs_worst_case"])
                for p, r in zip(self.points, self.rows())
            ],
        }

    def _repr_html_(self) -> str:
        from .display import result_html

        heading = f"Frontier of '{self.requirement}' against its {self.vary}: {self.status}"
        return result_html(heading, self.to_wide(), self.message)

    def __repr__(self) -> str:
        span = f"[{_g(self.values[0])}, {_g(self.values[-1])}]" if len(self.values) else "[]"
        return (
            f"Frontier(requirement={self.requirement!r}, vary={self.vary!r}, values={span} "
            f"({len(self.values)} points), models={list(self.models)}, status={self.status!r}, "
            f"message={self.message!r})"
        )


# --------------------------------------------------------------------------- one model


def _exact(solver) -> bool:
    """True when ``solver`` is the exact 1-D dual (one requirement, separable model)."""
    from .solve.exact import ExactAllocation

    return isinstance(solver, ExactAllocation)


def _same_value(value, other):
    """Equal to 1e-12 (relative): a grid value that is the case's own limit but for rounding."""
    value = np.asarray(value, dtype=float)
    return np.abs(value - other) <= 1e-12 * np.maximum(np.abs(value), abs(other))


class _Point(NamedTuple):
    total_cost: float | None
    status: str
    message: str


class LimitSweep:
    """One stack model's least cost for many values of one requirement's limit or target.

    The model's solver is built once (:func:`allocator.solve.solver_for`) and re-solved with
    limit overrides; single-requirement separable problems are solved for all values at
    once by the exact dual's :meth:`~allocator.solve.exact.ExactAllocation.roots`.

    Parameters
    ----------
    case : Case
    model : str
    requirement : str
    vary : {'lower', 'upper', 'fallout_ppm'}
    solver : object, optional
        A solver with ``.solve(overrides)`` to use instead of ``solver_for(case, model)``.
    """

    def __init__(self, case: Case, model: str, requirement: str, vary: str, *, solver=None):
        from .solve import solver_for

        self.case = case
        self.model = model
        self.requirement = requirement
        self.vary = vary
        self.solver = solver if solver is not None else solver_for(case, model)
        # the arrays of the problem, for the cheap feasibility test (tightest tolerances)
        self.reference = getattr(self.solver, "problem", None) or getattr(self.solver, "reference", None)
        # the exact dual, when it is this model's solver, takes every point in one call
        self.batch = self.solver if _exact(self.solver) else None
        self.flat = model == "worst-case" and vary == "fallout_ppm"
        self.solves = 0
        self.fallbacks = 0
        self.kept = None  # the full allocation at the value ``sweep(..., keep=)`` asked for

    @property
    def method(self) -> str:
        """How each point is solved, in words (for the report and ``--verbose``)."""
        if self.flat:
            return "solved once (worst case does not use the fallout target)"
        if self.batch is not None:
            return "exact 1-D Lagrange dual, batched over the sweep"
        # said in words: the user never sees our class names
        name = type(self.solver).__name__
        return {
            "CompiledAllocation": "compiled conic problem re-solved with new parameters (DPP)",
            "ExactAllocation": "exact 1-D Lagrange dual, solved again at each value",
            "MeanShiftExact": "optimality conditions of the mean-shift model solved directly at each value",
            "MultiplierNewton": "Lagrange dual of all the requirements maximised by Newton at each value",
            "DiscreteAllocation": "mixed-integer choice (branch and bound with Lagrangian bounds, else MILP) "
                                  "solved again at each value from the last point's choice",
            "ConvolutionAllocation": "convex steps on the exact fallout, started at the rss or "
            "mean-shift optimum, at each value",
        }.get(name, "the model's own solver, run again at each value")

    @property
    def slow(self) -> bool:
        """True when each point is a mixed-integer solve of its own (seconds, not milliseconds)."""
        from .solve.discrete import DiscreteAllocation

        return not self.flat and self.batch is None and isinstance(self.solver, DiscreteAllocation)

    def overrides(self, value: float) -> dict:
        """The limit override ``{requirement: {vary: value}}`` for one swept value."""
        return {self.requirement: {self.vary: float(value)}}

    def solve(self, value: float) -> Allocation:
        """The full :class:`~allocator.solve.result.Allocation` at one value.

        A solver that raises an arithmetic error (overflow in a root search, say) gives a
        'failed' point naming the error, so one bad point does not lose the sweep.
        """
        from .solve.result import complete

        return complete(self._solve(value, brief=False))

    def _solve(self, value: float, brief: bool):
        """:meth:`solve`, or with ``brief`` the solver's :class:`~allocator.solve.result.Brief`
        where it gives one (a sweep's point needs its cost, status and message)."""
        self.solves += 1
        overrides = self.overrides(value)
        try:
            if brief and hasattr(self.solver, "solve_brief"):
                return self.solver.solve_brief(overrides)
            return self.solver.solve(overrides)
        except ArithmeticError as err:
            if self.reference is None:
                raise
            return self.reference.result(
                None,
                self.reference.limits(overrides),
                status="failed",
                message=f"the {self.model} solver raised {type(err).__name__} ({err}) at "
                f"{self.vary} = {float(value):.6g}",
                solver=type(self.solver).__name__,
            )

    def feasible(self, value: float) -> bool:
        """True when the tightest tolerances meet every requirement with this value."""
        if self.reference is not None and hasattr(self.reference, "diagnose"):
            ref = self.reference
            return ref.diagnose(ref.limits(self.overrides(value))) is None
        return self.solve(value).status != "infeasible"

    def sweep(
        self, values: ArrayLike, tick: Callable[[int], None] | None = None, *, keep: float | None = None
    ) -> list[_Point]:
        """Least cost at each value; ``tick(k)`` reports k more points done.

        Point by point, the values are solved in the order in which the requirement loosens
        (increasing for an upper limit or a fallout target, decreasing for a lower limit),
        one after the other on the same solver: the discrete solver starts each point from
        the previous one's choice and grid (see :class:`allocator.solve.discrete.DiscreteAllocation`).
        With ``keep``, the full allocation at that value (when it is one of ``values``, to
        1e-12 relative) is left in :attr:`kept`.
        """
        from .solve.result import complete

        values = np.asarray(values, dtype=float)
        tick = tick or (lambda k: None)
        self.kept = None
        if self.flat and values.size:
            alloc = self.solve(values[0])
            if keep is not None and np.any(_same_value(values, keep)):
                self.kept = alloc
            tick(values.size)
            return [self._point(alloc)] * values.size
        if self.batch is not None:
            return self._batched(values, tick)
        out: list[_Point | None] = [None] * values.size
        order = range(values.size - 1, -1, -1) if self.vary == "lower" else range(values.size)
        if hasattr(self.solver, "plan"):  # the discrete solver shares work across the points
            self.solver.plan([self.overrides(values[i]) for i in order])
        try:
            for i in order:
                kept = keep is not None and _same_value(values[i], keep)
                alloc = self._solve(values[i], brief=not kept)
                if kept:
                    self.kept = complete(alloc)
                out[i] = self._point(alloc)
                tick(1)
        finally:
            if hasattr(self.solver, "plan"):
                self.solver.plan(())  # later solves (the economics, say) are single ones again
        return out

    @staticmethod
    def _point(alloc) -> _Point:
        message = "" if alloc.status == "optimal" else alloc.message
        return _Point(alloc.total_cost, alloc.status, message)

    def _batched(self, values, tick) -> list[_Point]:
        exact = self.batch
        problem = exact.problem
        limits = [problem.limits(self.overrides(v)) for v in values]
        reasons = [problem.diagnose(lim) for lim in limits]
        todo = [i for i, r in enumerate(reasons) if r is None]
        rhs = [exact.dual.rhs(limits[i])[0][0] for i in todo]
        t_free = exact.roots(rhs)[0]
        self.solves += 1
        out: list[_Point | None] = [None] * len(values)
        for i, reason in enumerate(reasons):
            if reason is not None:
                out[i] = _Point(None, "infeasible", reason)
        rtol = problem._rtol()  # what a single allocation's re-check accepts
        for row, i in enumerate(todo):
            t = problem.full(t_free[row])
            if problem.feasible(t, limits[i], rtol=rtol):
                out[i] = _Point(problem.total_cost(t), "optimal", "")
            else:  # not verified: let the model's own solver decide this point
                self.fallbacks += 1
                out[i] = self._point(self.solve(values[i]))
        tick(len(values))
        return out


# --------------------------------------------------------------------------- settings


def _resolve_requirement(case: Case, requirement):
    names = [r.name for r in case.requirements]
    if requirement is None:
        requirement = case.frontier.requirement or names[0]
    if requirement not in names:
        raise UsageError(f"unknown requirement '{requirement}'{did_you_mean(requirement, names)}"
                         f" (the case has: {', '.join(names)})")
    return case.requirement(requirement)


def _resolve_vary(case: Case, req, vary):
    notes = []
    if vary is None:
        vary = case.frontier.vary
        if vary in ("lower", "upper") and getattr(req, vary) is None:
            other = "lower" if vary == "upper" else "upper"
            notes.append(f"requirement '{req.name}' has no {vary} limit: its {other} limit is swept")
            vary = other
    if vary not in VARY:
        raise UsageError(f"vary must be one of {', '.join(VARY)} (got {vary!r}){did_you_mean(vary, VARY)}")
    if vary in ("lower", "upper") and getattr(req, vary) is None:
        raise UsageError(f"requirement '{req.name}' has no {vary} limit to vary")
    return vary, notes


def _resolve_models(case: Case, models):
    if models is None or len(models) == 0:
        models = case.allocation.models
    if isinstance(models, str):
        models = (models,)
    for m in models:
        if m not in MODELS:
            raise UsageError(f"unknown model {m!r}{did_you_mean(m, MODELS)} (choose from {', '.join(MODELS)})")
    return tuple(m for m in MODELS if m in set(models))


def _check_points(points) -> int:
    if isinstance(points, bool) or not isinstance(points, (int, np.integer)):
        raise UsageError(f"points must be a whole number from {MIN_POINTS} to {MAX_POINTS} (got {points!r})")
    if not MIN_POINTS <= points <= MAX_POINTS:
        raise UsageError(f"points must be from {MIN_POINTS} to {MAX_POINTS} (got {points})")
    return int(points)


def _check_values(values, req, vary) -> np.ndarray:
    """Validated, sorted, de-duplicated values of the swept quantity."""
    try:
        arr = np.asarray(values, dtype=float).ravel()
    except (TypeError, ValueError):
        raise UsageError("values must be numbers") from None
    if arr.size == 0:
        raise UsageError("values must hold at least one number")
    if arr.size > MAX_POINTS:
        raise UsageError(f"at most {MAX_POINTS} values (got {arr.size})")
    if not np.all(np.isfinite(arr)):
        raise UsageError("values must be finite numbers")
    arr = np.unique(arr)
    _check_span(float(arr[0]), float(arr[-1]), req, vary, what="values")
    return arr


def _check_span(first: float, last: float, req, vary, *, what="range") -> None:
    if vary == "fallout_ppm":
        if not (first > 0 and last < PER_MILLION):
            raise UsageError(f"{what}: fallout_ppm values must be > 0 and < {PER_MILLION:.0f} "
                             f"(got {_g(first)} .. {_g(last)})")
    elif vary == "upper" and req.lower is not None and first <= req.lower:
        raise UsageError(f"{what}: upper values must stay above the lower limit {_g(req.lower)} "
                         f"of '{req.name}' (got {_g(first)})")
    elif vary == "lower" and req.upper is not None and last >= req.upper:
        raise UsageError(f"{what}: lower values must stay below the upper limit {_g(req.upper)} "
                         f"of '{req.name}' (got {_g(last)})")


def _check_range(span, req, vary) -> tuple[float, float]:
    try:
        first, last = (float(x) for x in span)
    except (TypeError, ValueError):
        raise UsageError(f"range must be two numbers [from, to] (got {span!r})") from None
    if not (math.isfinite(first) and math.isfinite(last)):
        raise UsageError(f"range must be finite (got {_g(first)}, {_g(last)})")
    if not first < last:
        raise UsageError(f"range must be increasing: from < to (got {_g(first)}, {_g(last)})")
    _check_span(first, last, req, vary)
    return first, last


def _nice(x: float, direction: str) -> float:
    """``x`` rounded to 3 significant digits, up ('up') or down ('down')."""
    if x == 0 or not math.isfinite(x):
        return x
    step = 10.0 ** (math.floor(math.log10(abs(x))) - 2)
    q = x / step
    # a hair of slack so that a value already on the grid stays where it is
    q = math.ceil(q - 1e-9) if direction == "up" else math.floor(q + 1e-9)
    return float(f"{q * step:.12g}")


def automatic_range(
    case: Case, requirement: str, vary: str, sweeps: Sequence[LimitSweep]
) -> tuple[tuple[float, float], str]:
    """A sensible sweep when neither the caller nor ``[frontier]`` gives one.

    fallout_ppm: 0.1 .. 10000 ppm. lower / upper: from the tightest value any of the
    models can meet (found by bisection on the tightest tolerances) to twice the current
    distance between nominal and limit (loosening direction).

    Returns
    -------
    ((from, to), note)
    """
    if vary == "fallout_ppm":
        lo, hi = AUTO_FALLOUT_RANGE
        return (lo, hi), f"range chosen automatically: {lo:g} .. {hi:g} ppm"
    from . import stack
    from .chain import linearise

    req = case.requirement(requirement)
    nominal = linearise(case, req).nominal
    sign = 1.0 if vary == "upper" else -1.0  # direction in which the limit loosens
    below, above = stack.room(nominal, req.lower, req.upper)
    slack = above if vary == "upper" else below  # room on the swept side
    if not slack > 0:  # the nominal sits on or beyond the limit: use the worst-case spread
        lin = linearise(case, req)
        slack = stack.worst_case_half_width(lin.sensitivity, case.counts, case.current_tolerances) or 1.0
    far = nominal + sign * 2.0 * slack
    other = req.lower if vary == "upper" else req.upper
    near = nominal if other is None else (max(nominal, other) if vary == "upper" else min(nominal, other))

    starts = []
    for sweep in sweeps:
        reach = far
        for _ in range(40):
            if sweep.feasible(reach):
                break
            reach = near + 2.0 * (reach - near)
        else:
            continue
        good, bad = reach, near  # bisection between a value that is met and one that is not
        for _ in range(60):
            mid = 0.5 * (good + bad)
            if mid in (good, bad) or abs(good - bad) <= 1e-9 * abs(slack):
                break
            if sweep.feasible(mid):
                good = mid
            else:
                bad = mid
        starts.append(good)
    if not starts:
        a, b = sorted((nominal + sign * 0.1 * slack, far))
        return (a, b), (
            f"range chosen automatically: {_g(a)} .. {_g(b)} (no model meets the requirement "
            f"at any {vary} limit: see the reason at each value)"
        )
    start = min(starts) if vary == "upper" else max(starts)
    start = _nice(start, "up" if vary == "upper" else "down")
    if sign * (far - start) <= 0:
        far = start + sign * slack
    far = _nice(far, "up" if vary == "upper" else "down")
    a, b = sorted((start, far))
    return (a, b), (
        f"range chosen automatically: {_g(a)} .. {_g(b)} (from the tightest {vary} limit a "
        f"model can meet to twice the current distance from the nominal)"
    )


# --------------------------------------------------------------------------- frontier


def frontier(
    case: Case,
    *,
    requirement: str | None = None,
    vary: str | None = None,
    values: Sequence[float] | None = None,
    span: tuple[float, float] | None = None,
    points: int | None = None,
    models: Sequence[str] | None = None,
    progress: bool = False,
    **renamed: object,
) -> Frontier:
    """Least cost per model against one requirement's limit or fallout target.

    Parameters
    ----------
    case : Case
    requirement : str, optional
        Default: ``[frontier].requirement``, else the case's first requirement.
    vary : {'lower', 'upper', 'fallout_ppm'}, optional
        Default: ``[frontier].vary`` ('upper'; 'lower' when the requirement has no upper).
    values : sequence of float, optional
        The values to solve at (sorted; overrides ``span`` and ``points``).
    span : (float, float), optional
        ``(from, to)``, from < to [length or response] or [ppm]: the range swept (the
        command line's ``--range``). Default: ``[frontier].range`` when it belongs to the
        same requirement and quantity, else :func:`automatic_range`. ``range=`` is the
        deprecated old name of this argument (a DeprecationWarning).
    points : int, optional
        2 .. 2000; default ``[frontier].points`` (25). Evenly spaced for limits,
        geometrically for fallout_ppm.
    models : sequence of str, optional
        Default: the case's ``[allocation].models``.
    progress : bool
        Show a progress bar on stderr, with an estimate of the time left, updated after
        every point of every model (:func:`allocator.progress.progress_bar`: drawn at once
        when points are mixed-integer solves, else only for sweeps that take over a second).

    Returns
    -------
    Frontier

    Raises
    ------
    UsageError
        Unknown requirement or model, a limit the requirement lacks, a range that is not
        increasing or leaves the valid span, points outside 2 .. 2000.

    Notes
    -----
    At each value ``v`` and model ``M`` the point is ``min Σ n_i C_i(t_i)`` subject to
    every requirement under ``M`` with the swept limit (or target) set to ``v``; the
    other limits keep the case's values. Loosening a limit enlarges the feasible set,
    so each model's curve is non-increasing in the loosening direction; and since
    rss ≤ mean shift ≤ worst case in spread for the same tolerances, the curves are
    ordered rss ≤ mean shift ≤ worst case at every value.

    Examples
    --------
    >>> from allocator.case import load_case
    >>> front = frontier(load_case("cases/gearbox_end_play.toml"), points=10)
    >>> len(front.values), front.models
    (10, ('worst-case', 'rss', 'mean-shift'))
    >>> costs = front.to_wide().dropna()  # NaN: a value that model cannot meet
    >>> bool((costs["rss"] <= costs["mean-shift"] + 1e-9).all())
    True
    >>> bool((costs["mean-shift"] <= costs["worst-case"] + 1e-9).all())
    True
    >>> bool((costs["rss"].diff().dropna() <= 1e-9).all())  # never dearer as the limit loosens
    True
    """
    started = time.perf_counter()
    req = _resolve_requirement(case, requirement)
    vary, notes = _resolve_vary(case, req, vary)
    models = _resolve_models(case, models)
    if points is None:
        points = case.frontier.points
    points = _check_points(points)
    span = _renamed_span(span, renamed)
    sweeps = [LimitSweep(case, m, req.name, vary) for m in models]

    if values is not None:
        grid = _check_values(values, req, vary)
        source = "values"
    else:
        setting = case.frontier
        same = (setting.requirement or case.requirements[0].name) == req.name and setting.vary == vary
        if span is not None:
            span, source = _check_range(span, req, vary), "argument"
        elif setting.range is not None and same:
            span, source = _check_range(setting.range, req, vary), "case"
        else:
            span, note = automatic_range(case, req.name, vary, sweeps)
            source = "automatic"
            notes.append(note)
        if vary == "fallout_ppm":
            grid = np.geomspace(span[0], span[1], points)
        else:
            grid = np.linspace(span[0], span[1], points)

    # one step per point and model, and one per model for the current design (fewer when
    # the current value is on the grid)
    current_value = float(getattr(req, vary))
    bar = progress_bar(len(grid) * len(sweeps) + len(sweeps), desc="frontier", enabled=progress,
                       slow=any(s.slow for s in sweeps))
    current = {"value": current_value, "total_cost": None, "optimal": {}}
    try:
        results = {}
        for sweep in sweeps:
            bar.describe(sweep.model)
            results[sweep.model] = sweep.sweep(grid, bar.update, keep=current_value)
            alloc = sweep.kept if sweep.kept is not None else sweep.solve(current_value)
            bar.update(1)
            if current["total_cost"] is None and math.isfinite(alloc.current_cost):
                current["total_cost"] = alloc.current_cost
            current["optimal"][sweep.model] = alloc.total_cost
    finally:
        bar.close()

    flat = tuple(s.model for s in sweeps if s.flat)
    if flat:
        notes.append("worst case does not use the fallout target: its cost is flat across the sweep")
    for sweep in sweeps:
        if sweep.fallbacks:
            notes.append(f"{sweep.model}: {sweep.fallbacks} point(s) re-solved by the model's solver "
                         "after the batched dual's re-check")

    costs = {m: [p.total_cost for p in results[m]] for m in models}
    statuses = {m: [p.status for p in results[m]] for m in models}
    messages = {m: [p.message for p in results[m]] for m in models}
    status, message = _summary(grid, models, statuses, messages, vary)
    return Frontier(
        title=case.title,
        units=case.requirement_units(req.name),
        currency=case.currency,
        requirement=req.name,
        vary=vary,
        values=np.asarray(grid, dtype=float),
        models=models,
        costs=costs,
        statuses=statuses,
        messages=messages,
        solvers={s.model: s.method for s in sweeps},
        flat_models=flat,
        current=current,
        range_source=source,
        notes=tuple(notes),
        elapsed=time.perf_counter() - started,
        solves=sum(s.solves for s in sweeps),
        status=status,
        message=message,
    )


def _renamed_span(span, renamed: dict):
    """``span``, or the deprecated ``range=`` keyword (with a DeprecationWarning)."""
    unknown = sorted(set(renamed) - {"range"})
    if unknown:
        raise TypeError(f"frontier() got an unexpected keyword argument {unknown[0]!r}")
    if "range" not in renamed:
        return span
    warnings.warn("frontier(range=...) is deprecated; write frontier(span=...)", DeprecationWarning,
                  stacklevel=3)
    if span is not None:
        raise UsageError("give span or its deprecated name range, not both")
    return renamed["range"]


def _summary(values, models, statuses, messages, vary):
    n = len(values)
    failed = {m: [i for i, s in enumerate(statuses[m]) if s == "failed"] for m in models}
    bad = {m: [i for i, s in enumerate(statuses[m]) if s != "optimal"] for m in models}
    if any(failed.values()):
        parts = [f"{m} at {len(idx)} value(s), e.g. {_g(values[idx[0]])}: {messages[m][idx[0]]}"
                 for m, idx in failed.items() if idx]
        return "failed", "no verified optimum for " + "; ".join(parts)
    if all(len(bad[m]) == n for m in models):
        # the loosest value is the most telling: even there nothing works
        last = n - 1 if vary != "lower" else 0
        reason = messages[models[-1]][last] or messages[models[0]][last]
        return "infeasible", f"no model meets the requirement at any value; e.g. at {_g(values[last])}: {reason}"
    partial = [m for m in models if bad[m]]
    if partial:
        parts = []
        for m in partial:
            vals = [values[i] for i in bad[m]]
            lo, hi = _g(min(vals)), _g(max(vals))
            where = lo if lo == hi else f"{lo} .. {hi}"  # a range of one value is that value
            parts.append(f"{m} at {len(vals)} of {n} values ({where})")
        return "partial", "cannot be met by " + "; ".join(parts) + " (flagged 'infeasible')"
    return "optimal", f"{n} values x {len(models)} model(s), every point solved and re-checked"
