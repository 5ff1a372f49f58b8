"""Process selection, tabulated options and rounded tolerances: mixed-integer allocation.

A contributor may be made by one of several processes, may only take the tolerances a
``between = "choose"`` table lists, or (``[allocation].rounding``) only rounded values.
The allocation then chooses, per contributor, one *candidate* ``j``: a (process,
tolerance) pair with unit cost ``C_ij`` and σ/t factor ``f_ij`` (the process's cp). With
one-hot binaries ``x_ij`` (Chase, Greenwood, Loosli & Hauglund 1990):

.. math::

    \\min \\sum_i n_i \\sum_j C_{ij} x_{ij} \\quad\\text{s.t.}\\quad \\sum_j x_{ij} = 1,

- worst case: ``Σ_i n_i|a_i| Σ_j t_ij x_ij ≤ min(ȳ − L, U − ȳ)`` (linear);
- rss: ``Σ_i n_i a_i² Σ_j (f_ij t_ij)² x_ij ≤ σ_max²`` (variance is linear in a one-hot
  choice);
- mean shift: ``σ(x) ≤ g(δ(x))`` with ``δ = Σ n|a| m t x`` linear and ``g`` the largest σ
  with the mean anywhere in ``ȳ ± δ`` (decreasing in δ). Relaxed exactly-where-it-matters
  by one binary per interval of δ (``V ≤ g(δ_k)²`` on ``[δ_k, δ_(k+1)]``), then made exact
  by lazy cuts: solve, check the true constraint in numpy, add cuts that remove the
  violating choice and no feasible one, repeat (see :meth:`DiscreteAllocation._cuts`).
  A requirement whose δ no choice moves (no free contributor with a mean shift) is the
  rss row with ``σ_max = g(δ)``, as in the continuous solvers (``g(0)`` is rss's σ_max).

With one requirement that has limits, :mod:`.branch` solves the choice first, without a MILP:
branch and bound over the options with Lagrangian bounds (listed values exactly, continuous
processes polished by the conic solver, the gap proven by the bound); whatever it cannot
finish comes back here. Every MILP is solved by HiGHS (``scipy.optimize.milp``) to a proven
optimum (relative and absolute MIP gap 0). Each choice is re-checked in numpy against the exact constraint, and
the final answer again by :meth:`AllocationProblem.statistics
<allocator.solve.problem.AllocationProblem.statistics>`.

Continuous cost curves inside a process are discretised on a geometric grid (60 points
per process by default): the MILP over grid points picks the processes, and the conic
solver (:mod:`.continuous` or :mod:`.exact`) polishes the tolerances with those processes
held. A second MILP over grid *cells* gives a proven lower bound: in a cell the tolerance
is a continuous column and the cost is bounded below by a tangent (convex curves) or is
exact (tables, linear between their breakpoints); the variance uses a tangent of t² from
below. With one requirement a Lagrangian dual bound comes first (Everett 1963; Fisher
1981: for worst case and rss the requirement itself, for mean shift its tangent cut at the
incumbent, each priced by one multiplier, every contributor's least priced cost found
exactly); where a continuous part absorbs the slack it meets the gap target by itself and
no MILP is solved. Otherwise the cells around the polished incumbent are split before the
first MILP bound, which gets the incumbent's cost as a pruning cutoff; cells the bound
picks are split until the relative gap is below :data:`GAP_TARGET` or :data:`MAX_REFINE`
rounds have run. The gap is reported.

Re-solved with other limits (a frontier's points), a :class:`DiscreteAllocation` reuses
what stays valid: its last process choice as the first incumbent, a grid coarse away from
its last optimum, mean-shift tangent cuts re-derived for the new limits, the polish
solvers. Every answer is still re-checked and its lower bound proven as above.

References: Chase, K. W., Greenwood, W. H., Loosli, B. G. and Hauglund, L. F. (1990), Least
cost tolerance allocation for mechanical assemblies with automated process selection,
Manufacturing Review 3(1), 49-59. Huangfu, Q. and Hall, J. A. J. (2018), Parallelizing the
dual revised simplex method, Mathematical Programming Computation 10, 119-142 (HiGHS).
Duran, M. A. and Grossmann, I. E. (1986), An outer-approximation algorithm for a class of
mixed-integer nonlinear programs, Mathematical Programming 36, 307-339. Everett, H. (1963),
Generalized Lagrange multiplier method for solving problems of optimum allocation of
resources, Operations Research 11(3), 399-417. Fisher, M. L. (1981), The Lagrangian
relaxation method for solving integer programming problems, Management Science 27(1), 1-18.
"""

from __future__ import annotations

import contextlib
import math
import os
import sys
import warnings
from dataclasses import dataclass, field, replace

import numpy as np

from .. import costs, stack
from ..errors import CaseError, UsageError
from ..model import MODELS, Case
from .dispatch import continuous_solver, continuous_solver_for, needs_discrete
from .rounding import describe as describe_rounding
from .rounding import iso286_values, no_value_problem, step_values
from .problem import (
    FALLOUT_RTOL,
    WORST_CASE_RTOL,
    AllocationProblem,
    check_fix_values,
    cheapest_unit_cost,
    RequirementLimits,
    mean_shift_allowance,
    prepare,
)
from .result import Brief, complete

__all__ = [
    "DiscreteAllocation",
    "solver_for",
    "allocate_discrete",
    "needs_discrete",
    "GRID_POINTS",
    "GAP_TARGET",
]

GRID_POINTS = 60  # geometric grid per continuous process
GAP_TARGET = 1e-5  # stop refining below this relative gap
MAX_REFINE = 8  # rounds of splitting the cells the lower bound picks
REFINE_SPLIT = 8  # a picked cell becomes this many
MAX_CUT_ROUNDS = 400  # MILP solves per lazy-cut loop
MAX_RELAXED_ROUNDS = 3  # cut rounds per lower-bound MILP (any count gives a valid bound)
DELTA_INTERVALS = 256  # most initial intervals of δ per mean-shift requirement (points MILP)
DELTA_INTERVALS_RELAXED = 32  # the same in the lower-bound MILP
CHECK_RTOL = 1e-9  # a choice meets a requirement within this (relative)
# g(δ) is concave for targets up to here (checked numerically in tests/test_discrete.py);
# above it only the combinatorial cuts are used, which need no concavity.
TANGENT_MAX_FALLOUT = 0.49
TIME_LIMIT = 600.0  # seconds per MILP solve
OBJECTIVE_SCALE = 1e3  # HiGHS's absolute tolerances are tuned for objectives of this size
CARRIED_CUTS = 24  # mean-shift tangent cuts a solve hands to the next (per requirement)
SWEEP_STRIDE = 6  # with a previous optimum, keep every 6th point of the plain grid ...
SWEEP_SPAN = 1.25  # ... and the plain grid within this factor of the last tolerance
PRIMED_POINTS = 8  # a sweep: a process choice met again has its roots solved for this many points
KEPT_POLISHERS = 64  # conic solvers kept per process choice for the polish
CUTOFF_SLACK = 1e-6  # a pruning cutoff sits this far (relative) above the known cost
# HiGHS options used with a cutoff (emptied, and no cutoff given, if the installed HiGHS
# lacks one of them)
_PRUNING_OPTIONS = {"mip_heuristic_run_rins": False, "mip_heuristic_run_rens": False}
SOLVER_NAME = "highs"

_SLACK = 1e-9


def _g(x: float) -> str:
    return f"{x:.4g}"


# --------------------------------------------------------------------------- options


@dataclass
class _Option:
    """One way of making contributor ``owner``: a process (or the contributor itself).

    ``kind`` is 'points' (only ``points`` exist: a choose table, rounded values or a held
    tolerance) or 'continuous' (any tolerance in ``limits``; the grid in ``grid``).
    """

    owner: int
    index: int  # position in Contributor.options()
    name: str
    limits: tuple[float, float]
    curve: object
    factor: float  # σ / t with this process's cp
    kind: str
    points: np.ndarray
    point_costs: np.ndarray
    labels: tuple[str, ...] = ()
    grid: np.ndarray | None = None

    def __post_init__(self):
        self.base_grid = self.grid


def _cost_at(curve, t):
    """Unit cost at ``t`` (array), or None where the curve does not define it."""
    if curve is None:
        return np.zeros_like(np.asarray(t, dtype=float))
    try:
        return np.asarray(costs.cost_value(curve, np.asarray(t, dtype=float)), dtype=float)
    except ValueError:
        return None


def _geometric_grid(lo: float, hi: float, points: int, curve) -> np.ndarray:
    grid = np.geomspace(lo, hi, max(int(points), 2))
    grid[0], grid[-1] = lo, hi
    x = np.empty(0) if curve is None else costs.family_of(curve).kinks(curve)
    if x.size:
        # breakpoints on the grid make the cost linear inside every cell, so its least
        # value in a cell is at an end (what the lower bound uses)
        grid = np.union1d(grid, x[(x > lo) & (x < hi)])
    return grid


# --------------------------------------------------------------------------- candidates


@dataclass
class _Candidates:
    """All (contributor, option, tolerance) candidates, sorted by contributor.

    A *point* is a tolerance the contributor can take: ``tolerance`` = ``value`` = it,
    ``unit_cost`` its cost of one part. A lower-bound *cell* ``[t_lo, t_hi]`` of a
    continuous process stands for any tolerance inside it: ``tolerance`` = t_lo,
    ``value`` = t_hi, ``unit_cost`` the least cost in the cell, and the cost is bounded
    below by the tangent ``tangent_cost + cost_slope·(t − tangent)`` (exact for a table,
    which is linear inside a cell).
    """

    owner: np.ndarray
    option: np.ndarray  # index into the owner's options
    tolerance: np.ndarray
    value: np.ndarray
    unit_cost: np.ndarray
    factor: np.ndarray
    label: np.ndarray
    cell: np.ndarray  # bool
    tangent: np.ndarray
    tangent_cost: np.ndarray
    cost_slope: np.ndarray
    starts: np.ndarray  # first candidate of each contributor

    @property
    def size(self) -> int:
        return self.owner.size


_COLUMNS = ("owner", "option", "tolerance", "value", "unit_cost", "factor", "label", "cell",
            "tangent", "tangent_cost", "cost_slope")


def _assemble(parts: list[dict], n_contributors: int) -> _Candidates:
    owner = np.concatenate([p["owner"] for p in parts]).astype(int)
    order = np.argsort(owner, kind="stable")
    columns = {k: np.concatenate([p[k] for p in parts])[order] for k in _COLUMNS}
    columns["owner"] = owner[order]
    columns["option"] = columns["option"].astype(int)
    columns["cell"] = columns["cell"].astype(bool)
    return _Candidates(**columns, starts=np.searchsorted(columns["owner"], np.arange(n_contributors)))


# --------------------------------------------------------------------------- MILP


