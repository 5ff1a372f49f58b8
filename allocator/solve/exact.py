"""Exact allocation through the Lagrange dual of separable constraints.

Under worst case and rss every requirement's constraint is a sum over contributors:

- worst case: ``Σ_i n_i |a_ri| t_i ≤ S_r`` (``S_r = min(ȳ − L, U − ȳ) − W_held``);
- rss: ``Σ_i n_i a_ri² f_i² t_i² ≤ S_r`` (``S_r = σ_max² − σ_held²``).

For multipliers ``λ_r ≥ 0`` the Lagrangian splits into one problem per contributor whose
minimiser has a closed form, clipped to the contributor's limits (Chase, Greenwood,
Loosli & Hauglund 1990). With ``v_i = Σ_r λ_r w_ri`` (``w = |a|`` or ``a² f²``):

- worst case, ``C_i'(t_i) = −v_i``:  ``a + b/t^k`` gives ``t = (k b / v)^(1/(k+1))``
  (reciprocal: k = 1); ``a + b e^(−ct)`` gives ``t = ln(b c / v) / c``; a convex table
  gives the breakpoint whose subgradient holds ``−v``;
- rss, ``C_i'(t_i) = −2 v_i t_i``:  ``t = (k b / (2v))^(1/(k+2))``;
  ``t = W₀(b c² / (2v)) / c`` (Lambert W); a convex table: where the subgradient of
  ``C(t) + v t²`` holds 0.

:class:`ExactAllocation` solves a single requirement by a 1-D root in ``log λ`` (the
constraint made active) — exact, vectorised, and without cvxpy. :func:`refine` applies
Newton's method to the multipliers of several requirements, started from a conic
solver's duals, to take its answer to machine precision.
"""

from __future__ import annotations

import math

import numpy as np

from .. import stack
from ..costs.family import SmoothFamily
from ..costs.table import points as table_points
from .problem import AllocationProblem, allowance_with_curvature, mean_shift_allowance
from .result import Brief, complete

__all__ = [
    "applicable",
    "applicable_mean_shift",
    "separable",
    "ExactAllocation",
    "MeanShiftExact",
    "SeparableDual",
    "refine",
    "minimise_linear_price",
    "minimise_price",
    "minimise_quadratic_price",
]

SOLVER_NAME = "lagrange-dual"
GAP_LIMIT = 1e-8  # Newton's answer counts only with a dual bound this close (else: conic)
HINT_STEP = 0.02  # first step in log λ when a bracket grows from a neighbouring solve's λ
AIM_STEP = 1e-6  # ... or from a relaxation's λ of the same choice at the same limits (aim())
_LOG_FLOAT_MAX = math.log(np.finfo(float).max)  # exp() of more overflows


def separable(problem: AllocationProblem) -> bool:
    """True when every constraint is a sum over contributors (worst case, rss, or mean
    shift without free mean shifts, where the allowed σ is a constant)."""
    if problem.model == "mean-shift":
        return not np.any(problem.mean_shifts[problem.free] > 0)
    return problem.model in ("worst-case", "rss")


def applicable(problem: AllocationProblem) -> bool:
    """True when :class:`ExactAllocation` solves ``problem``: one separable requirement
    (costs are formulas or convex tables; :func:`~.problem.prepare` refused others)."""
    return len(problem.requirements) == 1 and separable(problem)


# --------------------------------------------------------------------------- the dual


class SeparableDual:
    """The per-contributor minimisers and constraint values of a separable problem.

    :meth:`tolerances`, :meth:`spreads`, :meth:`cost` and :meth:`bound` take one point
    (arrays over the free parts) or many points at once (one row per point): a sweep
    asks the same formulas for many right-hand sides in one call.

    Parameters
    ----------
    problem : AllocationProblem
        With :func:`separable` true.
    """

    def __init__(self, problem: AllocationProblem):
        self.problem = problem
        free = problem.free
        self.index = np.flatnonzero(free)
        self.lo = problem.tightest[free]
        self.hi = problem.loosest[free]
        self.n = problem.counts[free]
        self.curves = problem.curves.subset(self.index)
        self.squared = problem.model != "worst-case"
        a = np.array([r.sensitivity for r in problem.requirements]).reshape(len(problem.requirements), -1)
        weight = (a * problem.sigma_factors) ** 2 if self.squared else np.abs(a)
        self.weight = weight[:, free]  # per part, one row per requirement
        self.coef = self.weight * self.n
        held = ~free
        t_held = problem.held[held]
        power = 2 if self.squared else 1
        self.held_part = (weight[:, held] * problem.counts[held]) @ t_held**power
        self.held_cost = float(np.sum((problem.counts * problem.unit_costs(problem.held))[held]))
        self.evaluations = 0
        self.pinned = np.full(self.index.size, np.nan)  # tolerances kept where they are

    def _pin(self, t):
        return np.where(np.isnan(self.pinned), t, self.pinned)

    # ------------------------------------------------------------------ inner problem

    def tolerances(self, v, *, pinned: bool = True) -> np.ndarray:
        """Minimiser of ``C_i(t) + v_i t`` (worst case) or ``C_i(t) + v_i t²`` (rss).

        ``v`` is one price per free part (or a scalar), or an array (points, free parts)
        of one row per point; the tolerances have the same shape [length].
        Contributors in :attr:`pinned` keep their pinned value unless ``pinned=False``.
        """
        self.evaluations += 1
        v = np.asarray(v, dtype=float)
        lo, hi = self.lo, self.hi
        if v.ndim == 2:  # one row per point: the families broadcast the parts' limits
            if self.squared:
                t = np.clip(self.curves.quadratic_minimiser(2.0 * v, lo, hi), lo, hi)
            else:
                t = np.clip(self.curves.linear_minimiser(v), lo, hi)
        elif self.squared:
            t = minimise_quadratic_price(self.curves, 2.0 * v, lo, hi)
        else:
            t = minimise_linear_price(self.curves, v, lo, hi)
        return self._pin(t) if pinned else t

    def combined(self, lam) -> np.ndarray:
        """Per-part weight ``v = Σ_r λ_r w_r`` for multipliers ``lam``."""
        return np.asarray(lam, dtype=float) @ self.weight

    def spreads(self, t) -> np.ndarray:
        """Each requirement's free part ``Σ n w t`` (or ``t²``): shape (requirements,),
        or (points, requirements) for tolerances with one row per point."""
        power = t * t if self.squared else t
        return self.coef @ power if power.ndim == 1 else power @ self.coef.T

    def cost(self, t):
        """Cost of the free contributors [currency] (one per row for rows of points)."""
        values = self.curves.value(t)
        return float(self.n @ values) if values.ndim == 1 else values @ self.n

    def bound(self, lam, rhs, t=None):
        """Weak-duality lower bound on the optimum: the Lagrangian's minimum at ``λ``.

        ``lam`` and ``rhs`` hold one value per requirement, or one row per point (then
        one bound per point). ``t``: the minimiser at ``lam`` (unpinned), if already known.
        """
        lam, rhs = np.asarray(lam, dtype=float), np.asarray(rhs, dtype=float)
        if t is None:
            t = self.tolerances(self.combined(lam), pinned=False)
        active = lam > 0
        if lam.ndim == 1:
            extra = float(lam[active] @ (self.spreads(t)[active] - rhs[active]))
        else:  # a slack requirement (λ = 0) adds nothing, whatever its rhs
            extra = np.where(active, lam * (self.spreads(t) - np.where(active, rhs, 0.0)), 0.0).sum(axis=1)
        return self.held_cost + self.cost(t) + extra

    def jacobian(self, t, v) -> np.ndarray:
        """``∂ spread_r / ∂ λ_s`` at ``t = t(λ)`` (clipped parts and table kinks fixed)."""
        cs = self.curves
        curvature = cs.curvature(t)
        inside = (t > self.lo) & (t < self.hi) & ~cs.at_breakpoint(t)
        if self.squared:
            # C'(t) + 2 v t = 0  ⇒  dt/dv = −2t / (C'' + 2v);  d spread/dt = 2 n w t
            with np.errstate(divide="ignore", invalid="ignore"):
                dt_dv = np.where(inside & (v > 0), -2.0 * t / (curvature + 2.0 * v), 0.0)
            grad = 2.0 * self.coef * t
        else:
            # C'(t) = −v; a table piece has C'' = 0 and t(λ) jumps: no slope to follow
            dt_dv = np.where(inside & (curvature > 0), -1.0 / np.where(curvature > 0, curvature, 1.0), 0.0)
            grad = self.coef
        return (grad * dt_dv) @ self.weight.T

    # ------------------------------------------------------------------ right-hand sides

    def rhs(self, limits):
        """``S_r`` per requirement, and the allowance it came from (room or σ)."""
        problem = self.problem
        out, allowance = [], []
        for k, (req, lim) in enumerate(zip(problem.requirements, limits)):
            if lim.lower is None and lim.upper is None:
                out.append(math.inf)
                allowance.append(math.inf)
                continue
            if not self.squared:
                room = min(stack.room(req.nominal, lim.lower, lim.upper))
                out.append(room - self.held_part[k])
                allowance.append(room)
                continue
            if problem.model == "mean-shift":
                t_held = np.where(problem.free, 0.0, problem.held)
                delta = stack.mean_shift_delta(req.sensitivity, problem.counts, problem.mean_shifts, t_held)
                sigma = mean_shift_allowance(req.nominal, delta, lim)[0]
            else:
                sigma = stack.sigma_limit(req.nominal, lim.fallout, lim.lower, lim.upper)
            out.append(sigma * sigma - self.held_part[k])
            allowance.append(sigma)
        return np.array(out), np.array(allowance)

    def multipliers(self, lam, allowance) -> list[float]:
        """``−∂cost/∂(allowance)`` per requirement (what shadow prices are made from)."""
        lam = np.asarray(lam, dtype=float)
        if self.squared:  # ∂(σ²)/∂σ = 2σ
            return [2.0 * l * s if l > 0 else 0.0 for l, s in zip(lam, allowance)]
        return [float(l) if l > 0 else 0.0 for l in lam]


# --------------------------------------------------------------------------- 1 requirement


class ExactAllocation:
    """The exact 1-D dual for one prepared single-requirement problem.

    Parameters
    ----------
    problem : AllocationProblem
        Must satisfy :func:`applicable`.

    Notes
    -----
    ``G(λ) = spread(t(λ)) − S`` is non-increasing in λ. If the loosest tolerances meet the
    requirement, λ = 0. Otherwise λ is bracketed by decades from a first guess (the
    median slope ratio at the middle of the limits) and found by Illinois-modified
    regula falsi in ``log λ``; the last step moves along the segment between the two
    bracketing solutions to the point where the constraint is exactly active (where a
    table makes ``t(λ)`` jump, every point of that segment costs the same per unit of
    constraint).

    :meth:`roots` does this for many right-hand sides ``S`` at once, every step on an
    array with one row per ``S``: :meth:`solve` is its one-row case, and a sweep of the
    requirement's limit or fallout target (:class:`allocator.sweep.LimitSweep`) asks it
    for all its points in one call.

    Examples
    --------
    >>> from allocator.case import load_case
    >>> from allocator.solve import prepare
    >>> exact = ExactAllocation(prepare(load_case("cases/gearbox_end_play.toml"), "rss"))
    >>> limits = [exact.problem.limits({"end_play": {"upper": u}}) for u in (0.30, 0.40)]
    >>> rhs = [exact.dual.rhs(lim)[0][0] for lim in limits]
    >>> t, lam, bound = exact.roots(rhs)
    >>> t.shape == (2, exact.dual.index.size), bool(lam[0] >= lam[1])
    (True, True)
    """

    def __init__(self, problem: AllocationProblem):
        if not applicable(problem):
            raise ValueError("the exact dual needs one requirement under worst-case or rss")
        self.problem = problem
        self.dual = SeparableDual(problem)
        self.kinks = _kinks(self.dual)
        self.hint = None  # log λ of the last solve
        self.warm = False  # True: each solve's bracket grows from the last one's λ
        self._primed = {}  # rhs -> (t, λ, bound) solved ahead by prime()
        self._aim = None  # log λ for the next solve only (aim())
        self._known = {}  # with warm starts: log S -> log λ of the roots solved so far
        self._like = {}  # ... and of a neighbouring problem's (start_at(like=...))

    def start_at(self, hint: float | None = None, like: "ExactAllocation | None" = None) -> None:
        """Warm starts, for a sweep of nearby limits: each later solve grows its bracket
        from the previous solve's log λ (the first from ``hint``, a neighbouring
        problem's, if given) in place of the first guess from the curves' slopes.
        ``like``: a neighbouring problem's solver (the same requirement, other processes
        held) whose roots give the shape of log λ against log S until this one has two.

        Any start brackets the same root; a near one takes fewer evaluations (results
        can differ in the last bits, hence off unless asked for).
        """
        self.warm = True
        if hint is not None and math.isfinite(hint):
            self.hint = float(hint)
        if like is not None and len(like._known) >= 2:
            self._like = dict(like._known)

    def end_sweep(self) -> None:
        """Back to single solves: no warm start and no roots solved ahead by :meth:`prime`
        (a later solve is then bit for bit the one a fresh solver gives)."""
        self.warm = False
        self._primed = {}
        self._aim = None
        self._known = {}
        self._like = {}

    def aim(self, log_lam: float) -> None:
        """With warm starts: the next solve's bracket grows from ``log_lam`` in steps from
        :data:`AIM_STEP` (the multiplier of a relaxation whose own choice is this problem,
        at the same limits: the root is as a rule within the relaxation's tolerance)."""
        if self.warm and math.isfinite(log_lam):
            self._aim = float(log_lam)

    def solve(self, overrides=None):
        """Allocate; returns an :class:`~allocator.solve.result.Allocation`."""
        return complete(self.solve_brief(overrides))

    def solve_brief(self, overrides=None):
        """As :meth:`solve`, the :class:`~allocator.solve.result.Allocation` not yet built:
        a :class:`~allocator.solve.result.Brief` (an infeasible problem's Allocation as is)."""
        problem, dual = self.problem, self.dual
        limits = problem.limits(overrides)
        reason = problem.diagnose(limits)
        if reason:
            return problem.infeasible(limits, reason, SOLVER_NAME)
        dual.evaluations = 0
        rhs, allowance = dual.rhs(limits)
        primed = self._primed.get(float(rhs[0]))
        if primed is None:
            if self._aim is not None:
                hint, step = self._aim, AIM_STEP
            else:
                hint, step = self._hints(rhs[:1]), HINT_STEP
            primed = (x[0] for x in self.roots(rhs[:1], hint=hint, step=step))
        self._aim = None
        t_free, lam, bound = primed
        if 0.0 < lam < math.inf:
            self.hint = math.log(lam)  # with warm starts, the next solve starts here
            self._remember(rhs[:1], np.array([lam]))
        t = problem.full(t_free)
        polished, theta = problem.polish(t, limits)
        cost = problem.total_cost(polished)
        bound = float(bound) if math.isfinite(bound) else None
        gap = max(0.0, (cost - bound) / cost) if bound is not None and cost > 0 else None
        ok = theta >= 1.0 - 1e-9 and problem.feasible(polished, limits, rtol=problem._rtol())
        status = "optimal" if ok else "failed"
        message = (
            "exact 1-D Lagrange dual; re-checked against the requirement"
            if ok
            else f"dual solution needed a shrink of {1 - theta:.2e} to meet the requirement"
        )
        evaluations = dual.evaluations
        multipliers = dual.multipliers([float(lam)], allowance)

        def build():
            return problem.result(polished, limits, status=status, message=message, solver=SOLVER_NAME,
                                  iterations=evaluations, gap=gap, multipliers=multipliers)

        return Brief(status, message, cost, gap, SOLVER_NAME, polished, build)

    def prime(self, overrides_seq) -> None:
        """Solve the dual for the limits a sweep will ask for, in one batched call.

        :meth:`solve` at one of these limits then takes its root from here (and still
        polishes, re-checks and reports it as at any other limits).

        Parameters
        ----------
        overrides_seq : sequence of dict
            Limit overrides, as :meth:`solve` takes them, one per later solve.
        """
        problem, dual = self.problem, self.dual
        rhs = []
        for overrides in overrides_seq:
            limits = problem.limits(overrides)
            if problem.diagnose(limits) is None:
                rhs.append(float(dual.rhs(limits)[0][0]))
        self._primed = {}
        if rhs:
            t, lam, bound = self.roots(rhs, hint=self._hints(rhs))
            self._primed = {s: (t[k], lam[k], bound[k]) for k, s in enumerate(rhs)}
            self._remember(rhs, lam)

    def _remember(self, rhs, lam) -> None:
        """With warm starts: keep the roots ``lam`` at ``rhs`` for :meth:`_hints`."""
        if not self.warm:
            return
        for s, x in zip(np.asarray(rhs, dtype=float), np.asarray(lam, dtype=float)):
            if 0.0 < s < math.inf and 0.0 < x < math.inf:
                self._known[math.log(s)] = math.log(x)

    def _hints(self, rhs):
        """Start of each root's bracket in log λ: None without warm starts; else from the
        roots met so far in the sweep, linear in (log S, log λ) through the two nearest
        (beyond them: the end pair's line); with one root, a neighbouring problem's line
        (:meth:`start_at`) moved onto it; else the last root's log λ."""
        if not self.warm or self.hint is None:
            return None
        with np.errstate(divide="ignore", invalid="ignore"):
            x = np.log(np.asarray(rhs, dtype=float))
        if len(self._known) >= 2:
            line = _polyline(self._known, x)
        elif len(self._known) == 1 and len(self._like) >= 2:
            (x0, y0), = self._known.items()
            line = _polyline(self._like, x) + (y0 - _polyline(self._like, np.array([x0]))[0])
        else:
            return self.hint
        return np.where(np.isfinite(line), line, self.hint)

    def roots(self, rhs, hint=None, step=HINT_STEP):
        """Least-cost free tolerances with ``spread(t) ≤ S``, for many ``S`` at once.

        Parameters
        ----------
        rhs : array_like, shape (points,)
            Right-hand sides ``S`` of the free part [response] (worst case) or
            [response²] (rss, mean shift); ``inf`` when the requirement has no limit
            (:meth:`SeparableDual.rhs`).
        hint : float or array_like, optional
            A log λ near the roots (a neighbouring solve's), or one per ``S``: each
            bracket grows from it in steps of ``step``, times 4 each, at most a decade;
            without it, from the curves' slopes in decades.
        step : float
            The first step from ``hint`` [log λ].

        Returns
        -------
        t : numpy.ndarray, shape (points, free contributors)
            Tolerances with the constraint active (loosest where the loosest fit, tightest
            where not even those fit) [length].
        lam : numpy.ndarray, shape (points,)
            Multiplier λ of each point (0: slack; inf: only the tightest tolerances fit,
            up to round-off).
        bound : numpy.ndarray, shape (points,)
            Dual lower bound on each point's total cost (NaN with ``lam = inf``) [currency].
        """
        dual = self.dual
        rhs = np.atleast_1d(np.asarray(rhs, dtype=float))
        loosest = dual.hi
        t = np.tile(loosest, (rhs.size, 1))
        lam = np.zeros(rhs.size)
        bound = np.full(rhs.size, dual.held_cost + dual.cost(loosest))
        if dual.index.size == 0:
            return t, lam, bound
        rows = np.flatnonzero(np.isfinite(rhs) & (dual.spreads(loosest)[0] > rhs))
        if rows.size == 0:
            return t, lam, bound
        target = rhs[rows]
        scale = np.where(target != 0, np.abs(target), 1.0)
        w = dual.weight[0]
        # (point, log λ) -> tolerances: the bracket's ends are not solved again (this
        # dual pins nothing: pinned and unpinned tolerances are the same)
        seen = {}

        def excess(x, which):
            """Relative excess of the spread at ``log λ = x`` for the points ``which``."""
            tolerances = dual.tolerances(np.exp(x)[:, None] * w)
            seen.update(zip(zip(which.tolist(), x.tolist()), tolerances))
            return (dual.spreads(tolerances)[:, 0] - target[which]) / scale[which]

        def at(x, which):
            """Tolerances at ``log λ = x`` for the points ``which`` (evaluated already)."""
            got = [seen.get(key) for key in zip(which.tolist(), x.tolist())]
            if any(g is None for g in got):
                return dual.tolerances(np.exp(x)[:, None] * w)
            return np.array(got).reshape(x.size, w.size)

        if hint is not None and np.all(np.isfinite(hint)):
            # a neighbouring solve's log λ: widen from it in growing steps
            start = np.broadcast_to(np.asarray(hint, dtype=float), rhs.shape)[rows]
            hinted = True
        else:
            # a first λ from the slopes at the middle of the limits, then widen by decades
            mid = np.sqrt(dual.lo * dual.hi)
            slope = -dual.curves.derivative(mid)
            with np.errstate(divide="ignore", invalid="ignore"):
                per = slope / (2.0 * w * mid) if dual.squared else slope / w
            per = per[(w > 0) & np.isfinite(per) & (per > 0)]
            start, step = math.log(float(np.median(per)) if per.size else 1.0), math.log(10.0)
            hinted = False
        everyone = np.arange(rows.size)
        x_hi = np.broadcast_to(np.asarray(start, dtype=float), rows.shape).copy()
        f_hi = excess(x_hi, everyone)
        x_lo, f_lo = x_hi.copy(), f_hi.copy()
        # bracket in log λ, evaluated exactly as the root finder will (exp(log λ) may
        # differ from λ in the last bit, which matters right at a table's kink)
        decade = math.log(10.0)
        tight = np.zeros(rows.size, dtype=bool)
        rising = f_hi > 0
        widen = step
        for _ in range(400):
            if not rising.any():
                break
            k = np.flatnonzero(rising)
            # no finite λ meets it: the requirement leaves exactly the tightest tolerances
            # (diagnose() let them pass up to round-off)
            ceiling = x_hi[k] + widen >= _LOG_FLOAT_MAX
            tight[k[ceiling]] = True
            k = k[~ceiling]
            if hinted:  # the bracket's lower end: the last λ that fell short
                x_lo[k], f_lo[k] = x_hi[k], f_hi[k]
            x_hi[k] += widen
            f_hi[k] = excess(x_hi[k], k)
            rising[:] = False
            rising[k] = f_hi[k] > 0
            widen = min(4.0 * widen, decade)
        tight |= rising
        falling = ~tight & (f_lo <= 0)
        widen = step
        for _ in range(400):
            if not falling.any():
                break
            k = np.flatnonzero(falling)
            if hinted:  # the bracket's upper end: the last λ that met it
                x_hi[k], f_hi[k] = x_lo[k], f_lo[k]
            x_lo[k] -= widen
            f_lo[k] = excess(x_lo[k], k)
            falling[k] = f_lo[k] <= 0
            widen = min(4.0 * widen, decade)
        live = np.flatnonzero(~tight & ~falling)
        stuck = rows[tight]
        t[stuck] = dual.lo
        lam[stuck] = math.inf
        bound[stuck] = math.nan
        if live.size == 0:
            return t, lam, bound
        x_a, x_b, f_a, f_b = x_lo[live], x_hi[live], f_lo[live], f_hi[live]
        if self.kinks.size:
            x_a, x_b, f_a, f_b = _kink_brackets(excess, live, self.kinks, x_a, x_b, f_a, f_b)
        x_a, x_b = _bracket_roots(excess, live, x_a, x_b, f_a, f_b)
        lam_a, lam_b = np.exp(x_a), np.exp(x_b)
        t_a, t_b = at(x_a, live), at(x_b, live)
        found = rows[live]
        t[found] = self._mix(t_a, t_b, target[live])
        lam[found] = lam_b
        bound[found] = np.maximum(dual.bound(lam_a[:, None], target[live, None], t_a),
                                  dual.bound(lam_b[:, None], target[live, None], t_b))
        return t, lam, bound

    def _mix(self, t_a, t_b, rhs):
        """Per row, the point on the segment t_b → t_a where the constraint is exactly active."""
        dual = self.dual
        d = t_a - t_b
        room = rhs - dual.spreads(t_b)[:, 0]
        coef = dual.coef[0]
        with np.errstate(divide="ignore", invalid="ignore"):
            if dual.squared:
                quad = (d * d) @ coef
                lin = 2.0 * ((t_b * d) @ coef)
                theta = 2.0 * room / (lin + np.sqrt(lin * lin + 4.0 * quad * room))
            else:
                theta = room / (d @ coef)
        theta = np.clip(theta, 0.0, 1.0)
        t = t_b.copy()
        todo = np.flatnonzero((room > 0) & np.any(d != 0, axis=1))
        for _ in range(20):  # round-off may leave the mix a hair infeasible: step back
            if todo.size == 0:
                break
            trial = t_b[todo] + theta[todo, None] * d[todo]
            fits = dual.spreads(trial)[:, 0] <= rhs[todo]
            t[todo[fits]] = trial[fits]
            todo = todo[~fits]
            theta[todo] *= 1.0 - 1e-9
        return t  # rows that never fit keep t_b