@dataclass
class _MilpOutcome:
    status: str  # 'optimal' | 'infeasible' | 'failed'
    choice: np.ndarray | None  # candidate index per contributor
    objective: float | None  # Σ n·cost at the choice [currency]
    bound: float | None  # proven lower bound on this MILP's optimum [currency]
    mip_gap: float | None
    solves: int
    nodes: int
    cuts: int
    message: str = ""
    tolerances: np.ndarray | None = None  # each contributor's tolerance at the choice


@dataclass
class _MilpModel:
    """One MILP over the candidates, before the cuts: columns, shares, objective, rows.

    Columns: a binary ``x`` per candidate, then a continuous ``y`` per lower-bound cell
    (``cells``: the candidates that are cells; the tolerance inside is ``t_hi·y``).
    ``unit_w``, ``unit_s``, ``unit_d``, ``unit_v`` (requirements × candidates) are the
    worst-case, σ, mean-shift and variance shares per unit tolerance (squared for
    ``unit_v``). The cost is ``constant + objective·z / scale`` [currency].
    """

    cand: "_Candidates"
    cells: np.ndarray
    point: np.ndarray
    t_hi: np.ndarray
    unit_w: np.ndarray
    unit_s: np.ndarray
    unit_d: np.ndarray
    unit_v: np.ndarray
    objective: np.ndarray | None = None
    constant: float = 0.0
    scale: float = 1.0
    base: "_Rows | None" = None
    checks: list = field(default_factory=list)  # (r, kind, bound, lim) per requirement with limits

    @property
    def n_tau(self) -> int:
        return int(self.cells.size)

    def linear(self, unit):
        """Row over [x, y] of Σ unit·t: t·x for points, t_hi·y for cells."""
        t = self.cand.tolerance
        return np.concatenate([np.where(self.point, unit * t, 0.0), unit[self.cells] * self.t_hi])

    def variance(self, unit):
        """Row over [x, y] of Σ unit·t²: exact for points, tangent at m for cells."""
        t, m = self.cand.tolerance, self.cand.tangent
        return np.concatenate([
            np.where(self.point, unit * t * t, -unit * m * m), 2.0 * unit[self.cells] * m[self.cells] * self.t_hi
        ])


class _Rows:
    """Sparse rows ``lo ≤ A x ≤ hi`` collected for scipy's milp."""

    def __init__(self, size: int):
        self.size = size
        self.indices, self.values, self.lower, self.upper = [], [], [], []

    def add(self, coef: np.ndarray, upper: float, lower: float = -np.inf, cols=None):
        coef = np.asarray(coef, dtype=float)
        cols = np.arange(coef.size) if cols is None else np.asarray(cols)
        keep = coef != 0
        self.indices.append(cols[keep])
        self.values.append(coef[keep])
        self.lower.append(lower)
        self.upper.append(upper)

    def copy(self) -> "_Rows":
        out = _Rows(self.size)
        out.indices, out.values = list(self.indices), list(self.values)
        out.lower, out.upper = list(self.lower), list(self.upper)
        return out

    def matrix(self):
        from scipy import sparse

        counts = np.array([i.size for i in self.indices])
        indptr = np.concatenate([[0], np.cumsum(counts)])
        data = np.concatenate(self.values) if self.values else np.zeros(0)
        idx = np.concatenate(self.indices).astype(int) if self.indices else np.zeros(0, int)
        a = sparse.csr_array((data, idx, indptr), shape=(len(self.indices), self.size))
        return a, np.array(self.lower, dtype=float), np.array(self.upper, dtype=float)


@contextlib.contextmanager
def _quiet_stdout():
    """Send file descriptor 1 to the null device while HiGHS runs.

    HiGHS writes a diagnostic line straight to the C-level stdout when it re-solves a
    presolved solution; solvers never print (and ``--json`` must stay one document).
    """
    try:
        fd = sys.stdout.fileno()
    except (AttributeError, OSError, ValueError):
        fd = 1
    sys.stdout.flush()
    try:
        saved = os.dup(fd)
    except OSError:
        yield
        return
    try:
        with open(os.devnull, "w") as null:
            os.dup2(null.fileno(), fd)
            try:
                yield
            finally:
                os.dup2(saved, fd)
    finally:
        os.close(saved)


def _row_norm(coef, rhs) -> float:
    """Divisor that makes a cut's right-hand side 1: HiGHS's feasibility tolerance is
    absolute (1e-7), so a violation is then measured relative to the allowance."""
    return float(rhs) if rhs > 0 else max(float(np.max(np.abs(coef))), 1e-300)


def _run_milp(objective, rows: _Rows, time_limit: float, integrality, upper, cutoff=None):
    """One HiGHS solve of ``min c·x``, ``0 ≤ x ≤ upper``, with ``rows``; scipy's result.

    ``cutoff`` (in the units of ``c·x``) is an objective value known to be at least the
    optimum (the cost of a verified solution): HiGHS then prunes every branch whose bound
    reaches it instead of searching for solutions there. It never changes the optimum.
    """
    try:
        import highspy  # HiGHS itself (a cvxpy dependency): scipy.optimize's import costs ~0.3 s
    except ImportError:
        highspy = None
    if highspy is not None and _HIGHSPY_USABLE:
        try:
            return _run_highspy(highspy, objective, rows, time_limit, integrality, upper, cutoff)
        except (AttributeError, TypeError):
            # a highspy whose Python interface moved (its names are less settled than scipy's):
            # the same HiGHS through scipy.optimize.milp from now on, never a crash
            _HIGHSPY_USABLE.clear()
    from scipy import optimize

    a, lo, hi = rows.matrix()
    options = {
        "mip_rel_gap": 0.0,
        "mip_abs_gap": 0.0,  # HiGHS stops at an absolute gap of 1e-6 by default
        "time_limit": float(time_limit),
        "presolve": True,
    }
    pruning = cutoff is not None and math.isfinite(cutoff) and _PRUNING_OPTIONS
    if pruning:
        # with a cutoff in hand the large-neighbourhood searches for better solutions
        # (RINS, RENS) cost more than they save; the optimum and the proof are unchanged
        options.update(_PRUNING_OPTIONS, objective_bound=float(cutoff))
    with warnings.catch_warnings(), _quiet_stdout():
        # scipy passes HiGHS options it does not list itself through verbatim, with a warning
        warnings.filterwarnings("ignore", message="Unrecognized options", category=RuntimeWarning)
        try:
            return optimize.milp(
                objective,
                integrality=integrality,
                bounds=optimize.Bounds(np.zeros(objective.size), upper),
                constraints=optimize.LinearConstraint(a, lo, hi),
                options=options,
            )
        except AttributeError:
            # a HiGHS (bundled with an older scipy) without one of the pruning options:
            # solve without them from now on
            if not pruning:
                raise
            _PRUNING_OPTIONS.clear()
    return _run_milp(objective, rows, time_limit, integrality, upper)


# emptied when the installed highspy's interface does not match (see _run_milp)
_HIGHSPY_USABLE = [True]
_HIGHS_STATUS = {"kOptimal": 0, "kTimeLimit": 1, "kIterationLimit": 1, "kSolutionLimit": 1,
                 "kInfeasible": 2, "kUnbounded": 3, "kUnboundedOrInfeasible": 3}


def _run_highspy(highspy, objective, rows: _Rows, time_limit: float, integrality, upper, cutoff=None):
    """:func:`_run_milp` through highspy, with scipy's result fields (``status`` 0 optimal,
    1 limit, 2 infeasible, 3 unbounded, 4 other; ``x`` None without a solution; ``fun``,
    ``mip_dual_bound``, ``mip_gap``, ``mip_node_count``, ``message``)."""
    from types import SimpleNamespace

    counts = np.array([i.size for i in rows.indices], dtype=int)
    start = np.concatenate([[0], np.cumsum(counts)]).astype(np.int32)
    index = (np.concatenate(rows.indices) if rows.indices else np.zeros(0)).astype(np.int32)
    value = np.concatenate(rows.values) if rows.values else np.zeros(0)
    lp = highspy.HighsLp()
    lp.num_col_, lp.num_row_ = int(objective.size), len(rows.indices)
    lp.col_cost_ = np.asarray(objective, dtype=float)
    lp.col_lower_ = np.zeros(objective.size)
    lp.col_upper_ = np.asarray(upper, dtype=float)
    lp.row_lower_ = np.array(rows.lower, dtype=float)
    lp.row_upper_ = np.array(rows.upper, dtype=float)
    lp.a_matrix_.format_ = highspy.MatrixFormat.kRowwise
    lp.a_matrix_.start_, lp.a_matrix_.index_, lp.a_matrix_.value_ = start, index, value
    lp.a_matrix_.num_col_, lp.a_matrix_.num_row_ = lp.num_col_, lp.num_row_
    kinds = (highspy.HighsVarType.kContinuous, highspy.HighsVarType.kInteger)
    lp.integrality_ = [kinds[int(k)] for k in np.asarray(integrality)]
    options = {"mip_rel_gap": 0.0, "mip_abs_gap": 0.0, "time_limit": float(time_limit), "presolve": "on",
               "output_flag": False}
    if cutoff is not None and math.isfinite(cutoff) and _PRUNING_OPTIONS:
        options.update(_PRUNING_OPTIONS, objective_bound=float(cutoff))
    with _quiet_stdout():
        h = highspy.Highs()
        for key, val in options.items():
            h.setOptionValue(key, val)
        h.passModel(lp)
        h.run()
    status = h.getModelStatus()
    name = str(status).split(".")[-1]
    info = h.getInfo()
    has_x = info.primal_solution_status == 2  # a feasible point
    x = np.array(h.getSolution().col_value, dtype=float) if has_x else None
    return SimpleNamespace(
        status=_HIGHS_STATUS.get(name, 4), x=x, fun=float(info.objective_function_value) if has_x else None,
        mip_dual_bound=float(info.mip_dual_bound), mip_gap=float(info.mip_gap),
        mip_node_count=int(info.mip_node_count), message=h.modelStatusToString(status),
    )


# --------------------------------------------------------------------------- Lagrangian