# --------------------------------------------------------------------------- mean shift


def applicable_mean_shift(problem: AllocationProblem) -> bool:
    """True when :class:`MeanShiftExact` applies: one requirement, mean-shift model with
    at least one free contributor that has a mean shift (otherwise :func:`applicable`)."""
    return (
        len(problem.requirements) == 1
        and problem.model == "mean-shift"
        and bool(np.any(problem.mean_shifts[problem.free] > 0))
    )


class _ShiftConstraint:
    """The scaled residual ``F1 = (σ − g(δ)) / g`` of one requirement's mean-shift constraint."""

    def __init__(self, nominal: float, lim):
        self.nominal, self.lim = nominal, lim
        # δ must stay inside the band: beyond it no σ meets the requirement
        self.domain = min(stack.room(nominal, lim.lower, lim.upper))

    def residual(self, sigma: float, delta: float, curvature: bool = True):
        """``(F1, (g, g′, g″))``; ``F1 = inf`` when ``δ`` leaves the domain."""
        if delta >= self.domain:
            return math.inf, (0.0, -math.inf, 0.0)
        if curvature:
            g = allowance_with_curvature(self.nominal, delta, self.lim)
        else:
            g = mean_shift_allowance(self.nominal, delta, self.lim)
        return (sigma - g[0]) / g[0], g


class MeanShiftExact:
    r"""Single-requirement mean-shift allocation without a conic solver.

    Parameters
    ----------
    problem : AllocationProblem
        Must satisfy :func:`applicable_mean_shift`.
    fallback : callable, optional
        Builds the solver that answers when Newton does not settle (the compiled conic
        problem, as :func:`allocator.solve.dispatch.continuous_solver` passes it); called
        at most once. Without it such a solve returns status 'failed'.

    Notes
    -----
    The constraint is ``h(t) = σ(t) − g(δ(t)) ≤ 0`` with ``σ² = Σ n w t² + σ_held²``
    (``w = a² f²``), ``δ = Σ n v t + δ_held`` (``v = |a| m``) and the concave, decreasing
    allowance ``g`` (:func:`~.problem.mean_shift_allowance`). With its multiplier μ the
    KKT conditions are, per part,

    .. math::

        C_i'(t_i) + α\,w_i\,t_i + β\,v_i = 0,\qquad α = μ/σ,\quad β = −μ\,g'(δ) ≥ 0,

    separable for given ``(α, β)`` (:func:`minimise_quadratic_price` with a shift), plus
    two scalar equations

    .. math::

        F_1 = σ − g(δ) = 0,\qquad F_2 = β + α\,σ\,g'(δ) = 0.

    A 1-D root in ``log α`` with β = 0 gives a feasible start on the constraint
    (``F_1`` is decreasing in α); damped Newton steps on ``(F_1, F_2)`` with the exact
    Jacobian (implicit differentiation of the per-part stationarity, ``g''`` by a
    central difference of the analytic ``g'``) finish. A lower bound comes from the
    tangent of ``h`` at the answer (a relaxation, ``h`` being convex): the separable
    minimum of ``C(t) + μ ℓ(t)``. If Newton does not settle, the conic solver takes over.

    References
    ----------
    .. [1] Greenwood, W. H. and Chase, K. W. (1987). A new tolerance analysis method for
       designers and manufacturers. Journal of Engineering for Industry 109(2), 112-116.
    .. [2] Chase, K. W., Greenwood, W. H., Loosli, B. G. and Hauglund, L. F. (1990).
       Least cost tolerance allocation for mechanical assemblies with automated process
       selection. Manufacturing Review 3(1), 49-59.
    """

    SOLVER_NAME = "lagrange-newton"

    def __init__(self, problem: AllocationProblem, *, fallback=None):
        if not applicable_mean_shift(problem):
            raise ValueError("needs one requirement under mean shift with free mean shifts")
        self.problem = problem
        free, held = problem.free, ~problem.free
        self.index = np.flatnonzero(free)
        self.lo = problem.tightest[free]
        self.hi = problem.loosest[free]
        self.n = problem.counts[free]
        self.curves = problem.curves.subset(self.index)
        req = problem.requirements[0]
        a = req.sensitivity
        w = (a * problem.sigma_factors) ** 2
        v = np.abs(a) * problem.mean_shifts
        self.w, self.v = w[free], v[free]
        t_held = problem.held[held]
        n_held = problem.counts[held]
        self.var_held = float(np.sum(n_held * w[held] * t_held**2))
        self.delta_held = float(np.sum(n_held * v[held] * t_held))
        self.held_cost = float(np.sum((problem.counts * problem.unit_costs(problem.held))[held]))
        self.evaluations = 0
        self._fallback = fallback
        self._conic = None
        self._warm = None  # (α, β) of the last settled solve: the next one (a sweep) starts there
        self._last_t = None  # the last tolerances evaluated (where the next evaluation's roots start)
        self._path = []  # (log key, log α, β) of the last two settled solves (_starts)

    def tolerances(self, alpha: float, beta: float) -> np.ndarray:
        self.evaluations += 1
        # Newton's prices move little from one evaluation to the next: each part's root
        # search starts at its last minimiser
        self._last_t = minimise_quadratic_price(self.curves, alpha * self.w, self.lo, self.hi,
                                                shift=beta * self.v, start=self._last_t)
        return self._last_t

    def _state(self, t):
        sigma = math.sqrt(float(self.n @ (self.w * t * t)) + self.var_held)
        delta = float(self.n @ (self.v * t)) + self.delta_held
        return sigma, delta

    @property
    def prices(self):
        """``(α, β)`` of the last settled solve, or None (see :meth:`start_from`)."""
        return self._warm

    def start_from(self, prices) -> None:
        """Start the next solve's Newton from ``prices`` (another solver's :attr:`prices`,
        e.g. the same requirement with other processes held); a start it does not settle
        from is dropped for the usual one."""
        if self._warm is None and prices is not None:
            self._warm = (float(prices[0]), float(prices[1]))

    def solve(self, overrides=None):
        """Allocate; returns an :class:`~allocator.solve.result.Allocation`."""
        return complete(self.solve_brief(overrides))

    def solve_brief(self, overrides=None):
        """As :meth:`solve`, the :class:`~allocator.solve.result.Allocation` of a settled
        Newton not yet built: a :class:`~allocator.solve.result.Brief` (other outcomes,
        the conic solver's included, as Allocations)."""
        problem = self.problem
        limits = problem.limits(overrides)
        reason = problem.diagnose(limits)
        if reason:
            return problem.infeasible(limits, reason, self.SOLVER_NAME)
        self.evaluations = 0
        out = self._kkt(limits[0])
        if out is not None:
            t_free, mu, bound = out
            t = problem.full(t_free)
            polished, theta = problem.polish(t, limits)
            cost = problem.total_cost(polished)
            gap = max(0.0, (cost - bound) / cost) if cost > 0 else 0.0
            verified = theta >= 1.0 - 1e-9 and problem.feasible(polished, limits, rtol=problem._rtol())
            if verified and gap <= GAP_LIMIT:
                message = ("KKT conditions solved by Newton (separable in the multipliers); "
                           "re-checked against the requirement")
                evaluations = self.evaluations

                def build():
                    return problem.result(polished, limits, status="optimal", message=message,
                                          solver=self.SOLVER_NAME, iterations=evaluations, gap=gap,
                                          multipliers=[mu])

                return Brief("optimal", message, cost, gap, self.SOLVER_NAME, polished, build)
        # Newton did not settle (or its answer did not verify): the conic solver decides
        if self._fallback is None:
            return problem.result(None, limits, status="failed", solver=self.SOLVER_NAME,
                                  message="Newton on the KKT conditions did not settle (no fallback solver given)")
        if self._conic is None:
            self._conic = self._fallback()
        return self._conic.solve(overrides)

    def _kkt(self, lim):
        """``(t, μ, lower bound)`` or None."""
        req = self.problem.requirements[0]
        if lim.lower is None and lim.upper is None or self.index.size == 0:
            return self._loosest()
        constraint = _ShiftConstraint(req.nominal, lim)
        if self._residual(self.hi, constraint, curvature=False)[0] <= 0:
            return self._loosest()
        # 0. from the prices the last solves' path points to (a sweep's next point), or
        # the last solve's own, when Newton settles there
        key = mean_shift_allowance(req.nominal, 0.0, lim)[0] if self._warm is not None else None
        settled = None
        for start in self._starts(key):
            settled = self._newton(start[0], constraint, start[1])
            if settled is not None and settled[2][1][0] <= 1e-9:
                break
            settled = None
        if settled is None:
            # 1. β = 0: a point on the constraint (F1 decreases as α grows)
            alpha = self._start(constraint)
            if alpha is None:
                return None
            # 2. Newton on (F1, F2)
            settled = self._newton(alpha, constraint)
            if settled is None:
                return None
        alpha, beta, state = settled
        self._warm = (alpha, beta)
        if key is not None and key > 0 and alpha > 0:
            self._path = [p for p in self._path[-1:] if p[0] != math.log(key)] + [
                (math.log(key), math.log(alpha), beta)]
        t, res, sigma, delta, g, g1, g2, scale = state
        if res[0] > 1e-9:
            return None
        return t, alpha * sigma, self._lower_bound(t, alpha, beta, sigma, g)

    def _starts(self, key):
        """Newton's starts ``(α, β)`` before the cold one: on the line through the last two
        settled solves' prices against ``key`` (the allowed σ at zero shift: it moves
        smoothly with any limit or target; log α and β linear in log key), then the last
        solve's prices."""
        if self._warm is None:
            return []
        starts = []
        if len(self._path) == 2 and key is not None and key > 0:
            (x0, a0, b0), (x1, a1, b1) = self._path
            x = math.log(key)
            if x1 != x0 and x not in (x0, x1):
                f = (x - x1) / (x1 - x0)
                alpha, beta = math.exp(a1 + f * (a1 - a0)), b1 + f * (b1 - b0)
                if math.isfinite(alpha) and math.isfinite(beta):
                    starts.append((alpha, max(beta, 0.0)))
        return starts + [self._warm]

    def _loosest(self):
        """``(t, μ, bound)`` when the loosest tolerances meet the requirement: no trade-off."""
        return self.hi.copy(), 0.0, self.held_cost + self._cost(self.hi)

    def _residual(self, t, constraint: _ShiftConstraint, curvature: bool = True):
        """``(F1, σ, δ, (g, g′, g″))`` at tolerances ``t`` (``g″`` only with ``curvature``)."""
        sigma, delta = self._state(t)
        f1, g = constraint.residual(sigma, delta, curvature)
        return f1, sigma, delta, g

    def _start(self, constraint: _ShiftConstraint) -> float | None:
        """α with β = 0 near the root of the decreasing ``F1(α)``: a start for Newton, no more."""
        mid = np.sqrt(self.lo * self.hi)
        with np.errstate(divide="ignore", invalid="ignore"):
            per = -self.curves.derivative(mid) / (self.w * mid)
        per = per[np.isfinite(per) & (per > 0)]
        guess = math.log(float(np.median(per)) if per.size else 1.0)

        def f1(x):
            return self._residual(self.tolerances(math.exp(x), 0.0), constraint, curvature=False)[0]

        x_lo = x_hi = guess
        for _ in range(400):
            if f1(x_hi) <= 0:
                break
            x_hi += math.log(10.0)
        else:
            return None
        for _ in range(400):
            if f1(x_lo) > 0:
                break
            x_lo -= math.log(10.0)
        _, x_b = _bracket_roots(lambda x, _which: f1(float(x[0])), [0], [x_lo], [x_hi],
                                [f1(x_lo)], [f1(x_hi)], xtol=1e-4)
        return math.exp(float(x_b[0]))

    def _system(self, alpha: float, beta: float, constraint: _ShiftConstraint):
        """``(t, [F1, F2], σ, δ, g, g′, g″, scale of F2)`` at ``(α, β)``, or None outside the domain."""
        t = self.tolerances(alpha, beta)
        f1, sigma, delta, (g, g1, g2) = self._residual(t, constraint)
        if not math.isfinite(f1):
            return None
        scale = alpha * sigma * abs(g1) + beta
        f2 = (beta + alpha * sigma * g1) / scale if scale > 0 else 0.0
        return t, np.array([f1, f2]), sigma, delta, g, g1, g2, scale

    def _newton(self, alpha: float, constraint: _ShiftConstraint, beta: float = 0.0):
        """Damped Newton on ``(F1, F2)`` from ``(α, β)``: ``(α, β, state)`` settled, or None."""
        state = self._system(alpha, beta, constraint)
        if state is None:
            return None
        for _ in range(60):
            res = state[1]
            if abs(res[0]) <= 1e-13 and abs(res[1]) <= 1e-11:
                return alpha, beta, state
            step = self._step(alpha, beta, state)
            if step is None:
                return None
            moved = self._line_search(alpha, beta, step, float(np.linalg.norm(res)), constraint)
            if moved is None:
                if abs(res[0]) <= 1e-10 and abs(res[1]) <= 1e-8:
                    return alpha, beta, state  # round-off floor: no step improves any more
                return None
            alpha, beta, state = moved
        return None

    def _step(self, alpha: float, beta: float, state) -> np.ndarray | None:
        """The Newton step in ``(α, β)`` with the exact Jacobian, or None if it is singular.

        ``∂t/∂α`` and ``∂t/∂β`` come from implicit differentiation of the per-part
        stationarity (zero for parts at a bound or on a table breakpoint).
        """
        t, res, sigma, delta, g, g1, g2, scale = state
        inside = (t > self.lo) & (t < self.hi) & ~self.curves.at_breakpoint(t)
        denominator = self.curves.curvature(t) + alpha * self.w
        with np.errstate(divide="ignore", invalid="ignore"):
            dt_da = np.where(inside, -self.w * t / denominator, 0.0)
            dt_db = np.where(inside, -self.v / denominator, 0.0)
        jac = np.empty((2, 2))
        for col, dt in enumerate((dt_da, dt_db)):
            d_sigma = float(self.n @ (self.w * t * dt)) / sigma
            d_delta = float(self.n @ (self.v * dt))
            jac[0, col] = (d_sigma - g1 * d_delta) / g
            d_n2 = alpha * g1 * d_sigma + alpha * sigma * g2 * d_delta
            d_n2 += sigma * g1 if col == 0 else 1.0
            jac[1, col] = d_n2 / scale if scale > 0 else 0.0
        try:
            step = np.linalg.solve(jac, -res)
        except np.linalg.LinAlgError:
            return None
        if not np.all(np.isfinite(step)):
            return None
        return step

    def _line_search(self, alpha: float, beta: float, step, base: float, constraint: _ShiftConstraint):
        """Halve ``step`` until the residual norm drops below ``base``: ``(α, β, state)`` or None."""
        lam = 1.0
        for _ in range(40):
            a_new = alpha + lam * step[0]
            b_new = max(beta + lam * step[1], 0.0)
            trial = self._system(a_new, b_new, constraint) if a_new > 0 else None
            if trial is not None and float(np.linalg.norm(trial[1])) < base:
                return a_new, b_new, trial
            lam *= 0.5
        return None

    def _lower_bound(self, t, alpha: float, beta: float, sigma: float, g: float) -> float:
        """Cost lower bound: the tangent ℓ of the convex ``h`` at ``t`` relaxes the constraint."""
        mu = alpha * sigma
        price = alpha * self.w * t + beta * self.v  # μ ∂h/∂t per part
        t_b = minimise_linear_price(self.curves, price, self.lo, self.hi)
        return (self.held_cost + self._cost(t_b) + float(self.n @ (price * (t_b - t)))
                + mu * (sigma - g))

    def _cost(self, t) -> float:
        return float(self.n @ self.curves.value(t))