class _LagrangianTerms:
    """Per option, the least ``n C(t) + λ W t^m`` of :meth:`DiscreteAllocation._lagrangian`."""

    def __init__(self, solver, weight, m):
        """``weight(i, o)``: the constraint's coefficient W of contributor i with option o."""
        from .problem import CurveSet

        n = solver.counts
        self.m = m
        self.n_contributors = len(solver.options)
        self.owner, self.weight, self.lo, self.hi, self.opts = [], [], [], [], []
        formula, tables, free, points = [], [], [], []
        for i, opts in enumerate(solver.options):
            for o in opts:
                w = weight(i, o)
                k = len(self.owner)
                self.owner.append(i)
                self.weight.append(w)
                self.lo.append(o.limits[0] if o.kind == "continuous" else np.nan)
                self.hi.append(o.limits[1] if o.kind == "continuous" else np.nan)
                self.opts.append(o)
                if o.kind == "points":
                    points.append(k)
                elif o.curve is None:
                    free.append(k)
                elif costs.family_of(o.curve).piecewise:
                    tables.append(k)
                else:
                    formula.append(k)
        self.owner = np.array(self.owner, dtype=int)
        self.weight = np.array(self.weight, dtype=float)
        self.lo, self.hi = np.array(self.lo, dtype=float), np.array(self.hi, dtype=float)
        self.count = n[self.owner].astype(float)
        self.formula, self.free = np.array(formula, dtype=int), np.array(free, dtype=int)
        self.curves = CurveSet([self.opts[k].curve for k in formula])
        self.tables = []
        for k in tables:  # linear between breakpoints: those inside the limits, and the ends
            o = self.opts[k]
            x = np.asarray(costs.family_of(o.curve).kinks(o.curve), dtype=float)
            x = np.union1d(x[(x > o.limits[0]) & (x < o.limits[1])], o.limits)
            self.tables.append((k, x, np.nan_to_num(_cost_at(o.curve, x))))
        self.points = [(k, self.opts[k].points, np.nan_to_num(self.opts[k].point_costs)) for k in points]

    def scale(self, rhs) -> float:
        """Where to centre the search for the multiplier: one unit of cost per part per
        unit of the constraint (the search spans e^±60 around it)."""
        return float(np.sum(self.count)) / rhs

    def _per_option(self, lam):
        """(cost part n·C, constraint part W·t^m, t) of each option's minimiser."""
        size = self.owner.size
        cost, use, t = np.zeros(size), np.zeros(size), np.zeros(size)
        m, w, n = self.m, self.weight, self.count
        price = lam * w / n  # per unit of cost of one part
        if self.formula.size:
            from .exact import minimise_price

            k = self.formula
            t[k], ck = minimise_price(self.curves, price[k], self.lo[k], self.hi[k], m)
            cost[k] = n[k] * ck
        if self.free.size:
            k = self.free
            t[k] = np.where(w[k] > 0, self.lo[k], self.hi[k])
        for k, x, c in self.tables:
            cands, costs_ = [x], [c]
            if m == 2 and price[k] > 0:  # each piece: c0 + slope (t − x0) + price t²
                slope = np.diff(c) / np.diff(x)
                stat = np.clip(-slope / (2.0 * price[k]), x[:-1], x[1:])
                cands.append(stat)
                costs_.append(c[:-1] + slope * (stat - x[:-1]))
            xs, cs = np.concatenate(cands), np.concatenate(costs_)
            j = int(np.argmin(cs + price[k] * xs**m))
            t[k], cost[k] = xs[j], n[k] * cs[j]
        for k, x, c in self.points:
            j = int(np.argmin(c + price[k] * x**m))
            t[k], cost[k] = x[j], n[k] * c[j]
        use = w * t**m
        return cost, use, t

    def _best(self, lam):
        cost, use, t = self._per_option(lam)
        total = cost + lam * use
        order = np.lexsort((total, self.owner))
        starts = np.searchsorted(self.owner[order], np.arange(self.n_contributors))
        return order[starts], cost, use, t

    def value(self, lam):
        """(Σ_i min_o (n C + λ W t^m), Σ_i W t^m at those minimisers)."""
        pick, cost, use, _ = self._best(lam)
        return float(np.sum(cost[pick] + lam * use[pick])), float(np.sum(use[pick]))

    def slope(self, lam) -> float:
        return self.value(lam)[1]

    def magnitude(self, lam, rhs) -> float:
        pick, cost, use, _ = self._best(lam)
        return float(np.sum(np.abs(cost[pick]) + lam * use[pick]) + lam * rhs)

    def choice(self, lam):
        """The option and tolerance each contributor takes at ``lam``."""
        pick, _, _, t = self._best(lam)
        return [self.opts[k] for k in pick], t[pick]


# --------------------------------------------------------------------------- the solver