# --------------------------------------------------------------------------- refinement


def refine(problem: AllocationProblem, limits, multipliers, t_start, *, max_steps: int = 50, candidates=None):
    """Newton's method on the dual, from a conic solver's answer, to machine precision.

    Parameters
    ----------
    problem : AllocationProblem
        Separable (:func:`separable`).
    limits : list of RequirementLimits
    multipliers : sequence of float
        ``−∂cost/∂(allowance)`` per requirement from the conic solver's duals.
    t_start : numpy.ndarray
        The conic solver's tolerances (all contributors).

    Returns
    -------
    (t, multipliers, bound) or None
        Tolerances (all contributors) satisfying the KKT conditions to round-off, the
        refined multipliers, and the dual lower bound; None when Newton does not settle
        (the caller keeps the conic answer).

    Notes
    -----
    Solves ``spread_r(t(λ)) = S_r`` for the requirements that bind, by Newton steps
    with the analytic Jacobian of :meth:`SeparableDual.jacobian` and a backtracking
    line search on the residual; a multiplier that turns negative leaves the active set,
    a requirement the iterate violates joins it.

    Under worst case a table's ``t(λ)`` jumps. A table contributor the conic answer puts
    on a listed tolerance (within 1e-6) stays there. One strictly inside a piece of slope
    ``s`` is optimal only if ``Σ_r λ_r |a_r| = −s`` there, which fixes a relation between
    the multipliers while its tolerance is set by the constraints: it becomes an unknown
    of the Newton system, with that slope condition as its equation.

    At the end ``t(λ)`` minimises the Lagrangian (the weak-duality bound is computed
    with every contributor free), so with every constraint met and complementary
    slackness this is the optimum (KKT sufficiency for a convex problem).
    """
    dual = SeparableDual(problem)
    if dual.index.size == 0:
        return None
    rhs, allowance = dual.rhs(limits)
    finite = np.isfinite(rhs)
    rhs0 = np.where(finite, rhs, 0.0)
    lam = _start_multipliers(dual, multipliers, allowance)
    scale = np.where(finite & (rhs != 0), np.abs(rhs), 1.0)
    t_free = np.asarray(t_start, dtype=float)[problem.free]
    at_limit = finite & (dual.spreads(t_free) >= rhs - 1e-6 * scale)
    if candidates is None:
        for mask in _candidate_sets(lam, rhs0, finite, at_limit):
            out = refine(problem, limits, multipliers, t_start, max_steps=max_steps, candidates=mask)
            if out is not None:
                return out
        return None
    active = np.asarray(candidates, dtype=bool) & finite
    lam = np.where(active, lam, 0.0)

    newton = _DualNewton(dual, rhs0, scale, t_free)
    t, v, r, r_inner = newton.residual(lam)
    for _ in range(max_steps):
        active |= finite & (r > 1e-12)  # requirements the iterate violates join
        idx = np.flatnonzero(active)
        res = np.concatenate([r[idx], r_inner])
        if np.all(np.abs(res) <= 1e-12) and np.all(r[~active] <= 1e-12):
            break
        step = _newton_step(newton.jacobian(t, v, idx), res)
        if step is None:
            # the candidates cannot all bind (their multipliers move too few free
            # tolerances): the slack one with the smallest multiplier leaves
            if not _drop_weakest(active, lam, r, scale):
                return None
            t, v, r, r_inner = newton.residual(lam)
            continue
        found = newton.line_search(lam, idx, step, float(np.linalg.norm(res)))
        if found is None:
            return None  # leaves its piece: the slope condition no longer holds
        lam, (t, v, r, r_inner) = found
        # a multiplier driven to zero with its constraint slack leaves the active set
        active &= ~((lam <= 0) & (r < 0))
    else:
        return None
    if np.any(r > 1e-9) or np.any(lam < 0):
        return None
    return problem.full(t), dual.multipliers(lam, allowance), dual.bound(lam, rhs0)


def _start_multipliers(dual: SeparableDual, multipliers, allowance) -> np.ndarray:
    """The dual's λ from the conic solver's ``−∂cost/∂(allowance)`` (the squared models' λ is per spread²)."""
    y = np.asarray(multipliers, dtype=float)
    if dual.squared:
        return np.where(y > 0, y / (2.0 * np.where(allowance > 0, allowance, np.inf)), 0.0)
    return np.clip(y, 0.0, None)


def _candidate_sets(lam, rhs0, finite, at_limit) -> list[np.ndarray]:
    """Masks of the requirements to try as binding, most likely first, without repeats.

    The duals say which requirements bind (with costs over many decades a binding one can
    sit 1e-5 inside its limit while its dual is 1e-7 of the largest); interior-point duals
    of slack ones are not exactly 0, so the sets go from the clearest positive duals to
    every positive one, then the requirements at their limit. Any success is a KKT point,
    hence the optimum.
    """
    share = np.where(finite, lam * np.abs(rhs0), 0.0)
    top = float(share.max()) if share.size else 0.0
    tried = []
    for mask in (at_limit | (share > 1e-9 * top), at_limit | (lam > 0), at_limit):
        if not any(np.array_equal(mask, m) for m in tried):
            tried.append(mask)
    return tried


def _newton_step(jac: np.ndarray, res: np.ndarray) -> np.ndarray | None:
    """The Newton step ``−J⁻¹ r``, or None when ``J`` is (numerically) singular."""
    try:
        singular = np.linalg.cond(jac) > 1e13
        step = None if singular else np.linalg.solve(jac, -res)
    except np.linalg.LinAlgError:
        step = None
    if step is None or not np.all(np.isfinite(step)):
        return None
    return step