class DiscreteAllocation:
    """Least-cost choice of process and tolerance per contributor, for one stack model.

    Parameters
    ----------
    case : Case
    model : {'worst-case', 'rss', 'mean-shift'}
    fix : dict, optional
        Contributor name -> ± tolerance to hold [length]. A held contributor with several
        processes still has its process chosen (its cp and cost depend on it).
    grid_points : int
        Points of the geometric grid per continuous process (default 60).
    gap_target : float
        Stop refining the lower bound once ``(cost − bound) / cost`` is below this.
    rounding : float, 'iso286', None or 'case'
        Rounding of the allocated tolerances (default: the case's ``[allocation].rounding``).
    time_limit : float
        Seconds allowed per MILP solve.

    Raises
    ------
    UsageError
        Unknown model or ``fix`` entry.
    CaseError
        A contributor whose limits hold no rounded value (names the contributor).

    Examples
    --------
    >>> from allocator.case import load_case
    >>> case = load_case("cases/pump_shim.toml")
    >>> result = DiscreteAllocation(case, "rss").solve()
    >>> result.status, result.gap
    ('optimal', 0.0)
    >>> result.processes["body_depth"] in ("turning", "fine boring", "grinding")
    True
    >>> bool(result.rounding_cost >= 0.0)  # rounded tolerances never beat the unrounded optimum
    True
    """

    def __init__(self, case: Case, model: str, fix=None, *, grid_points: int = GRID_POINTS,
                 gap_target: float = GAP_TARGET, rounding="case", time_limit: float = TIME_LIMIT):
        if model not in MODELS:
            raise UsageError(f"unknown model {model!r} (choose from {', '.join(MODELS)})")
        self.case = case
        self.model = model
        self.fix = check_fix_values(case, fix)
        self.grid_points = int(grid_points)
        self.gap_target = float(gap_target)
        self.time_limit = float(time_limit)
        self.rounding = case.allocation.rounding if rounding == "case" else rounding
        self.counts = case.counts
        self.mean_shifts = case.mean_shifts
        self.options = [self._contributor_options(i, c) for i, c in enumerate(case.contributors)]
        # the tightest thing each contributor can do (for the infeasibility diagnosis)
        self.reference = AllocationProblem(self._tightest_case(), model, self.fix)
        self.requirements = self.reference.requirements
        self.sensitivity = (
            np.array([r.sensitivity for r in self.requirements], dtype=float)
            if self.requirements else np.zeros((0, len(case.contributors)))
        )
        # work that stays valid from one solve to the next (a sweep re-solves this object
        # with other limits): mean-shift tangent cuts as (u, δ*), to be re-derived for the
        # new limits; the conic solvers of the polish per process choice (they take the
        # limits as overrides); the solver of the unrounded problem
        self._tangent_points = {}
        self._polishers = {}
        self._unrounded = None
        self._last_choice = None  # (options, held tolerances) of the last polished optimum
        self._last_t = None  # its tolerances
        self._last_pick = None  # the branch and bound's last choice (entry per contributor)
        self._entries = None  # the branch and bound's entries (built by its first search)
        self._solve_unrounded = None  # this solve's unrounded optimum (with rounding)
        self._result_problems = {}  # chosen option indices -> AllocationProblem of the re-check
        self._baseline = None  # each contributor's current unit cost (limits play no part)
        self._plan = ()  # the limit overrides of a sweep's points still to come (see plan())
        self._primed = {}  # polisher key -> plan position up to which its roots are solved
        self._overrides = None  # this solve's overrides
        self._lambda_hint = None  # the branch and bound's last multiplier (its next bisection starts there)

    # ------------------------------------------------------------------ options

    def _held_value(self, c):
        if c.fixed:
            return c.tolerance
        return self.fix.get(c.name)

    def _contributor_options(self, i, c) -> list[_Option]:
        held = self._held_value(c)
        factor = lambda p: c.process_sigma_factor(p)  # noqa: E731
        options = []
        if held is not None:
            # held at t: one candidate (p, t) per option p that can make t, at p's cost
            # and with p's cp
            all_options = c.options()
            for k in c.options_holding(held):
                p = all_options[k]
                cost = _cost_at(p.cost, np.array([held]))
                options.append(_Option(i, k, p.name, p.limits, p.cost, factor(p), "points",
                                       np.array([held]), cost, ("",)))
            if not options:
                # a fixed part no option makes (a held `fix` value was refused by
                # check_fix_values): taken as it is, no cost and its own cp
                options.append(_Option(i, -1, "", (held, held), None, c.sigma_factor, "points",
                                       np.array([held]), np.zeros(1), ("",)))
            return options
        ranges = []
        for k, p in enumerate(c.options()):
            lo, hi = p.limits
            ranges.append((p.name, p.limits))
            curve = p.cost
            if curve is not None and curve.is_discrete:
                x = np.asarray(curve.points_tolerance, dtype=float)
                points = x[(x >= lo * (1 - _SLACK)) & (x <= hi * (1 + _SLACK))]
                labels = ("",) * points.size
            elif self.rounding is not None:
                points, labels = self._rounded(c, lo, hi)
            elif lo < hi:
                grid = _geometric_grid(lo, hi, self.grid_points, curve)
                options.append(_Option(i, k, p.name, p.limits, curve, factor(p), "continuous",
                                       np.zeros(0), np.zeros(0), (), grid))
                continue
            else:
                points, labels = np.array([lo]), ("",)
            if points.size == 0:
                continue
            options.append(_Option(i, k, p.name, p.limits, curve, factor(p), "points",
                                   points, _cost_at(curve, points), labels))
        if not options:
            problem = no_value_problem(
                self.rounding, c.nominal, self.case.contributor_units(c.name), ranges
            )
            raise CaseError(
                f"contributor '{c.name}': {problem}",
                file=str(self.case.path) if self.case.path is not None else None,
                field="allocation.rounding",
            )
        return options

    def _rounded(self, c, lo, hi):
        if self.rounding == "iso286":
            try:
                return iso286_values(c.nominal, self.case.contributor_units(c.name), lo, hi)
            except ValueError as err:
                raise CaseError(
                    f"contributor '{c.name}': {err}",
                    file=str(self.case.path) if self.case.path is not None else None,
                    field="allocation.rounding",
                ) from None
        return step_values(lo, hi, float(self.rounding))

    @property
    def has_continuous(self) -> bool:
        return any(o.kind == "continuous" for opts in self.options for o in opts)

    def candidates(self, cells: bool = False) -> _Candidates:
        """Points (or, with ``cells``, lower-bound grid cells) of every contributor."""
        parts = []
        for opts in self.options:
            for o in opts:
                if o.kind == "points":
                    t = value = tangent = o.points
                    cost = tangent_cost = np.nan_to_num(o.point_costs)
                    slope = np.zeros(t.size)
                    labels, cell = o.labels, False
                elif not cells:
                    t = value = tangent = o.grid
                    cost = tangent_cost = _cost_at(o.curve, o.grid)
                    slope = np.zeros(t.size)
                    labels, cell = ("",) * o.grid.size, False
                else:
                    t, value = o.grid[:-1], o.grid[1:]
                    ends = _cost_at(o.curve, o.grid)
                    cost = np.minimum(ends[:-1], ends[1:])
                    if costs.family_of(o.curve).piecewise:
                        # linear inside a cell: its breakpoints are on the grid
                        tangent, tangent_cost = t, ends[:-1]
                        slope = (ends[1:] - ends[:-1]) / (value - t)
                    else:
                        # convex: the tangent at the cell's middle lies below the curve
                        tangent = np.sqrt(t * value)
                        tangent_cost = _cost_at(o.curve, tangent)
                        slope = np.asarray(costs.cost_derivative(o.curve, tangent), dtype=float)
                    labels, cell = ("",) * t.size, True
                k = t.size
                parts.append({
                    "owner": np.full(k, o.owner), "option": np.full(k, o.index),
                    "tolerance": t, "value": value, "unit_cost": cost,
                    "factor": np.full(k, o.factor), "label": np.array(labels, dtype=object),
                    "cell": np.full(k, cell), "tangent": tangent, "tangent_cost": tangent_cost,
                    "cost_slope": slope,
                })
        return _assemble(parts, len(self.options))

    def _tightest_case(self) -> Case:
        """The case with each contributor at its tightest spread over all candidates.

        Every requirement is monotone in each contributor's t (worst case, δ) and σ = f·t,
        so the least t and the least f·t of any candidate together (not always one
        candidate) give the smallest spreads: if they fail a requirement, nothing meets it.
        """
        contributors = []
        for c, opts in zip(self.case.contributors, self.options):
            values = np.concatenate([o.points if o.kind == "points" else o.grid[:1] for o in opts])
            sigmas = np.concatenate([
                (o.points if o.kind == "points" else o.grid[:1]) * o.factor for o in opts
            ])
            t_min, s_min = float(values.min()), float(sigmas.min())
            hi = max(float(np.max(o.points)) if o.kind == "points" else o.limits[1] for o in opts)
            changes = dict(processes=(), limits=(t_min, hi), cost=None)
            if c.distribution == "normal":
                changes["cp"] = t_min / (3.0 * s_min)
            contributors.append(replace(c, **changes))
        return replace(self.case, contributors=tuple(contributors))

    # ------------------------------------------------------------------ MILP with cuts

    def _solve_milp(self, cand: _Candidates, limits: list[RequirementLimits], restricted: bool = False,
                    cutoff: float | None = None) -> _MilpOutcome:
        """Least-cost choice among ``cand``, exact for points (lazy cuts for mean shift).

        Columns: a binary ``x_c`` per candidate; for every lower-bound cell a continuous
        ``y_c ∈ [t_lo/t_hi · x_c, x_c]`` (the tolerance inside the cell is ``t_hi·y_c``);
        for every mean-shift requirement one binary per interval of δ (see
        :meth:`_interval_rows`). With cells the MILP is a relaxation: its optimum is a lower
        bound. The model is rebuilt after each round of cuts.

        ``restricted`` (points only) replaces the mean-shift interval rows by sufficient
        ones (``V ≤ g(δ_(k+1))²``) and solves once: every answer then meets the
        requirement, but the optimum may be missed by a little (used to pick processes
        before the conic polish, where the lower bound accounts for it).

        ``cutoff`` [currency] is a cost known to be at least this MILP's optimum (a verified
        solution's cost, for the lower-bound MILP, whose optimum is at most the true one):
        HiGHS prunes with it. A solve that finds nothing below it is repeated without.
        """
        model = self._milp_model(cand)
        refused = self._requirement_rows(model, limits)
        if refused is not None:
            return refused
        return self._cut_loop(model, restricted, cutoff)

    def _milp_model(self, cand: _Candidates) -> "_MilpModel":
        """Columns, shares per unit tolerance, the scaled objective and the choice rows."""
        owner = cand.owner
        cells = np.flatnonzero(cand.cell)
        n = self.counts[owner]
        a = np.abs(self.sensitivity[:, owner])  # requirements × candidates
        f = cand.factor
        model = _MilpModel(
            cand=cand, cells=cells, point=~cand.cell, t_hi=cand.value[cells],
            unit_w=n * a,  # worst-case share per unit tolerance
            unit_s=np.sqrt(n) * a * f,  # σ share per unit tolerance
            unit_d=n * a * self.mean_shifts[owner],  # mean-shift share per unit tolerance
            unit_v=n * (a * f) ** 2,  # variance share per unit tolerance squared
        )
        model.objective, model.constant, model.scale = self._milp_objective(cand, cells, n)
        model.base = self._choice_rows(model)
        return model

    def _milp_objective(self, cand: _Candidates, cells, n):
        """The objective over [x, y], its constant [currency] and its scale.

        Relative to each contributor's cheapest candidate, scaled to ~1e3: HiGHS's
        absolute tolerances then mean ~1e-10 of the cost that can change; the cost is
        ``constant + objective·z / scale``. Cells: ``n·(C(m) + C'(m)(τ − m)) − n·floor``,
        a tangent below a convex cost (exact for a table, linear inside a cell).
        """
        owner = cand.owner
        point = ~cand.cell
        t_hi = cand.value[cells]
        unit = cand.unit_cost
        floor = np.minimum.reduceat(unit, cand.starts)
        extra = n * (unit - floor[owner])
        constant = float(np.sum(self.counts * floor))
        typical = float(np.sum(np.maximum.reduceat(extra, cand.starts)))
        scale = OBJECTIVE_SCALE / typical if typical > 0 else 1.0
        intercept = np.where(point, unit, cand.tangent_cost - cand.cost_slope * cand.tangent)
        objective = np.concatenate([
            n * (intercept - floor[owner]), (n * cand.cost_slope)[cells] * t_hi
        ]) * scale
        return objective, constant, scale

    def _choice_rows(self, model: "_MilpModel") -> _Rows:
        """One candidate per contributor; ``t_lo/t_hi · x ≤ y ≤ x`` for every cell."""
        cand, size, t = model.cand, model.cand.size, model.cand.tolerance
        base = _Rows(size + model.n_tau)
        n_c = len(self.options)
        for i in range(n_c):  # Σ_j x_ij = 1
            lo_, hi_ = cand.starts[i], cand.starts[i + 1] if i + 1 < n_c else size
            base.add(np.ones(hi_ - lo_), 1.0, 1.0, cols=np.arange(lo_, hi_))
        for k, c in enumerate(model.cells):  # t_lo/t_hi · x ≤ y ≤ x
            base.add(np.array([t[c] / model.t_hi[k], -1.0]), 0.0, cols=np.array([c, size + k]))
            base.add(np.array([-1.0, 1.0]), 0.0, cols=np.array([c, size + k]))
        return base

    def _requirement_rows(self, model: "_MilpModel", limits) -> _MilpOutcome | None:
        """The rows of every requirement with limits (and its check for the cut loop).

        Returns an 'infeasible' outcome when a nominal, or every choice's mean band,
        reaches a limit; else None.
        """
        for r, (req, lim) in enumerate(zip(self.requirements, limits)):
            if lim.lower is None and lim.upper is None:
                continue
            room = min(stack.room(req.nominal, lim.lower, lim.upper))
            if not room > 0:
                return _MilpOutcome("infeasible", None, None, None, None, 0, 0, 0,
                                    f"requirement '{req.name}': nominal outside its limits")
            if self.model == "worst-case":
                model.base.add(model.linear(model.unit_w[r]) / room, 1.0)
                model.checks.append((r, "worst-case", room, lim))
            elif self.model == "rss":
                sigma_max = stack.sigma_limit(req.nominal, lim.fallout, lim.lower, lim.upper)
                model.base.add(model.variance(model.unit_v[r]) / sigma_max**2, 1.0)
                model.checks.append((r, "rss", sigma_max, lim))
            else:
                refused = self._mean_shift_requirement(model, r, req, lim, room)
                if refused is not None:
                    return refused
        return None

    def _mean_shift_requirement(self, model: "_MilpModel", r, req, lim, room) -> _MilpOutcome | None:
        """Rows of one requirement under mean shift, and its δ breakpoints (kept per solve)."""
        cand, n_tau = model.cand, model.n_tau
        # δ's least and largest value over the choices; equal when no choice moves the
        # mean band (no contributor with a mean shift, or none free)
        low = float(np.sum(np.minimum.reduceat(model.unit_d[r] * cand.tolerance, cand.starts)))
        high = float(np.sum(np.maximum.reduceat(model.unit_d[r] * cand.value, cand.starts)))
        if not low < room:
            # every choice puts the worst mean on or past a limit: fallout ≥ 50 %
            return _MilpOutcome("infeasible", None, None, None, None, 0, 0, 0,
                                f"requirement '{req.name}': the mean band reaches a limit")
        if not high > low:
            # δ is the same constant for every choice (0 without mean shifts): the
            # requirement is rss with σ_max = g(δ), as in the continuous solvers
            sigma_max = mean_shift_allowance(req.nominal, low, lim)[0]
            model.base.add(model.variance(model.unit_v[r]) / sigma_max**2, 1.0)
            model.checks.append((r, "rss", sigma_max, lim))
            return None
        # the worst mean must stay inside the limits (fallout ≥ 50 % otherwise)
        model.base.add(model.linear(model.unit_d[r]) / room, 1.0)
        model.checks.append((r, "mean-shift", room, lim))
        key = (r, n_tau > 0)
        if key not in self._breaks:
            # fine intervals make the points MILP exact in one solve as a rule; the lower
            # bound's MILP (continuous columns too) is faster with fewer
            involved = int(np.count_nonzero(np.maximum.reduceat(model.unit_d[r] + model.unit_s[r], cand.starts)))
            count = DELTA_INTERVALS_RELAXED if n_tau else min(DELTA_INTERVALS, max(16, 8 * involved))
            breaks = np.linspace(low, min(high, room), count + 1)
            seeds = [d for d in self._seeds.get(r, ()) if breaks[0] < d < breaks[-1]]
            self._breaks[key] = np.union1d(breaks, seeds) if n_tau else breaks
        return None

    def _cut_loop(self, model: "_MilpModel", restricted: bool, cutoff) -> _MilpOutcome:
        """Solve, add cuts for the requirements the choice misses, solve again."""
        cand, size, n_tau = model.cand, model.cand.size, model.n_tau
        dominance = []  # (row over the candidates, right-hand side): only for points
        solves = nodes = cuts = 0
        choice = objective_value = bound = None
        while solves < MAX_CUT_ROUNDS:
            res = self._milp_round(model, dominance, restricted, cutoff)
            solves += 1
            nodes += int(getattr(res, "mip_node_count", 0) or 0)
            if res.status == 2:
                return _MilpOutcome("infeasible", None, None, None, None, solves, nodes, cuts,
                                    "HiGHS: no combination of the candidates meets every requirement")
            if res.x is None:
                return _MilpOutcome("failed", None, None, bound, None, solves, nodes, cuts,
                                    f"HiGHS: {res.message}")
            if res.mip_dual_bound is not None:
                bound = model.constant + float(res.mip_dual_bound) / model.scale
            x = np.asarray(res.x, dtype=float)
            choice = self._choice(x[:size], cand)
            realised = cand.tolerance.copy()
            realised[model.cells] = x[size:size + n_tau] * model.t_hi
            objective_value = model.constant + float(res.fun) / model.scale
            if res.status != 0:  # time or node limit with an incumbent
                return _MilpOutcome("failed", choice, objective_value, bound, res.mip_gap, solves,
                                    nodes, cuts, f"HiGHS: {res.message}")
            if restricted:
                return _MilpOutcome("optimal", choice, objective_value, None, None, solves, nodes, 0,
                                    tolerances=realised[choice])
            added = self._cuts(model.checks, choice, cand, realised[choice], dominance,
                               model.unit_w, model.unit_s, model.unit_d, model.unit_v, relaxed=n_tau > 0)
            cuts += added
            if not added or (n_tau and solves >= MAX_RELAXED_ROUNDS):
                # a relaxation stopped early is still a relaxation: its optimum bounds
                return _MilpOutcome("optimal", choice, objective_value, min(bound, objective_value),
                                    float(res.mip_gap or 0.0), solves, nodes, cuts,
                                    tolerances=realised[choice])
        return _MilpOutcome("failed", choice, objective_value, bound, None, solves, nodes, cuts,
                            f"lazy cuts did not converge in {MAX_CUT_ROUNDS} MILP solves")

    def _milp_round(self, model: "_MilpModel", dominance, restricted: bool, cutoff):
        """One HiGHS solve of the model with the cuts so far (pruned by ``cutoff``)."""
        size, n_tau = model.cand.size, model.n_tau
        rows = model.base.copy()
        for coef, rhs in dominance:
            rows.add(coef, rhs)
        extra_cols = []
        for r, kind, room, lim in model.checks:
            if kind == "mean-shift":
                self._mean_shift_rows(rows, (r, n_tau > 0), room, lim, model.linear, model.variance,
                                      model.cand.owner, model.unit_s, model.unit_d, model.unit_v,
                                      extra_cols, restricted=restricted)
        z = np.concatenate(extra_cols) if extra_cols else np.zeros(0)
        rows.size = size + n_tau + z.size
        integrality = np.concatenate([np.ones(size), np.zeros(n_tau)])
        milp_args = (np.concatenate([model.objective, np.zeros(z.size)]), rows, self.time_limit,
                     np.concatenate([integrality, np.ones(z.size)]), np.ones(rows.size))
        limit = None
        if cutoff is not None and math.isfinite(cutoff):
            limit = (cutoff - model.constant) * model.scale
            limit += CUTOFF_SLACK * max(abs(limit), OBJECTIVE_SCALE)
        res = _run_milp(*milp_args, cutoff=limit)
        if limit is not None and (res.status == 2 or res.x is None):
            # nothing below the cutoff (or the cutoff confused HiGHS): the plain solve decides
            return _run_milp(*milp_args)
        return res

    def _mean_shift_rows(self, rows, key, room, lim, linear, variance, owner,
                         unit_s, unit_d, unit_v, extra_cols, restricted=False):
        """Interval binaries and tangent cuts of one mean-shift requirement.

        The variance V is linear in the choice and g(δ) (the largest σ with the mean
        anywhere in ȳ ± δ) decreases in δ. With breakpoints δ_0 < ... < δ_K and one binary
        z_k per interval: ``Σ z_k = 1``, ``Σ δ_k z_k ≤ δ ≤ Σ δ_(k+1) z_k`` and
        ``V ≤ Σ g(δ_k)² z_k``. Every choice that meets the requirement satisfies these
        (take the interval holding its δ: σ ≤ g(δ) ≤ g(δ_k)); breakpoints are added where
        a choice failed. Needs only that g decreases, not its concavity. ``restricted``
        uses the right ends instead, ``V ≤ Σ g(δ_(k+1))² z_k``: sufficient, not necessary.
        """
        r = key[0]
        req = self.requirements[r]
        breaks = self._breaks[key]
        first = rows.size
        k = breaks.size - 1
        cols = np.arange(first, first + k)
        g2 = np.array([
            mean_shift_allowance(req.nominal, float(b), lim)[0] ** 2 if b < room else 0.0
            for b in (breaks[1:] if restricted else breaks[:-1])
        ])
        d_row = linear(unit_d[r])
        v_row = variance(unit_v[r])
        v_scale = g2.max() if g2.max() > 0 else 1.0
        rows.add(np.ones(k), 1.0, 1.0, cols=cols)
        # δ ≤ Σ δ_(k+1) z_k and δ ≥ Σ δ_k z_k (rows in units of the room)
        rows.add(np.concatenate([d_row, -breaks[1:]]) / room, 0.0,
                 cols=np.concatenate([np.arange(d_row.size), cols]))
        rows.add(np.concatenate([d_row, -breaks[:-1]]) / room, np.inf, lower=0.0,
                 cols=np.concatenate([np.arange(d_row.size), cols]))
        rows.add(np.concatenate([v_row, -g2]) / v_scale, 0.0,
                 cols=np.concatenate([np.arange(v_row.size), cols]))
        rows.size = first + k
        extra_cols.append(cols)
        # tangent cuts found in earlier solves stay valid for any candidates
        for u, rhs, slope in self._tangents.get(r, ()):
            coef = linear(u[owner] * unit_s[r]) - slope * linear(unit_d[r])
            norm = _row_norm(coef, rhs)
            rows.add(coef / norm, rhs / norm)

    @staticmethod
    def _choice(x, cand: _Candidates) -> np.ndarray:
        """The candidate each contributor takes (largest x in its block)."""
        x = np.asarray(x, dtype=float)
        order = np.lexsort((-x, cand.owner))
        return order[cand.starts]

    def _cuts(self, checks, choice, cand, t_chosen, dominance,
              unit_w, unit_s, unit_d, unit_v, relaxed: bool) -> int:
        """Record cuts for every requirement the choice misses; returns how many.

        ``t_chosen`` is each contributor's tolerance at the MILP solution. Cuts valid for
        every choice that meets the requirement:

        - *dominance* (points only): the fallout (or the worst case) only grows with each
          contributor's t and σ = f·t, so every choice at least as loose as this one in
          every contributor of the requirement fails too: at least one contributor must
          take a candidate strictly tighter in some share. It removes this choice, so the
          loop ends after finitely many solves.
        - *tangent* (mean shift): with σ_i linear in the choice and u = σ*/‖σ*‖ at the
          failing choice, Cauchy-Schwarz gives u·σ ≤ ‖σ‖, and for concave decreasing g,
          g(δ) ≤ g(δ*) + g'(δ*)(δ − δ*): ``u·σ − g'(δ*)·δ ≤ g(δ*) − g'(δ*)·δ*``.
        - a new *breakpoint* at δ* for the interval rows (mean shift).

        With lower-bound cells (``relaxed``) worst case and rss are not checked (the
        relaxation may pass them optimistically) and no dominance cut is made.
        """
        owner = cand.owner
        added = 0
        in_chain = np.zeros(len(self.options), dtype=bool)
        for r, kind, bound, lim in checks:
            if relaxed and kind != "mean-shift":
                continue
            req = self.requirements[r]
            u_w, u_s, u_d = unit_w[r][choice], unit_s[r][choice], unit_d[r][choice]
            if kind == "worst-case":
                ok = float(u_w @ t_chosen) <= bound * (1 + CHECK_RTOL)
            elif kind == "rss":
                sigma = float(np.sqrt(np.sum((u_s * t_chosen) ** 2)))
                ok = sigma <= bound * (1 + CHECK_RTOL)
            else:
                sigma_i = u_s * t_chosen
                sigma = float(np.sqrt(np.sum(sigma_i**2)))
                delta = float(u_d @ t_chosen)
                allowed = mean_shift_allowance(req.nominal, delta, lim)[0] if delta < bound else 0.0
                ok = sigma <= allowed * (1 + (FALLOUT_RTOL if relaxed else CHECK_RTOL))
            if ok:
                continue
            if not relaxed:
                t = cand.tolerance
                shares = {
                    "worst-case": (unit_w[r] * t,),
                    "rss": (unit_v[r] * t * t,),
                    "mean-shift": (unit_s[r] * t, unit_d[r] * t),
                }[kind]
                in_chain[:] = False
                for share in shares:
                    in_chain |= np.maximum.reduceat(share, cand.starts) > 0
                dominated = in_chain[owner].copy()
                for share in shares:
                    dominated &= share >= share[choice][owner]
                dominance.append((dominated.astype(float), float(np.count_nonzero(in_chain) - 1)))
                added += 1
            if kind != "mean-shift":
                continue
            key = (r, relaxed)
            breaks = self._breaks[key]
            if 0 < delta < bound and np.min(np.abs(breaks - delta)) > 1e-12 * bound:
                self._breaks[key] = np.sort(np.append(breaks, delta))
                added += 1
            if sigma > 0 and lim.fallout <= TANGENT_MAX_FALLOUT:
                self._add_tangent(r, sigma_i / sigma, min(delta, bound * (1 - 1e-12)), lim)
                added += 1
        return added

    def _add_tangent(self, r, u, point, lim):
        """The mean-shift tangent cut of requirement ``r`` at ``δ* = point`` for ``lim``.

        ``u·σ − g'(δ*)·δ ≤ g(δ*) − g'(δ*)·δ*`` holds for every choice that meets the
        requirement, for any unit vector ``u ≥ 0`` and any δ* (see :meth:`_cuts`): the
        pair (u, δ*) is kept so that the next solve re-derives the cut for its own limits.
        """
        req = self.requirements[r]
        g, slope, _ = mean_shift_allowance(req.nominal, point, lim)
        slope = min(slope, 0.0)
        self._tangents.setdefault(r, []).append((u, g - slope * point, slope))
        self._tangent_points.setdefault(r, []).append((u, point))

    # ------------------------------------------------------------------ results

    def _resolved_case(self, chosen_options) -> Case:
        """The case with each contributor's chosen process as its only option."""
        contributors = []
        for c, o in zip(self.case.contributors, chosen_options):
            if o.index < 0:  # a fixed part no option makes: taken as it is
                contributors.append(replace(c, processes=(), limits=None, cost=None))
                continue
            if not c.processes:
                contributors.append(c)
                continue
            p = c.options()[o.index]
            cp = p.cp if p.cp is not None else c.cp
            contributors.append(replace(c, processes=(), limits=p.limits, cost=p.cost, cp=cp))
        return replace(self.case, contributors=tuple(contributors))

    def _option_of(self, cand: _Candidates, choice) -> list[_Option]:
        out = []
        for i, j in enumerate(choice):
            out.append(next(o for o in self.options[i] if o.index == cand.option[j]))
        return out

    def _baseline_unit_costs(self) -> np.ndarray:
        """Cost of one part at the current tolerance: the cheapest option that offers it."""
        return np.array([cheapest_unit_cost(c, c.tolerance) for c in self.case.contributors], dtype=float)

    def _result(self, chosen_options, t, limits, *, status, message, gap, iterations,
                labels=None, requirements=None, solver=SOLVER_NAME, lower_bound=None):
        """The result for a choice, re-checked by the shared numpy check: a
        :class:`~allocator.solve.result.Brief` whose Allocation is built on demand.

        Built complete: the current cost of a contributor with processes is its cheapest
        process that offers the current tolerance (the continuous problem knows only one);
        ``requirements`` (the conic polish's, with shadow prices for the chosen processes
        held; a list, or the polish's Allocation or Brief) or none of the shadow prices (a
        discrete choice has no derivative with respect to a limit); the grades, the
        rounding and the unrounded optimum.
        """
        # the problem of a choice does not depend on the limits: kept for a sweep's next points
        key = tuple(o.index for o in chosen_options)
        problem = self._result_problems.get(key)
        if problem is None:
            problem = AllocationProblem(self._resolved_case(chosen_options), self.model, self.fix)
            problem.processes = tuple(o.name for o in chosen_options)
            if len(self._result_problems) >= KEPT_POLISHERS:
                self._result_problems.pop(next(iter(self._result_problems)))
            self._result_problems[key] = problem
        rtol = WORST_CASE_RTOL if self.model == "worst-case" else FALLOUT_RTOL
        if status == "optimal" and not problem.feasible(t, limits, rtol=rtol):
            status, message = "failed", "the chosen tolerances failed the re-check: " + message
        if self._baseline is None:
            self._baseline = self._baseline_unit_costs()
        baseline = self._baseline.copy()
        fields = dict(unit_cost_current=baseline, current_cost=float(np.sum(self.counts * baseline)),
                      lower_bound=lower_bound)
        if labels is not None and any(labels):
            fields["grades"] = {n: g for n, g in zip(self.case.names, labels) if g}
        cost = problem.total_cost(t)
        fields.update(self._rounding_fields(cost, message))

        def build():
            if requirements is not None:
                polish = complete(requirements)
                fields["requirements"] = list(getattr(polish, "requirements", polish))
            return problem.result(t, limits, status=status, solver=solver, iterations=iterations, gap=gap,
                                  marginal=requirements is not None, **fields)

        return Brief(status, fields["message"], cost, gap, solver, t, build)

    def _infeasible(self, limits, message):
        return self.reference.result(None, limits, status="infeasible", solver=SOLVER_NAME,
                                     processes={n: "" for n in self.case.names},
                                     **self._rounding_fields(None, message))

    def _failed(self, limits, message):
        return self.reference.result(None, limits, status="failed", solver=SOLVER_NAME,
                                     processes={n: "" for n in self.case.names},
                                     **self._rounding_fields(None, message))

    def _rounding_fields(self, total_cost, message) -> dict:
        """The rounding, the unrounded optimum of this solve and the cost of rounding.

        With the ``message`` (which gains a note on the cost of rounding) as ``message``.
        """
        if self.rounding is None:
            return {"message": message}
        unrounded = self._solve_unrounded
        described = describe_rounding(self.rounding)
        fields = {"rounding": described, "unrounded": unrounded, "message": message}
        if unrounded.total_cost is not None:
            fields["unrounded_cost"] = unrounded.total_cost
            if total_cost is not None:
                fields["rounding_cost"] = total_cost - unrounded.total_cost
                fields["message"] = (
                    f"{message}; rounded to {described}: cost of rounding {fields['rounding_cost']:+.4g}"
                    f" over the unrounded optimum {unrounded.total_cost:.6g}"
                )
        return fields

    def plan(self, overrides_seq) -> None:
        """Announce the limits of a sweep's next solves (a :class:`~allocator.sweep.LimitSweep`).

        A polisher built for a process choice then solves its 1-D dual for all of them
        in one batched call (:meth:`~allocator.solve.exact.ExactAllocation.prime`) when
        it is used at a second point (the next :data:`PRIMED_POINTS` points), and each
        polisher's 1-D root search starts from its last root (warm starts); each point
        still polishes, re-checks and certifies its own answer. An empty sequence
        forgets the plan, the warm starts and the roots solved ahead (later solves are
        single ones, bit for bit as a fresh solver's).
        """
        self._plan = tuple(overrides_seq)
        self._primed = {}
        if not self._plan:
            for solver in self._polishers.values():
                if hasattr(solver, "end_sweep"):
                    solver.end_sweep()

    # ------------------------------------------------------------------ solve

    def solve(self, overrides=None):
        """Allocate with the case's limits, or with ``overrides``.

        Parameters
        ----------
        overrides : dict, optional
            Requirement name -> dict with any of ``lower``, ``upper``, ``fallout_ppm``.

        Returns
        -------
        Allocation
            With ``processes`` (chosen process per contributor), ``gap`` (0 when every
            option is discrete), and with rounding ``unrounded_cost`` and
            ``rounding_cost`` [currency].
        """
        return complete(self.solve_brief(overrides))

    def solve_brief(self, overrides=None):
        """As :meth:`solve`, an optimum's :class:`~allocator.solve.result.Allocation` not yet
        built: a :class:`~allocator.solve.result.Brief`, re-checked as any result (what a
        sweep's points need; an infeasible or failed solve's Allocation as is)."""
        limits = self.reference.limits(overrides)
        self._overrides = overrides
        carried = self._tangent_points
        self._tangents = {}  # requirement -> [(u, rhs, g'(δ))]: mean-shift cuts for these limits
        self._tangent_points = {}  # requirement -> [(u, δ*)] of those cuts
        self._breaks = {}  # (requirement, relaxed) -> δ breakpoints of the interval rows
        self._seeds = {}  # requirement -> δ of good solutions (breakpoints of the bound)
        if self.model == "mean-shift":
            for req, lim in zip(self.requirements, limits):
                if lim.fallout >= 0.5:
                    raise UsageError(
                        f"requirement '{req.name}': a fallout target of {lim.fallout_ppm:g} ppm "
                        "(50 % or more) is not supported with mean shift"
                    )
        # with rounding: the unrounded optimum at these limits, reported in the result
        self._solve_unrounded = self._unrounded_at(overrides)
        reason = self.reference.diagnose(limits)
        if reason:
            self._tangent_points = carried  # nothing learnt here: keep the last solve's cuts
            return self._infeasible(limits, reason)
        self._carry_cuts(carried, limits)
        self._cutoff = None  # the cost of a verified choice, from the search (listed values)
        searched = self._search(limits, overrides)
        if searched is not None:
            return searched
        # the MILP's grids (the branch and bound needs none): refinement is per solve,
        # from the plain grid (or, in a sweep, the grid around the last optimum)
        for opts in self.options:
            for o in opts:
                if o.kind == "continuous":
                    o.grid = o.base_grid if self._last_t is None else self._sweep_grid(o)
        if self.has_continuous:
            return self._solve_with_polish(limits, overrides)
        return self._solve_points(limits)

    def _search(self, limits, overrides):
        """One requirement: branch and bound with Lagrangian bounds (:mod:`.branch`).

        None where it does not apply (several requirements, a mean-shift target over
        :data:`TANGENT_MAX_FALLOUT`) or cannot finish; the MILP path then decides.
        """
        from .branch import OptionSearch

        active = [r for r, lim in enumerate(limits) if lim.lower is not None or lim.upper is not None]
        if len(active) != 1:
            return None
        cache = {}

        def polish(chosen, held, lam=None):
            return self._polish_held(chosen, held, overrides, cache, lam, brief=True)[1]

        search = OptionSearch(self, limits, active[0], polish, self.gap_target)
        out = search.run(self._last_pick)
        if out is None:
            if search.best is not None and search.exact:
                # a verified choice of listed values: its cost prunes the MILP's search
                self._cutoff = search.best[0]
            return None
        self._last_pick = np.array(search.best[1])
        nodes = f"{out.nodes} node{'s' if out.nodes != 1 else ''}"
        if out.exact:
            message = (
                f"exact choice among {search.entries.size} candidate (process, tolerance) pairs by "
                f"branch and bound with Lagrangian bounds ({nodes}, gap {_g(out.gap)}), "
                "re-checked against every requirement"
            )
            return self._result(out.options, out.tolerances, limits, status="optimal", message=message,
                                gap=out.gap, iterations=out.nodes, labels=out.labels,
                                solver="branch-and-bound")
        polished = out.allocation  # a Brief: its requirements are built with the result
        held = dict(self.fix)
        for c, o, ti in zip(self.case.contributors, out.options, out.tolerances):
            if o.kind == "points" and not c.fixed:
                held[c.name] = float(ti)
        self._last_choice, self._last_t = (out.options, held), out.tolerances
        message = (
            f"processes chosen by branch and bound with Lagrangian bounds ({nodes}), tolerances "
            "polished by the conic solver with those processes held; relative gap to a proven "
            f"lower bound {_g(out.gap)}"
        )
        return self._result(out.options, out.tolerances, limits, status="optimal", message=message,
                            gap=out.gap, iterations=out.nodes, requirements=polished,
                            solver=f"branch-and-bound+{polished.solver}", lower_bound=out.bound)

    def _sweep_grid(self, o: _Option) -> np.ndarray:
        """Starting grid of a continuous option when a previous solve's optimum is known.

        Every :data:`SWEEP_STRIDE`-th point of the plain grid, its ends and a table's
        breakpoints, and the plain grid's points within a factor :data:`SWEEP_SPAN` of the
        previous optimum's tolerance where that option was chosen: the lower bound is
        valid on any grid that covers the range (with a table's breakpoints on it); fine
        cells are only needed where its optimum lies, near the last one in a sweep. A
        coarse cell the bound picks is split like any other.
        """
        base = o.base_grid
        keep = np.zeros(base.size, dtype=bool)
        keep[::SWEEP_STRIDE] = True
        keep[[0, -1]] = True
        if o.curve is not None:  # a table's breakpoints stay on the grid (cells linear)
            keep |= np.isin(base, costs.family_of(o.curve).kinks(o.curve))
        chosen, _ = self._last_choice
        t = self._last_t[o.owner]
        if chosen[o.owner] is o and np.isfinite(t):
            keep |= (base >= t / SWEEP_SPAN) & (base <= t * SWEEP_SPAN)
        return base[keep]

    def _carry_cuts(self, carried, limits):
        """Re-derive the last solve's mean-shift tangent cuts for these limits.

        A cut is valid for any limits once g(δ*) and g'(δ*) are taken at the new limits
        (see :meth:`_add_tangent`); started with them, the MILPs of a sweep's next point
        need fewer rounds of cuts. The latest :data:`CARRIED_CUTS` per requirement are
        kept, each only where δ* leaves room inside the new limits.
        """
        if self.model != "mean-shift":
            return
        for r, points in carried.items():
            req, lim = self.requirements[r], limits[r]
            if lim.lower is None and lim.upper is None or lim.fallout > TANGENT_MAX_FALLOUT:
                continue
            room = min(stack.room(req.nominal, lim.lower, lim.upper))
            for u, point in points[-CARRIED_CUTS:]:
                if 0 <= point < room * (1 - 1e-12):
                    self._add_tangent(r, u, point, lim)

    def _solve_points(self, limits):
        """Every option is a set of points: one exact MILP."""
        cand = self.candidates()
        cutoff = self._cutoff if self._cutoff is not None else self._greedy_cost(cand, limits)
        out = self._solve_milp(cand, limits, cutoff=cutoff)
        if out.status == "infeasible":
            return self._infeasible(limits, self._milp_infeasible_message())
        if out.choice is None:
            return self._failed(limits, out.message)
        chosen = self._option_of(cand, out.choice)
        gap = out.mip_gap if out.status == "optimal" else self._gap(out.objective, out.bound)
        what = "exact choice" if out.status == "optimal" else "best choice found"
        message = (
            f"{what} among {cand.size} candidate (process, tolerance) pairs by HiGHS "
            f"(MILP, gap {_g(gap or 0.0)}; {out.solves} solve{'s' if out.solves > 1 else ''}"
            + (f", {out.cuts} lazy cuts" if out.cuts else "") + "), re-checked against every requirement"
        )
        if out.status != "optimal":
            message += f"; {out.message}"
        return self._result(chosen, cand.value[out.choice], limits,
                            status="optimal" if out.status == "optimal" else "failed",
                            message=message, gap=gap, iterations=out.solves,
                            labels=list(cand.label[out.choice]))

    def _meets(self, cand: _Candidates, choice, limits) -> bool:
        """The listed values ``choice`` (candidate per contributor) meet every requirement
        (numpy, within :data:`CHECK_RTOL`)."""
        t, f, n = cand.tolerance[choice], cand.factor[choice], self.counts
        for r, (req, lim) in enumerate(zip(self.requirements, limits)):
            if lim.lower is None and lim.upper is None:
                continue
            a = np.abs(self.sensitivity[r])
            room = min(stack.room(req.nominal, lim.lower, lim.upper))
            if not room > 0:
                return False
            if self.model == "worst-case":
                if float(np.sum(n * a * t)) > room * (1 + CHECK_RTOL):
                    return False
                continue
            sigma = float(np.sqrt(np.sum(n * (a * f * t) ** 2)))
            if self.model == "rss":
                allowed = stack.sigma_limit(req.nominal, lim.fallout, lim.lower, lim.upper)
            else:
                delta = float(np.sum(n * a * self.mean_shifts * t))
                if not delta < room:
                    return False
                allowed = mean_shift_allowance(req.nominal, delta, lim)[0]
            if sigma > allowed * (1 + CHECK_RTOL):
                return False
        return True

    def _greedy_cost(self, cand: _Candidates, limits) -> float | None:
        """Cost of a choice of listed values that meets every requirement, or None.

        From the tightest value of every contributor (which meets them if anything does),
        each contributor in turn takes its cheapest value that keeps every requirement
        met, twice over: a verified choice whose cost prunes the MILP's search (a cutoff
        never changes the MILP's optimum).
        """
        owner, n_c = cand.owner, len(self.options)
        ends = np.append(cand.starts[1:], cand.size)
        spread = cand.tolerance * np.maximum(cand.factor, 1e-300)
        choice = np.lexsort((cand.tolerance, spread, owner))[cand.starts]
        if not self._meets(cand, choice, limits):
            return None
        for _ in range(2):
            for i in range(n_c):
                block = np.arange(cand.starts[i], ends[i])
                for j in block[np.argsort(cand.unit_cost[block], kind="stable")]:
                    if cand.unit_cost[j] >= cand.unit_cost[choice[i]]:
                        break
                    trial = choice.copy()
                    trial[i] = j
                    if self._meets(cand, trial, limits):
                        choice = trial
                        break
        return float(np.sum(self.counts * cand.unit_cost[choice]))

    def _milp_infeasible_message(self) -> str:
        what = "rounded values" if self.rounding is not None else "offered options"
        return (
            f"no combination of the {what} meets every requirement (HiGHS: MILP infeasible), "
            "although each contributor's tightest option alone would"
        )

    @staticmethod
    def _gap(cost, bound):
        if cost is None or bound is None or not cost > 0:
            return None
        return max(0.0, (cost - bound) / cost)

    def _polish(self, cand, choice, overrides, cache):
        """Continuous optimum with the processes (and listed tolerances) of ``choice`` held."""
        chosen = self._option_of(cand, choice)
        held = dict(self.fix)
        for c, o, j in zip(self.case.contributors, chosen, choice):
            if o.kind == "points" and not c.fixed:
                held[c.name] = float(cand.value[j])
        return self._polish_held(chosen, held, overrides, cache)

    def _polish_held(self, chosen, held, overrides, cache, lam=None, brief=False):
        """Continuous optimum with the options ``chosen`` and the tolerances ``held`` held.

        ``lam``: in a sweep, the branch and bound's multiplier for this choice at these
        limits, where the polisher's root search starts (:meth:`ExactAllocation.aim`).
        ``brief``: a :class:`~allocator.solve.result.Brief` where the polisher gives one
        (the branch and bound polishes many choices and keeps one).
        """
        key = tuple((o.index, held.get(c.name)) for c, o in zip(self.case.contributors, chosen))
        if key in cache:
            return cache[key]
        try:
            solver = self._polisher(key, chosen, held)
            if lam is not None and self._plan and hasattr(solver, "aim"):
                solver.aim(math.log(lam))
            if solver is None:
                alloc = None
            elif brief and hasattr(solver, "solve_brief"):
                alloc = solver.solve_brief(overrides)
            else:
                alloc = solver.solve(overrides)
        except CaseError:
            alloc = None  # e.g. a table that is not convex: keep the grid point
        cache[key] = (chosen, alloc, held)
        return cache[key]

    def _polisher(self, key, chosen, held):
        """The conic solver with the processes of ``chosen`` and ``held`` values held.

        Built once per process choice and kept (the latest :data:`KEPT_POLISHERS`): it
        takes the limits as overrides, so the points of a sweep share it. None where the
        choice has no convex form (e.g. a table that is not convex).
        """
        if key in self._polishers:
            solver = self._polishers[key] = self._polishers.pop(key)  # most recently used last
            here = self._plan.index(self._overrides) if self._overrides in self._plan else None
            if here is not None and here >= self._primed.get(key, 0) and hasattr(solver, "prime"):
                # a choice met again in a sweep: its roots for the next points in one call
                self._primed[key] = here + PRIMED_POINTS
                solver.prime(self._plan[here:here + PRIMED_POINTS])
            return solver
        try:
            # the path allocate() takes for the same case with these processes held
            solver = continuous_solver(prepare(self._resolved_case(chosen), self.model, held))
        except CaseError:
            solver = None
        if solver is not None and self._plan and hasattr(solver, "start_at"):
            # a sweep: the 1-D dual's root from where the latest polish's was (another
            # choice of processes); a single solve keeps the plain first guess
            # (or the branch and bound's last multiplier: the same λ for the same requirement)
            latest = next((p for p in reversed(self._polishers.values())
                           if getattr(p, "hint", None) is not None), None)
            if latest is not None:
                solver.start_at(latest.hint, like=latest)
            elif self._lambda_hint is not None and 0.0 < self._lambda_hint < math.inf:
                solver.start_at(math.log(self._lambda_hint))
            else:
                solver.start_at()
        if solver is not None and hasattr(solver, "start_from"):
            # Newton's start: the prices of the latest polish (the same requirement, other
            # processes held), in place of a search from scratch
            latest = next((p for p in reversed(self._polishers.values()) if getattr(p, "prices", None)), None)
            if latest is not None:
                solver.start_from(latest.prices)
        self._polishers[key] = solver
        while len(self._polishers) > KEPT_POLISHERS:
            self._polishers.pop(next(iter(self._polishers)))
        return solver

    def _solve_with_polish(self, limits, overrides):
        """Grid MILP, conic polish with the processes held, refined lower bound.

        When the previous solve (another point of a sweep) left a process choice, its
        polish at these limits is tried first: a verified solution is an incumbent as good
        as the grid MILP's as a rule, and the grid MILP is skipped. Only the lower bound
        certifies the answer either way.
        """
        cache = {}
        polish_solver = ""
        best = None
        solves = 0

        def consider(polished):
            nonlocal best, polish_solver
            opts, alloc, held = polished
            if alloc is not None and alloc.success and (best is None or alloc.total_cost < best[0]):
                best = (alloc.total_cost, opts, alloc.allocated_array(), alloc.requirements, "polished")
                polish_solver = alloc.solver
                self._last_choice = (opts, held)
                self._last_t = best[2]
                self._seed_lower_bound(opts, best[2], limits)

        if self._last_choice is not None:
            consider(self._polish_held(*self._last_choice, overrides, cache))
        if best is None:
            points = self.candidates()
            primal = self._solve_milp(points, limits, restricted=True)
            if primal.status == "infeasible" and self.model == "mean-shift":
                primal = self._solve_milp(points, limits)  # the sufficient rows may be too strict
            if primal.status == "infeasible":
                return self._infeasible(limits, self._milp_infeasible_message())
            if primal.choice is None:
                return self._failed(limits, primal.message)
            chosen = self._option_of(points, primal.choice)
            best = (primal.objective, chosen, points.value[primal.choice], None, "grid point")
            solves = primal.solves
            consider(self._polish(points, primal.choice, overrides, cache))
        # one requirement: the Lagrangian dual bound costs no MILP and, where a continuous
        # part takes up the slack, proves the optimum by itself; its choice is a candidate
        bound, rounds = None, 0
        lagrangian = self._lagrangian(limits, best[1:3])
        if lagrangian is not None:
            bound, opts, t_dual = lagrangian
            held = dict(self.fix)
            for c, o, ti in zip(self.case.contributors, opts, t_dual):
                if o.kind == "points" and not c.fixed:
                    held[c.name] = float(ti)
            consider(self._polish_held(opts, held, overrides, cache))
        gap = self._gap(best[0], bound)
        proven_by_dual = gap is not None and gap <= self.gap_target
        # the optimum is most likely near the incumbent: split its cells before the first
        # lower bound instead of after it (the bound is valid on any grid)
        if not proven_by_dual:
            self._refine_near(best[1], best[2])
        lower_note = ""
        for rounds in range(1, 0 if proven_by_dual else MAX_REFINE + 2):
            cells = self.candidates(cells=True)
            low = self._solve_milp(cells, limits, cutoff=best[0])
            solves += low.solves
            if low.bound is not None:
                bound = low.bound if bound is None else max(bound, low.bound)
            if low.choice is None:
                lower_note = f"; lower bound: {low.message}"
                break
            incumbent = best
            consider(self._polish(cells, low.choice, overrides, cache))
            gap = self._gap(best[0], bound)
            if gap is not None and gap <= self.gap_target or rounds > MAX_REFINE:
                break
            self._refine(cells, low.choice)
            if best is not incumbent:  # a new incumbent: split the cells around it too
                self._refine_near(best[1], best[2])
        gap = self._gap(best[0], bound)
        cost, chosen, t, requirements, how = best
        chooser = (
            f"processes chosen by HiGHS (MILP over a {self.grid_points}-point grid per process)" if solves
            else "processes from the last solve's choice or the Lagrangian dual (no MILP needed)"
        )
        message = (
            chooser + ", "
            + ("tolerances polished by the conic solver with those processes held"
               if how == "polished" else "tolerances at grid points (polish did not improve)")
            + f"; relative gap to a proven lower bound {_g(gap) if gap is not None else 'unknown'}"
            + (" (Lagrangian dual bound)" if proven_by_dual else
               f" after {rounds} refinement round{'s' if rounds != 1 else ''}{lower_note}")
        )
        solver = SOLVER_NAME + (f"+{polish_solver}" if how == "polished" and polish_solver else "")
        return self._result(chosen, t, limits, status="optimal", message=message, gap=gap,
                            iterations=solves, requirements=requirements, solver=solver, lower_bound=bound)

    def _seed_lower_bound(self, chosen, t, limits):
        """Mean-shift cuts at a good solution: a breakpoint and a tangent at its δ.

        Both are valid anywhere (like every cut of :meth:`_cuts`); placed at the best
        known solution they make the lower bound tight where the optimum is.
        """
        if self.model != "mean-shift":
            return
        f = np.array([o.factor for o in chosen])
        n = self.counts
        for r, (req, lim) in enumerate(zip(self.requirements, limits)):
            if lim.lower is None and lim.upper is None:
                continue
            key = (r, True)
            a = np.abs(self.sensitivity[r])
            sigma_i = np.sqrt(n) * a * f * t
            sigma = float(np.sqrt(np.sum(sigma_i**2)))
            delta = float(np.sum(n * a * self.mean_shifts * t))
            self._seeds.setdefault(r, []).append(delta)
            breaks = self._breaks.get(key)
            if breaks is not None and breaks[0] < delta < breaks[-1] and (
                np.min(np.abs(breaks - delta)) > 1e-12 * breaks[-1]
            ):
                self._breaks[key] = np.sort(np.append(breaks, delta))
            room = min(stack.room(req.nominal, lim.lower, lim.upper))
            if sigma > 0 and delta < room and lim.fallout <= TANGENT_MAX_FALLOUT:
                self._add_tangent(r, sigma_i / sigma, delta, lim)

    def _lagrangian(self, limits, incumbent=None):
        """Lagrangian dual bound of one requirement, and the choice that attains it.

        With one constrained requirement ``Σ_i W_i(o_i) t_i^m ≤ S`` (worst case:
        ``W = n|a|``, ``m = 1``, ``S`` the room; rss: ``W = n a² f_o²``, ``m = 2``,
        ``S = σ_max²``; mean shift: the tangent cut of :meth:`_cuts` at the incumbent
        ``(options, t)``, ``W = u_i √n_i |a_i| f_o − g'(δ*) n_i |a_i| m_i``, ``m = 1``,
        ``S = g(δ*) − g'(δ*) δ*``, which every choice meeting the requirement satisfies, so
        that bounding the problem with it alone bounds the mean-shift problem), for every
        multiplier ``λ ≥ 0``

        .. math:: L(λ) = \\sum_i \\min_{o, t} \\left(n_i C_o(t) + λ W_i(o) t^m\\right) − λ S

        is at most the least cost (weak duality; no convexity needed, only that each inner
        minimum is exact: closed forms for the formula curves, every breakpoint and every
        piece's stationary point for a table, every listed value for points). ``L`` is
        concave; its maximum is found by bisection on the sign of its slope
        ``Σ W t^m − S`` in ``log λ``, and the largest value met is the bound. Where some
        contributor with a continuous curve is free to absorb the slack, the bound equals
        the optimum (Everett 1963; Fisher 1981) and no MILP is needed to prove it; for
        mean shift the cut at an optimal incumbent has the constraint's own gradient
        there, so the same holds.

        Returns
        -------
        (bound [currency], chosen options, tolerances) or None
            None with more than one constrained requirement, or for mean shift without
            an incumbent whose cut applies (a target over 49 %, no spread, or the worst
            mean outside the limits).

        References
        ----------
        .. [1] Everett, H. (1963). Generalized Lagrange multiplier method for solving
           problems of optimum allocation of resources. Operations Research 11(3), 399-417.
        .. [2] Fisher, M. L. (1981). The Lagrangian relaxation method for solving integer
           programming problems. Management Science 27(1), 1-18.
        """
        active = [r for r, lim in enumerate(limits) if lim.lower is not None or lim.upper is not None]
        if len(active) != 1:
            return None
        r = active[0]
        req, lim = self.requirements[r], limits[r]
        room = min(stack.room(req.nominal, lim.lower, lim.upper))
        if not room > 0:
            return None
        a, n = np.abs(self.sensitivity[r]), self.counts
        if self.model == "worst-case":
            m, rhs = 1, room
            weight = lambda i, o: n[i] * a[i]  # noqa: E731
        elif self.model == "rss":
            m, rhs = 2, stack.sigma_limit(req.nominal, lim.fallout, lim.lower, lim.upper) ** 2
            weight = lambda i, o: n[i] * (a[i] * o.factor) ** 2  # noqa: E731
        else:
            if incumbent is None or lim.fallout > TANGENT_MAX_FALLOUT:
                return None
            chosen, t = incumbent
            f = np.array([o.factor for o in chosen])
            sigma_i = np.sqrt(n) * a * f * np.asarray(t, dtype=float)
            sigma = float(np.sqrt(np.sum(sigma_i**2)))
            delta = float(np.sum(n * a * self.mean_shifts * t))
            if not (sigma > 0 and delta < room):
                return None
            g, slope, _ = mean_shift_allowance(req.nominal, delta, lim)
            slope = min(slope, 0.0)
            u = sigma_i / sigma
            m, rhs = 1, g - slope * delta
            shifts = self.mean_shifts

            def weight(i, o):
                return u[i] * math.sqrt(n[i]) * a[i] * o.factor - slope * n[i] * a[i] * shifts[i]
        if not (math.isfinite(rhs) and rhs > 0):
            return None
        terms = _LagrangianTerms(self, weight, m)
        scale = terms.scale(rhs)
        best = (terms.value(0.0)[0], 0.0)
        if terms.slope(0.0) > rhs:  # the loosest choice misses: the multiplier is positive
            lo, hi = math.log(scale) - 60.0, math.log(scale) + 60.0
            for _ in range(120):
                mid = 0.5 * (lo + hi)
                lam = math.exp(mid)
                total, spread = terms.value(lam)
                bound = total - lam * rhs
                if bound > best[0]:
                    best = (bound, lam)
                if spread > rhs:
                    lo = mid
                else:
                    hi = mid
                if hi - lo < 1e-13:
                    break
        bound, lam = best
        chosen, t = terms.choice(lam)
        # a margin for the rounding of the sums (the bound must never exceed the optimum)
        return bound - 1e-12 * terms.magnitude(lam, rhs), chosen, t

    def _refine_near(self, chosen, t):
        """Split the grid cells around each tolerance ``t`` of a continuous chosen option.

        The cell holding ``t_i`` and its two neighbours become :data:`REFINE_SPLIT` parts
        each: where the lower bound's optimum lies when the incumbent is (nearly) optimal.
        """
        for o, ti in zip(chosen, np.asarray(t, dtype=float)):
            if o.kind != "continuous" or not np.isfinite(ti):
                continue
            grid = o.grid
            k = int(np.clip(np.searchsorted(grid, ti) - 1, 0, grid.size - 2))
            lo, hi = max(k - 1, 0), min(k + 2, grid.size - 1)
            inner = [np.geomspace(grid[j], grid[j + 1], REFINE_SPLIT + 1)[1:-1] for j in range(lo, hi)]
            o.grid = np.union1d(grid, np.concatenate(inner))

    def _refine(self, cells: _Candidates, choice):
        """Split the grid cells the lower bound picked into :data:`REFINE_SPLIT` parts."""
        for j in choice:
            if not cells.cell[j]:
                continue
            i = cells.owner[j]
            o = next(o for o in self.options[i] if o.index == cells.option[j])
            lo, hi = cells.tolerance[j], cells.value[j]
            inner = np.geomspace(lo, hi, REFINE_SPLIT + 1)[1:-1]
            o.grid = np.union1d(o.grid, inner)

    # ------------------------------------------------------------------ rounding

    def _unrounded_at(self, overrides):
        """With rounding: the optimum without it at these limits (else None)."""
        if self.rounding is None:
            return None
        if self._unrounded is None:
            self._unrounded = self.unrounded_solver()
        return self._unrounded.solve(overrides)

    def unrounded_solver(self):
        """The solver of the same problem without rounding: the one ``allocate`` takes."""
        plain = replace(self.case, allocation=replace(self.case.allocation, rounding=None))
        solver = continuous_solver_for(plain, self.model, self.fix)
        if solver is not None:
            return solver
        return DiscreteAllocation(plain, self.model, self.fix, grid_points=self.grid_points,
                                  gap_target=self.gap_target, time_limit=self.time_limit)