def _drop_weakest(active: np.ndarray, lam: np.ndarray, r: np.ndarray, scale: np.ndarray) -> bool:
    """Take the slack active requirement with the smallest multiplier out (in place); False if none is slack."""
    slack = active & (r < 0)
    if not slack.any():
        return False
    drop = int(np.argmin(np.where(slack, lam * scale, np.inf)))
    active[drop] = False
    lam[drop] = 0.0
    return True


class _DualNewton:
    """Residuals, Jacobian and line search of :func:`refine`'s Newton system.

    Unknowns: the multipliers of the active requirements and, under worst case, the
    tolerances of table contributors strictly inside a piece (``inner``); equations: the
    active spreads at their limits and the pieces' slope conditions.
    """

    def __init__(self, dual: SeparableDual, rhs0: np.ndarray, scale: np.ndarray, t_free: np.ndarray):
        self.dual, self.rhs0, self.scale = dual, rhs0, scale
        self.inner, self.piece_slope, self.piece_lo, self.piece_hi = _table_pieces(dual, t_free)
        self.slope_scale = np.maximum(np.abs(self.piece_slope), 1e-300)

    def residual(self, lam):
        """``(t, v, r, r_inner)``: tolerances at ``lam``, scaled spread and slope-condition residuals."""
        dual = self.dual
        v = dual.combined(lam)
        t = dual.tolerances(v)
        r = (dual.spreads(t) - self.rhs0) / self.scale
        return t, v, r, (v[self.inner] + self.piece_slope) / self.slope_scale

    def jacobian(self, t, v, idx) -> np.ndarray:
        """Jacobian of ``(r[idx], r_inner)`` in ``(λ[idx], t[inner])``."""
        dual, inner, scale = self.dual, self.inner, self.scale
        size = idx.size + inner.size
        jac = np.zeros((size, size))
        jac[: idx.size, : idx.size] = dual.jacobian(t, v)[np.ix_(idx, idx)] / scale[idx, None]
        jac[: idx.size, idx.size :] = dual.coef[np.ix_(idx, inner)] / scale[idx, None]
        jac[idx.size :, : idx.size] = dual.weight[np.ix_(idx, inner)].T / self.slope_scale[:, None]
        return jac

    def line_search(self, lam, idx, step, base: float):
        """Backtrack along ``step`` until the residual norm drops below ``base``.

        Returns ``(λ, residual(λ))`` (with ``dual.pinned`` moved), or None when an inner
        table tolerance would leave its piece.
        """
        dual, inner = self.dual, self.inner
        pinned = dual.pinned.copy()
        alpha = 1.0
        for _ in range(40):
            trial = lam.copy()
            trial[idx] = np.maximum(lam[idx] + alpha * step[: idx.size], 0.0)
            moved = pinned[inner] + alpha * step[idx.size :]
            if np.any(moved < self.piece_lo) or np.any(moved > self.piece_hi):
                return None
            dual.pinned[inner] = moved
            state = self.residual(trial)
            new = float(np.linalg.norm(np.concatenate([state[2][idx], state[3]])))
            if new < base or alpha < 1e-6:
                break
            alpha *= 0.5
        return trial, state


def _table_pieces(dual: SeparableDual, t_free: np.ndarray):
    """Worst case: pin table contributors (in ``dual.pinned``) and list those inside a piece.

    A table contributor the conic answer puts on a listed tolerance (within 1e-6) stays
    there; one strictly inside a piece becomes an unknown. Returns ``(inner, slope, lo,
    hi)``: their indices, the pieces' slopes [cost/length] and the bounds they must stay in.
    """
    inner = []
    piece_slope, piece_lo, piece_hi = [], [], []
    if not dual.squared:
        for j in dual.curves.tables:
            x = np.asarray(dual.curves.curves[j].points_tolerance)
            c = np.asarray(dual.curves.curves[j].points_cost)
            near = int(np.argmin(np.abs(x - t_free[j])))
            if abs(x[near] - t_free[j]) <= 1e-6 * x[-1]:
                dual.pinned[j] = min(max(x[near], dual.lo[j]), dual.hi[j])
                continue
            k = int(np.clip(np.searchsorted(x, t_free[j]) - 1, 0, x.size - 2))
            inner.append(j)
            piece_slope.append((c[k + 1] - c[k]) / (x[k + 1] - x[k]))
            piece_lo.append(max(x[k], dual.lo[j]))
            piece_hi.append(min(x[k + 1], dual.hi[j]))
            dual.pinned[j] = t_free[j]
    return np.array(inner, dtype=int), np.array(piece_slope, dtype=float), piece_lo, piece_hi


def _kinks(dual: SeparableDual) -> np.ndarray:
    """Worst case: the sorted log λ at which a table contributor's minimiser jumps.

    The minimiser of ``C(t) + λ w t`` over a convex table moves from one listed
    tolerance to the next where ``λ w`` passes minus a piece's slope ``s_j``, i.e. at
    ``λ = −s_j / w``; between these λ the spread is continuous. (Under rss the minimiser
    of ``C(t) + λ w t²`` is continuous in λ: no kinks.)
    """
    if dual.squared or dual.weight.shape[0] != 1:
        return np.empty(0)
    out = []
    w = dual.weight[0]
    for j in dual.curves.tables:
        if not w[j] > 0:
            continue
        _, _, slopes = table_points(dual.curves.curves[j])
        lam = -np.asarray(slopes) / w[j]
        out.append(np.log(lam[lam > 0]))
    return np.unique(np.concatenate(out)) if out else np.empty(0)


def _polyline(known: dict, x: np.ndarray) -> np.ndarray:
    """Through the points ``known`` (x -> y, two or more): linear between the two nearest
    to each ``x``, the end pair's line beyond them."""
    xs = np.array(sorted(known))
    ys = np.array([known[k] for k in xs])
    j = np.clip(np.searchsorted(xs, x), 1, xs.size - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return ys[j - 1] + (ys[j] - ys[j - 1]) / (xs[j] - xs[j - 1]) * (x - xs[j - 1])


def _kink_brackets(f, which, kinks, a, b, fa, fb, *, eps: float = 2e-14):
    """Narrow each bracket ``[a, b]`` (log λ) onto one continuous piece of ``f``.

    ``f`` is evaluated at every kink inside each bracket (one call for all); the
    bracket becomes the two nearest kinks (or ends) around the sign change. Where the
    root is the jump itself (``f`` changes sign across a kink), the bracket closes to
    ``kink ± eps·(1 + |kink|)``, narrower than the root finder's tolerance: bisecting
    onto a jump would take some 45 halvings. Elsewhere ``f`` is continuous on the
    narrowed bracket and regula falsi converges fast. Every bracket returned still has
    ``f(a) > 0 >= f(b)``.
    """
    a, b, fa, fb = (np.array(x, dtype=float) for x in (a, b, fa, fb))
    lo_k = np.searchsorted(kinks, a, side="right")
    hi_k = np.searchsorted(kinks, b, side="left")
    counts = np.maximum(hi_k - lo_k, 0)
    if counts.sum():
        rows = np.repeat(np.arange(a.size), counts)
        first = np.repeat(lo_k - np.cumsum(counts) + counts, counts)
        xs = kinks[np.arange(rows.size) + first]
        fs = f(xs, which[rows])
        # per row, the largest kink with f above zero and the smallest at or below it
        up = fs > 0
        last_up = np.full(a.size, -1)
        np.maximum.at(last_up, rows[up], np.flatnonzero(up))
        first_down = np.full(a.size, rows.size)
        np.minimum.at(first_down, rows[~up], np.flatnonzero(~up))
        move = (last_up >= 0) & (xs[np.maximum(last_up, 0)] > a)
        a[move], fa[move] = xs[last_up[move]], fs[last_up[move]]
        move = (first_down < rows.size) & (xs[np.minimum(first_down, rows.size - 1)] < b)
        b[move], fb[move] = xs[first_down[move]], fs[first_down[move]]
    # a jump across a kink at either end: test just inside each end (one call for all)
    n = a.size
    below_b = b - eps * (1.0 + np.abs(b))
    above_a = a + eps * (1.0 + np.abs(a))
    probe = np.concatenate([below_b, above_a])
    at_kink = np.concatenate([np.isin(b, kinks) & (below_b > a), np.isin(a, kinks) & (above_a < b)])
    k = np.flatnonzero(at_kink)
    if k.size:
        fp = np.full(2 * n, np.nan)
        fp[k] = f(probe[k], which[k % n])
        jump_b = fp[:n] > 0  # still above zero just below the kink b: the root is that jump
        jump_a = fp[n:] <= 0  # already at or below zero just above the kink a
        both = jump_a & jump_b  # only round-off makes both hold: keep the plain bracket
        jump_b &= ~both
        jump_a &= ~both
        a[jump_b], fa[jump_b] = below_b[jump_b], fp[:n][jump_b]
        b[jump_a], fb[jump_a] = above_a[jump_a], fp[n:][jump_a]
    return a, b, fa, fb


def _bracket_roots(f, which, a, b, fa, fb, *, xtol: float = 1e-13, maxiter: int = 300):
    """Shrink each ``[a, b]`` with ``f(a) > 0 >= f(b)`` (f non-increasing) around its root.

    Many brackets in lock step: ``f(x, which)`` gives the values at ``x`` for the
    brackets ``which`` (positions into ``a``). Illinois-modified regula falsi
    (superlinear for smooth f) with a bisection step whenever two steps did not halve a
    bracket (steps of a table's f); a bracket stops moving once ``b − a <= xtol·(1 + |a|)``
    or ``f(b) = 0``. Returns the final ``(a, b)`` arrays. The one root finder of the
    exact paths: a sweep's many right-hand sides, a single allocation (one bracket) and
    the mean-shift start. (Our own few lines instead of scipy.optimize.brentq, whose
    import costs more than a whole command-line allocation.)
    """
    a, b, fa, fb = (np.array(x, dtype=float) for x in (a, b, fa, fb))
    which = np.asarray(which)
    side = np.zeros(a.size)  # -1: the last step moved a, +1: it moved b
    width = b - a
    moving = np.ones(a.size, dtype=bool)
    for i in range(maxiter):
        moving &= (b - a > xtol * (1.0 + np.abs(a))) & (fb != 0.0)
        if not moving.any():
            break
        k = slice(None) if moving.all() else np.flatnonzero(moving)
        ak, bk, fak, fbk = a[k], b[k], fa[k], fb[k]
        gap = bk - ak
        halve = fak == fbk
        if i % 2 == 0:
            if i > 0:
                halve |= gap > 0.5 * width[k]
            width[k] = gap
        x = bk - fbk * gap / np.where(halve, 1.0, fbk - fak)  # no division by 0 where it halves
        x = np.where(halve | ~((ak < x) & (x < bk)), 0.5 * (ak + bk), x)
        fx = f(x, which[k])
        above = fx > 0
        before = side[k]
        a[k] = np.where(above, x, ak)
        b[k] = np.where(above, bk, x)
        fa[k] = np.where(above, fx, fak * np.where(before == 1.0, 0.5, 1.0))
        fb[k] = np.where(above, fbk * np.where(before == -1.0, 0.5, 1.0), fx)
        side[k] = np.where(above, -1.0, 1.0)
    return a, b


def minimise_linear_price(cs, s, lo, hi) -> np.ndarray:
    """Per part, the minimiser of ``C(t) + s t`` on ``[lo, hi]`` (``C'(t) = −s``).

    Each curve family gives its own (:meth:`allocator.costs.CurveFamily.linear_minimiser`):
    ``a + b/t^k``: ``(k b / s)^(1/(k+1))``; ``a + b e^(−ct)``: ``ln(b c / s) / c``; a convex
    table: the breakpoint whose subgradient holds ``−s``. ``s <= 0``: the loosest limit.
    """
    s = np.broadcast_to(np.asarray(s, dtype=float), np.shape(lo))
    return np.clip(cs.linear_minimiser(s), lo, hi)


def minimise_price(cs, price, lo, hi, power: int):
    """Per part, the minimiser of ``C(t) + price·t^power`` on ``[lo, hi]``, ``power`` 1 or 2,
    and the unit cost ``C`` there.

    The Lagrangian step of a worst-case (``power`` 1: as :func:`minimise_linear_price`) or
    RSS constraint (``power`` 2: as :func:`minimise_quadratic_price` with ``q = 2·price``);
    a price that reaches no finite root (zero, overflow) gives the loosest limit. Returns
    ``(t, C(t))`` [length], [currency] (0 for a part without a cost curve).

    The branch and bound's bounds call this thousands of times: each family's closed
    forms are asked directly, group by group (the same arithmetic as
    :meth:`~allocator.solve.problem.CurveSet.linear_minimiser`, ``quadratic_minimiser`` and
    ``value``, without their per-call dispatch).
    """
    lo, hi = np.asarray(lo, dtype=float), np.asarray(hi, dtype=float)
    price = np.broadcast_to(np.asarray(price, dtype=float), lo.shape)
    t = np.full(lo.shape, np.inf)  # a part without a cost curve: nothing pulls it tighter
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        for fam, idx, p in cs.groups:
            s = price[idx]
            if isinstance(fam, SmoothFamily):
                x = fam.slope_root(p, s) if power == 1 else fam.quadratic_root(p, 2.0 * s)
                t[idx] = np.where(np.isnan(x) | (s <= 0), np.inf, x)
            elif power == 1:
                t[idx] = fam.linear_minimiser(p, s)
            else:
                t[idx] = fam.quadratic_minimiser(p, 2.0 * s, lo[idx], hi[idx])
        t = np.clip(np.nan_to_num(np.clip(t, lo, hi), nan=hi, posinf=hi), lo, hi)
        cost = np.zeros(lo.shape)
        for fam, idx, p in cs.groups:
            cost[idx] = fam.value(p, t[idx])
    return t, cost


def minimise_quadratic_price(cs, q, lo, hi, shift=None, start=None) -> np.ndarray:
    """Per part, the minimiser of ``C(t) + q t²/2 (+ shift·t)`` on ``[lo, hi]``.

    Each curve family gives its own
    (:meth:`allocator.costs.CurveFamily.quadratic_minimiser`). Without ``shift`` in closed
    form: ``a + b/t^k`` gives ``(k b / q)^(1/(k+2))``, ``a + b e^(−ct)`` gives
    ``W₀(b c² / q) / c``. With ``shift`` (``C'(t) + q t + shift = 0``, the mean-shift
    stationarity) the root is bracketed by these one-term closed forms and found by
    safeguarded Newton steps in ``log t`` (vectorised). Tables: the last piece whose left
    end has a non-positive slope of the whole expression.
    """
    q = np.broadcast_to(np.asarray(q, dtype=float), np.shape(lo))
    if shift is not None:
        shift = np.broadcast_to(np.asarray(shift, dtype=float), np.shape(lo))
    return np.clip(cs.quadratic_minimiser(q, lo, hi, shift, start), lo, hi)