def solver_for(case: Case, model: str, *, fix=None, **options) -> DiscreteAllocation:
    """A :class:`DiscreteAllocation` (``.solve(overrides=None) -> Allocation``)."""
    return DiscreteAllocation(case, model, fix, **options)


def allocate_discrete(case: Case, model: str | None = None, *, fix=None, overrides=None, **options):
    """Least-cost process and tolerance choice for ``case`` under one stack model.

    Parameters
    ----------
    case : Case
    model : {'worst-case', 'rss', 'mean-shift'}, optional
        Default: the first of the case's ``[allocation].models``.
    fix : dict, optional
        Contributor name -> ± tolerance to hold [length].
    overrides : dict, optional
        Requirement name -> dict of ``lower`` / ``upper`` / ``fallout_ppm``.
    **options
        ``grid_points``, ``gap_target``, ``rounding``, ``time_limit`` of
        :class:`DiscreteAllocation`.

    Returns
    -------
    Allocation

    References
    ----------
    .. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
       tolerance allocation for mechanical assemblies with automated process selection",
       Manufacturing Review 3(1):49-59, 1990.
    .. [2] Q. Huangfu and J. A. J. Hall, "Parallelizing the dual revised simplex method",
       Mathematical Programming Computation 10:119-142, 2018.
    """
    model = model or (case.allocation.models[0] if case.allocation.models else "worst-case")
    return solver_for(case, model, fix=fix, **options).solve(overrides)
