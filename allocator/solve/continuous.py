"""Least-cost allocation as one convex conic problem (cvxpy), for any number of requirements.

Formulation in scaled variables ``τ = t / ℓ`` (ℓ: geometric mean of the free limits) and
costs divided by a cost scale, so that a case in any length unit or currency gives the
solver the same numbers (up to the case's own round-off; no absolute constant enters,
see :meth:`CompiledAllocation.solver_data`):

- objective ``Σ n_i C_i(ℓ τ_i) / c`` with exact cones (:func:`allocator.costs.cvx_costs`:
  ``inv_pos``, ``power``, ``exp``, piecewise-linear maxima), vectorised per family;
- ``lower_i/ℓ ≤ τ_i ≤ upper_i/ℓ`` (held contributors are constants);
- worst case: ``Σ n|a| t ≤ min(ȳ − L, U − ȳ) − W_held`` (linear);
- rss: ``‖(√n a f t, σ_held)‖₂ ≤ σ_max`` (second-order cone), σ_max from
  :func:`allocator.stack.sigma_limit`;
- mean shift: ``‖·‖₂ ≤ s`` and ``s ≤ g(δ_k) + g'(δ_k)(δ(t) − δ_k)`` for K tangent points
  of the concave allowance ``g`` (:func:`~allocator.solve.problem.mean_shift_allowance`);
  the tangents are moved to the current solution's δ until the true constraint holds
  (outer approximation / cutting planes; exact in one step when ``g`` is linear, i.e.
  one-sided limits).

Every right-hand side that depends on a limit or a fallout target is a cvxpy
``Parameter`` and the problem is DPP-compliant, so :meth:`CompiledAllocation.solve` with
other limits re-uses the compiled problem (what a frontier sweep needs).
"""

from __future__ import annotations

import math

import numpy as np

from .. import costs, stack
from .problem import AllocationProblem, allowance_with_curvature, mean_shift_allowance, prepare, scaled_curve

__all__ = ["CompiledAllocation", "SOLVER_OPTIONS"]

# Tight tolerances (1e-10 tends to stall in Clarabel's last steps). Every tier names all
# its tolerances: cvxpy re-uses a cached Clarabel instance whose settings persist.
SOLVER_OPTIONS = {
    "CLARABEL": dict(tol_gap_abs=1e-9, tol_gap_rel=1e-9, tol_feas=1e-9, tol_ktratio=1e-7, max_iter=300),
    "CLARABEL-STANDARD": dict(tol_gap_abs=1e-8, tol_gap_rel=1e-8, tol_feas=1e-8, tol_ktratio=1e-6, max_iter=300),
    "SCS": dict(eps_abs=1e-9, eps_rel=1e-9, max_iters=200_000),
    "ECOS": dict(abstol=1e-10, reltol=1e-10, feastol=1e-10, max_iters=300),
}
# Tried in order until one gives a verified optimum; "-STANDARD" retries a solver with
# its default tolerances (a tight request can end "inaccurate" where the default does not).
SOLVER_ORDER = ("CLARABEL", "CLARABEL-STANDARD", "SCS", "ECOS")
CUT_SLOTS = 8  # tangent planes per mean-shift requirement
FIRST_CUTS = 3  # tangents placed before the first solve (the rest start switched off)
CUT_RTOL = 1e-9  # σ ≤ g(δ)(1 + CUT_RTOL) ends the cutting-plane loop
MAX_CUT_ROUNDS = 80
POLISH_LIMIT = 1e-6  # a larger shrink means the solver's answer was not accurate
GAP_RTOL = 1e-6  # 'optimal' needs a certified relative gap at most this (honest: <= ~2e-9)


class _Row:
    """The cvxpy pieces of one requirement's constraint."""

    def __init__(self, kind, scale, constraint, rhs=None, cuts=(), delta_coef=None):
        self.kind = kind
        self.scale = scale  # ρ: response units per unit of the scaled constraint
        self.constraint = constraint
        self.rhs = rhs
        self.cuts = list(cuts)  # (B, G, constraint) per tangent slot
        self.delta_coef = delta_coef
        self.points = None  # δ of each tangent slot


class CompiledAllocation:
    """An allocation problem compiled once, solvable for many limit values.

    Parameters
    ----------
    case : Case
    model : str
        'worst-case', 'rss' or 'mean-shift'.
    fix : dict, optional
        Contributor name -> ± tolerance to hold [length].
    solvers : sequence of str, optional
        cvxpy solver names to try in order (default: Clarabel, then SCS, then ECOS
        where installed).

    Examples
    --------
    >>> from allocator.case import load_case
    >>> case = load_case("cases/gearbox_end_play.toml")
    >>> compiled = CompiledAllocation(case, "rss")
    >>> tight, loose = (compiled.solve({"end_play": {"upper": u}}) for u in (0.3, 0.35))
    >>> tight.status, loose.status
    ('optimal', 'optimal')
    >>> bool(loose.total_cost < tight.total_cost)  # the looser upper limit costs less
    True
    """

    def __init__(self, case, model: str, fix=None, *, solvers=None):
        self._init(prepare(case, model, fix), solvers)

    @classmethod
    def from_problem(cls, problem: AllocationProblem, *, solvers=None) -> "CompiledAllocation":
        self = cls.__new__(cls)
        self._init(problem, solvers)
        return self

    def _init(self, problem: AllocationProblem, solvers):
        import cvxpy as cp

        self.problem = problem
        installed = set(cp.installed_solvers())
        order = SOLVER_ORDER if solvers is None else tuple(solvers)
        self.solvers = tuple(s for s in order if s.split("-")[0] in installed)
        self._settled_by = None  # the tier of the last verified optimum (tried first next time)
        if not self.solvers:
            raise RuntimeError(f"none of the solvers {', '.join(order)} is installed")
        p = problem
        free = np.flatnonzero(p.free)
        self.index = free
        length, money = p.length_scale, p.cost_scale
        n = p.counts
        held = ~p.free
        t_held = np.where(held, p.held, 0.0)
        self.held_cost = float(np.sum((n * p.unit_costs(np.where(held, p.held, 1.0)))[held]))

        self.tau = tau = cp.Variable(free.size, name="tau") if free.size else None
        rows: list[_Row | None] = []
        constraints = []
        if free.size:
            curves = [scaled_curve(p.curves.curves[i], length, money) for i in free]
            objective = costs.cvx_costs(curves, tau, n[free])
            constraints += [tau >= p.tightest[free] / length, tau <= p.loosest[free] / length]
        for k, req in enumerate(p.requirements):
            a = req.sensitivity
            if p.model == "worst-case":
                coef = (n * np.abs(a))[free] * length
                nz = np.flatnonzero(coef > 0)
                if nz.size == 0:
                    rows.append(None)
                    continue
                scale = float(coef.max())
                rhs = cp.Parameter(name=f"room_{k}")
                con = (coef[nz] / scale) @ tau[nz] <= rhs
                constraints.append(con)
                rows.append(_Row("worst-case", scale, con, rhs))
                continue
            w = (np.sqrt(n) * np.abs(a) * p.sigma_factors)[free] * length
            nz = np.flatnonzero(w > 0)
            if nz.size == 0:
                rows.append(None)
                continue
            scale = float(w.max())
            spread = cp.multiply(w[nz] / scale, tau[nz])
            sigma_held = stack.rss_sigma(a[held], n[held], (p.sigma_factors * t_held)[held])
            if sigma_held > 0:
                spread = cp.hstack([spread, cp.Constant(np.array([sigma_held / scale]))])
            norm = cp.norm(spread, 2)
            if p.model == "rss":
                rhs = cp.Parameter(nonneg=True, name=f"sigma_max_{k}")
                con = norm <= rhs
                constraints.append(con)
                rows.append(_Row("rss", scale, con, rhs))
                continue
            sigma = cp.Variable(name=f"sigma_{k}")
            dcoef = (n * np.abs(a) * p.mean_shifts)[free] * length / scale
            dz = np.flatnonzero(dcoef > 0)
            delta = (dcoef[dz] @ tau[dz]) if dz.size else None
            cuts = []
            for j in range(CUT_SLOTS):
                b = cp.Parameter(name=f"cut_{k}_{j}_b")
                g = cp.Parameter(nonpos=True, name=f"cut_{k}_{j}_g")
                con = sigma <= (b + g * delta if delta is not None else b)
                cuts.append((b, g, con))
                constraints.append(con)
            con = norm <= sigma
            constraints.append(con)
            rows.append(_Row("mean-shift", scale, con, cuts=cuts, delta_coef=dcoef))
        self.rows = rows
        if free.size:
            self.cvx = cp.Problem(cp.Minimize(objective), constraints)
        else:
            self.cvx = None

    # ------------------------------------------------------------------ properties

    @property
    def is_dpp(self) -> bool:
        """True when re-solving with new limits skips recompilation (cvxpy DPP)."""
        return self.cvx is None or self.cvx.is_dpp()

    # ------------------------------------------------------------------ parameters

    def _set_rhs(self, limits, t_loose):
        """Set the limit-dependent right-hand sides; returns the mean-shift rows."""
        p = self.problem
        held = ~p.free
        t_held = np.where(held, p.held, 0.0)
        shifting = []
        for req, lim, row in zip(p.requirements, limits, self.rows):
            if row is None:
                continue
            a = req.sensitivity
            unbounded = lim.lower is None and lim.upper is None
            if row.kind == "worst-case":
                room = min(stack.room(req.nominal, lim.lower, lim.upper))
                room -= stack.worst_case_half_width(a, p.counts, t_held)
                if not math.isfinite(room):  # no limit: never binding (twice the loosest spread)
                    room = 2.0 * stack.worst_case_half_width(a, p.counts, t_loose)
                row.rhs.value = room / row.scale
            elif row.kind == "rss":
                if unbounded:  # never binding; relative, so the same in every unit
                    sigma_max = 2.0 * stack.rss_sigma(a, p.counts, p.sigma_factors * t_loose)
                else:
                    sigma_max = stack.sigma_limit(req.nominal, lim.fallout, lim.lower, lim.upper)
                row.rhs.value = sigma_max / row.scale
            else:
                shifting.append((req, lim, row))
        return shifting

    def _place_cuts(self, req, lim, row, points):
        """Tangents of g at ``points`` (values of δ; NaN: slot switched off) into the slots."""
        p = self.problem
        held = ~p.free
        t_held = np.where(held, p.held, 0.0)
        delta_held = stack.mean_shift_delta(req.sensitivity, p.counts, p.mean_shifts, t_held)
        # an unused slot must not bind: any σ above what the loosest tolerances give
        sigma_loose = stack.rss_sigma(req.sensitivity, p.counts, p.sigma_factors * p.loosest)
        off = (2.0 * sigma_loose + 1e-300) / row.scale
        unbounded = lim.lower is None and lim.upper is None
        for (b, g, _), point in zip(row.cuts, points):
            if unbounded or not np.isfinite(point):
                b.value, g.value = off, 0.0
                continue
            value, slope, _ = mean_shift_allowance(req.nominal, point, lim)
            slope = min(slope, 0.0)
            b.value = (value + slope * (delta_held - point)) / row.scale
            g.value = slope
        row.points = np.asarray(points, dtype=float)

    def _first_cuts(self, shifting):
        """The first tangents of every mean-shift row: evenly over the reachable δ."""
        p = self.problem
        for req, lim, row in shifting:
            low = stack.mean_shift_delta(req.sensitivity, p.counts, p.mean_shifts, p.tightest)
            high = stack.mean_shift_delta(req.sensitivity, p.counts, p.mean_shifts, p.loosest)
            high = min(high, self._domain(req, lim) * (1 - 1e-9))
            points = np.full(len(row.cuts), np.nan)
            points[:FIRST_CUTS] = np.linspace(low, max(low, high), FIRST_CUTS)
            self._place_cuts(req, lim, row, points)

    def _domain(self, req, lim):
        """Largest δ for which the worst mean is still inside the limits."""
        return min(stack.room(req.nominal, lim.lower, lim.upper))

    # ------------------------------------------------------------------ solve

    def solver_data(self, overrides=None, solver: str = "CLARABEL"):
        """The arrays the conic solver is handed in the first solve with these limits.

        Parameters
        ----------
        overrides : dict, optional
            As for :meth:`solve`.
        solver : str
            cvxpy solver name.

        Returns
        -------
        dict or None
            cvxpy's problem data (``A``, ``b``, ``c``, cone dimensions) with every
            right-hand side and the first tangent planes set as :meth:`solve` sets them;
            None when every contributor is held. In the scaled variables the same case
            in any length unit or currency gives the same arrays (what the scaling
            tests check).
        """
        if self.cvx is None:
            return None
        p = self.problem
        self._first_cuts(self._set_rhs(p.limits(overrides), p.loosest))
        data, _, _ = self.cvx.get_problem_data(solver.split("-")[0])
        return data

    def solve(self, overrides=None):
        """Allocate with the case's limits, or with ``overrides``.

        Parameters
        ----------
        overrides : dict, optional
            Requirement name -> dict with any of ``lower``, ``upper``, ``fallout_ppm``.

        Returns
        -------
        Allocation
        """
        p = self.problem
        limits = p.limits(overrides)
        reason = p.diagnose(limits)
        if reason:
            return p.infeasible(limits, reason, self.solvers[0].lower())
        if self.cvx is None:  # everything held: only the check remains
            t = p.held.copy()
            ok = p.feasible(t, limits, rtol=p._rtol())
            return p.result(t, limits, status="optimal" if ok else "infeasible",
                            message="every contributor is held", solver="none")
        shifting = self._set_rhs(limits, p.loosest)
        notes = []
        fallback = None
        # a re-solve (other limits) starts with the tier that gave the last verified
        # optimum: where the tight tolerances ended 'inaccurate' they will as a rule again
        order = self.solvers
        if self._settled_by in order:
            order = (self._settled_by,) + tuple(s for s in order if s != self._settled_by)
        for solver in order:
            outcome = self._attempt(solver, limits, shifting)
            if outcome is None:
                notes.append(f"{solver.lower()} failed")
                continue
            t, accurate, iterations, multipliers, note = outcome
            polished, theta = p.polish(t, limits)
            cost = p.total_cost(polished)
            refined = self._refine(limits, multipliers, t, cost) if accurate else None
            # lower bounds certified by weak duality (never the solver's own objective)
            bounds = [lagrangian_bound(p, limits, polished, multipliers)]
            if refined is not None:
                polished, theta, cost, multipliers, refined_bound = refined
                bounds += [refined_bound, lagrangian_bound(p, limits, polished, multipliers)]
                note = "KKT refined" + (f"; {note}" if note else "")
            bounds = [b for b in bounds if b is not None]
            bound = max(bounds) if bounds else None
            gap = float(max(0.0, (cost - bound) / abs(cost))) if cost != 0 and bound is not None else None
            verified = p.feasible(polished, limits, rtol=p._rtol())
            close = gap is not None and gap <= GAP_RTOL
            if accurate and verified and theta >= 1.0 - POLISH_LIMIT and close:
                message = "conic solve re-checked against every requirement"
                if note:
                    message += f"; {note}"
                if theta < 1.0:
                    message += f" (polished: tolerances shrunk by {1 - theta:.1e})"
                self._settled_by = solver
                return p.result(polished, limits, status="optimal", message=message,
                                solver=solver.lower(), iterations=iterations, gap=gap,
                                multipliers=multipliers)
            if not accurate:
                reason = "inaccurate"
            elif theta < 1.0 - POLISH_LIMIT:
                reason = f"needed a shrink of {1 - theta:.1e}"
            elif not verified:
                reason = "failed the re-check"
            elif gap is None:
                reason = "no certified lower bound"
            elif not close:
                reason = f"certified gap {gap:.1e} above {GAP_RTOL:g}"
            else:
                reason = "failed the re-check"
            # the note (e.g. cutting-plane rounds) adds to the reason, never replaces it
            notes.append(f"{solver.lower()}: {reason}" + (f" ({note})" if note else ""))
            if verified and fallback is None:
                fallback = (polished, solver.lower(), iterations, gap, multipliers)
        message = "no verified optimum (" + "; ".join(notes) + ")"
        if fallback is not None:
            t, solver, iterations, gap, multipliers = fallback
            return p.result(t, limits, status="failed",
                            message=message + "; the tolerances shown meet every requirement",
                            solver=solver, iterations=iterations, gap=gap, multipliers=multipliers)
        return p.result(None, limits, status="failed", message=message, solver=self.solvers[-1].lower())

    def _refine(self, limits, multipliers, t, cost):
        """Newton on the dual from the conic answer (separable models, formula costs).

        Interior-point answers are accurate to about the square root of the solver's
        gap in the tolerances (the cost is flat at the optimum); the refined point meets
        the KKT conditions to round-off. Kept only if it is feasible and not dearer.
        Separable models: Newton on the dual (:func:`~.exact.refine`); mean shift:
        Newton on the KKT system (:func:`refine_mean_shift`).
        """
        from .exact import refine, separable

        p = self.problem
        if separable(p):
            out = refine(p, limits, multipliers, t)
        else:
            out = refine_mean_shift(p, limits, multipliers, t)
        if out is None:
            return None
        t_new, multipliers_new, bound = out
        polished, theta = p.polish(t_new, limits)
        new_cost = p.total_cost(polished)
        if theta < 1.0 - 1e-9 or not new_cost <= cost * (1 + 1e-9) + 1e-300:
            return None
        return polished, theta, new_cost, multipliers_new, bound

    def _run_solver(self, solver):
        """One solve; returns (scaled τ, accurate?, iterations) or None on failure."""
        import cvxpy as cp

        try:
            self.cvx.solve(solver=solver.split("-")[0], **SOLVER_OPTIONS.get(solver, {}))
        except (cp.error.SolverError, ArithmeticError, ValueError):
            return None
        status = self.cvx.status
        if status not in (cp.OPTIMAL, cp.OPTIMAL_INACCURATE) or self.tau.value is None:
            return None
        iterations = self.cvx.solver_stats.num_iters or 0
        return np.asarray(self.tau.value, dtype=float), status == cp.OPTIMAL, iterations

    def _attempt(self, solver, limits, shifting):
        """Solve (with cutting planes for mean shift); None when the solver fails."""
        import warnings

        p = self.problem
        length, money = p.length_scale, p.cost_scale
        self._first_cuts(shifting)
        iterations = 0
        note = ""
        for round_ in range(1, MAX_CUT_ROUNDS + 1):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # inaccuracy is handled via the status
                out = self._run_solver(solver)
            if out is None:
                return None
            tau, accurate, its = out  # earlier rounds only place tangents: the last one counts
            iterations += its
            t = p.full(np.clip(tau * length, p.tightest[p.free], p.loosest[p.free]))
            violated = []
            for req, lim, row in shifting:
                a = req.sensitivity
                sigma = stack.rss_sigma(a, p.counts, p.sigma_factors * t)
                delta = stack.mean_shift_delta(a, p.counts, p.mean_shifts, t)
                domain = self._domain(req, lim)
                allowed = mean_shift_allowance(req.nominal, min(delta, domain), lim)[0] if delta < domain else 0.0
                if sigma > allowed * (1 + CUT_RTOL):
                    violated.append((req, lim, row, min(delta, domain * (1 - 1e-12))))
            if not violated:
                break
            for req, lim, row, delta in violated:
                points = row.points.copy()
                unused = np.flatnonzero(np.isnan(points))
                # a free slot, else replace the tangent farthest from the new one
                slot = unused[0] if unused.size else int(np.argmax(np.abs(points - delta)))
                points[slot] = delta
                self._place_cuts(req, lim, row, points)
        else:
            note = f"cutting planes stopped after {MAX_CUT_ROUNDS} rounds"
            accurate = False
        # the duals, not the slack, say which requirements bind: with costs spread over
        # decades a binding requirement can sit 1e-5 inside its limit; the refinement
        # drops any whose multiplier turns out 0 (complementary slackness)
        multipliers = []
        for row, lim in zip(self.rows, limits):
            if row is None or (lim.lower is None and lim.upper is None):
                multipliers.append(0.0)
                continue
            if row.kind == "mean-shift":
                dual = sum(float(c.dual_value or 0.0) for _, _, c in row.cuts)
            else:
                dual = float(row.constraint.dual_value or 0.0)
            multipliers.append(max(dual, 0.0) * money / row.scale)
        if shifting and not note:
            note = f"{round_} cutting-plane round{'s' if round_ > 1 else ''}"
        return t, accurate, iterations, multipliers, note


def refine_mean_shift(problem: AllocationProblem, limits, multipliers, t, *, max_steps: int = 30):
    r"""Newton's method on the KKT conditions of the mean-shift allocation.

    Parameters
    ----------
    problem : AllocationProblem
        Mean-shift model.
    limits : list of RequirementLimits
    multipliers : sequence of float
        μ_r = −∂cost/∂g_r from the cutting-plane solve, per requirement.
    t : numpy.ndarray
        The conic answer (all contributors) [length].

    Returns
    -------
    (t, multipliers, None) or None
        None when nothing binds, the active set is not stable, or Newton does not settle.

    Notes
    -----
    With ``h_r(t) = σ_r(t) − g_r(δ_r(t))`` for the binding requirements and the free
    contributors strictly inside their limits (and off any table kink) as unknowns, solve

    .. math::

        n_i C_i'(t_i) + Σ_r μ_r ∂h_r/∂t_i = 0,\qquad h_r(t) = 0,

    with the exact Hessian ``diag(n C'') + Σ μ_r ∇²h_r``,
    ``∇²σ = (diag(n a² f²) − ∇σ ∇σᵀ)/σ`` and ``∇²(g∘δ) = g'' ∇δ ∇δᵀ`` (``g''`` by a central
    difference of the analytic ``g'``). Since the problem is convex, a point meeting these
    conditions with μ ≥ 0 and every other requirement met is optimal.

    The active sets are found on the way: the requirements with a positive dual (or at
    their limit) start as candidates; a multiplier that turns negative drops its
    requirement, a violated requirement joins, and when Newton cannot make every
    candidate bind the slack one with the smallest multiplier leaves. A contributor
    whose step would cross a limit is put on it and leaves the unknowns; one on a limit
    whose Lagrangian slope points inward is released. Table kinks stay fixed.
    """
    p = problem
    n = p.counts
    limited = [k for k, lim in enumerate(limits) if lim.lower is not None or lim.upper is not None]
    stats = p.statistics(t, limits)
    y = np.asarray(multipliers, dtype=float)
    # a positive dual (or a requirement at its limit) makes a requirement a candidate;
    # complementary slackness sorts them out below
    active = [k for k in limited if y[k] > 0 or stats[k]["excess"] >= -1e-6]
    lo, hi = p.tightest, p.loosest
    margin = 1e-7 * (hi - lo)
    x = np.asarray(t, dtype=float).copy()
    kink = p.curves.at_breakpoint(x)
    at_lo = p.free & ~kink & (x <= lo + margin)
    at_hi = p.free & ~kink & (x >= hi - margin)
    x[at_lo], x[at_hi] = lo[at_lo], hi[at_hi]
    mu_of = {k: float(y[k]) for k in limited}
    for _ in range(4 * len(limits) + 2 * int(p.free.sum()) + 4):
        var = p.free & ~kink & ~at_lo & ~at_hi
        if not active or not var.any():
            return None
        saved = at_lo.copy(), at_hi.copy()
        out = _kkt_newton(p, limits, active, np.flatnonzero(var), x, np.array([mu_of[k] for k in active]),
                          at_lo, at_hi, max_steps)
        if out is None:
            # cannot make every candidate bind: the slack one with the smallest
            # multiplier leaves (complementary slackness), else give up
            stats = p.statistics(x, limits)
            slack = [k for k in active if stats[k]["excess"] < -1e-9]
            if not slack:
                return None
            drop = min(slack, key=lambda k: mu_of[k] * max(stats[k]["sigma"], 1e-300))
            active = [k for k in active if k != drop]
            mu_of[drop] = 0.0
            at_lo, at_hi = saved
            continue
        x, mu = out
        mu_of.update(zip(active, mu.tolist()))
        # complementary slackness: a negative multiplier leaves the active set
        if np.any(mu < 0):
            drop = active[int(np.argmin(mu))]
            active = [k for k in active if k != drop]
            mu_of[drop] = 0.0
            continue
        # a contributor on a bound whose Lagrangian slope points inward is released
        grad_l = n * p.curves.derivative(x)
        for k in active:
            grad_l = grad_l + mu_of[k] * _constraint_gradient(p, k, limits[k], x)
        scale = np.maximum(np.abs(n * p.curves.derivative(x)), 1e-300)
        release = (at_lo & (grad_l < -1e-9 * scale)) | (at_hi & (grad_l > 1e-9 * scale))
        if release.any():
            worst = int(np.argmax(np.where(release, np.abs(grad_l) / scale, -np.inf)))
            at_lo[worst] = at_hi[worst] = False
            continue
        # a violated requirement joins
        stats = p.statistics(x, limits)
        joining = [k for k in limited if k not in active and stats[k]["excess"] > 1e-12]
        if joining:
            active = sorted(active + joining)
            continue
        break
    else:
        return None
    out = [0.0] * len(limits)
    for k in active:
        out[k] = float(mu_of[k])
    return x, out, None


def _constraint_gradient(p, k, lim, x):
    """∂h_k/∂t with ``h = σ − g(δ)`` (all contributors)."""
    a = p.requirements[k].sensitivity
    w = p.counts * (a * p.sigma_factors) ** 2
    v = p.counts * np.abs(a) * p.mean_shifts
    sigma = math.sqrt(float(w @ (x * x)))
    slope = mean_shift_allowance(p.requirements[k].nominal, float(v @ x), lim)[1]
    return (w * x / sigma if sigma > 0 else 0.0 * w) - slope * v


def _kkt_newton(p, limits, active, J, x, mu, at_lo, at_hi, max_steps):
    """Newton on the KKT system for a fixed active set; a contributor whose step would
    cross a bound is put on it (into ``at_lo``/``at_hi``) and leaves the unknowns."""
    n, f, m = p.counts, p.sigma_factors, p.mean_shifts
    lo, hi = p.tightest, p.loosest
    rows = []
    for k in active:
        a = p.requirements[k].sensitivity
        rows.append((k, n * (a * f) ** 2, n * np.abs(a) * m))
    x = x.copy()
    w_all = np.array([w for _, w, _ in rows])  # (active, contributors)
    v_all = np.array([v for _, _, v in rows])
    for _ in range(max_steps):
        residual_c = np.empty(len(active))
        g_values = np.empty(len(active))
        sigmas, slopes, seconds = (np.empty(len(active)) for _ in range(3))
        for j, (k, w, v) in enumerate(rows):
            req, lim = p.requirements[k], limits[k]
            sigma = math.sqrt(float(w @ (x * x)))
            delta = float(v @ x)
            g, slope, second = allowance_with_curvature(req.nominal, delta, lim)
            if not (sigma > 0 and g > 0 and math.isfinite(g) and math.isfinite(second)):
                return None
            sigmas[j], slopes[j], seconds[j] = sigma, slope, second
            residual_c[j] = (sigma - g) / g
            g_values[j] = g
        d_sigma = w_all * x / sigmas[:, None]
        grad_h = d_sigma - slopes[:, None] * v_all  # (active, contributors)
        # Σ_j μ_j (diag(w_j)/σ_j − d_j d_jᵀ/σ_j − g''_j v_j v_jᵀ), as two products
        wj, dj, vj = w_all[:, J], d_sigma[:, J], v_all[:, J]
        hess = np.diag((n * p.curves.curvature(x))[J] + (mu / sigmas) @ wj)
        hess -= (dj * (mu / sigmas)[:, None]).T @ dj + (vj * (mu * seconds)[:, None]).T @ vj
        slope_cost = n * p.curves.derivative(x)
        residual_s = slope_cost + mu @ grad_h
        scale_s = np.maximum(np.abs(slope_cost[J]), 1e-300)
        if np.all(np.abs(residual_s[J]) <= 1e-11 * scale_s) and np.all(np.abs(residual_c) <= 1e-13):
            return x, mu
        kkt = np.zeros((J.size + len(active),) * 2)
        kkt[: J.size, : J.size] = hess
        kkt[: J.size, J.size :] = grad_h[:, J].T
        kkt[J.size :, : J.size] = grad_h[:, J] / g_values[:, None]
        rhs = -np.concatenate([residual_s[J], residual_c])
        # equilibrate rows and columns: tolerances and multipliers differ by many decades
        col = np.concatenate([x[J], np.maximum(np.abs(mu), 1e-300)])
        scaled = kkt * col[None, :]
        row = 1.0 / np.maximum(np.abs(scaled).max(axis=1), 1e-300)
        try:
            step = np.linalg.solve(scaled * row[:, None], rhs * row) * col
        except np.linalg.LinAlgError:
            return None
        if not np.all(np.isfinite(step)):
            return None
        new = x[J] + step[: J.size]
        below, above = new <= lo[J], new >= hi[J]
        mu = mu + step[J.size :]
        if below.any() or above.any():
            # active-set step: the crossing contributors stop on their bound
            x[J] = np.clip(new, lo[J], hi[J])
            at_lo[J[below]] = True
            at_hi[J[above]] = True
            J = J[~(below | above)]
            if J.size == 0:
                return None
            continue
        x[J] = new
    return None

def lagrangian_bound(problem: AllocationProblem, limits, t, multipliers) -> float | None:
    r"""A lower bound on the least cost, certified by weak duality.

    Parameters
    ----------
    problem : AllocationProblem
    limits : list of RequirementLimits
    t : numpy.ndarray
        Any tolerances (all contributors) [length]; the tangents are taken there.
    multipliers : sequence of float
        ``μ_r ≥ 0`` per requirement, in cost per unit of the requirement's allowance
        (room under worst case, σ otherwise).

    Returns
    -------
    float or None
        The bound [currency]; None when a constraint cannot be evaluated at ``t``.

    Notes
    -----
    Every constraint ``h_r(t) ≤ 0`` is convex (worst case: ``Σ n|a|t − room``; rss:
    ``σ(t) − σ_max``; mean shift: ``σ(t) − g(δ(t))`` with ``g`` concave), so its tangent
    ``ℓ_r(t') = h_r(t) + ∇h_r(t)·(t' − t)`` lies below it and ``ℓ_r ≤ 0`` relaxes the
    problem. For ``μ ≥ 0`` the minimum of the Lagrangian of that relaxation,

    .. math::

        \min_{lo ≤ t' ≤ hi} Σ_i n_i C_i(t'_i) + Σ_r μ_r ℓ_r(t'),

    is separable (:func:`~.exact.minimise_linear_price`) and bounds the optimum from
    below whatever ``μ`` and ``t`` are; it equals the optimum at a KKT point. It is
    computed here in plain numpy, independent of what the conic solver claims.
    """
    from .exact import minimise_linear_price

    p = problem
    n, f, m = p.counts, p.sigma_factors, p.mean_shifts
    t = np.asarray(t, dtype=float)
    price = np.zeros_like(t)  # Σ μ ∂h/∂t
    constant = 0.0  # Σ μ (h(t) − ∇h·t)
    for req, lim, mu in zip(p.requirements, limits, multipliers):
        if not mu > 0 or (lim.lower is None and lim.upper is None):
            continue
        a = req.sensitivity
        if p.model == "worst-case":
            room = min(stack.room(req.nominal, lim.lower, lim.upper))
            grad = n * np.abs(a)
            h = float(grad @ t) - room
        else:
            sigma = stack.rss_sigma(a, n, f * t)
            if not sigma > 0:
                return None
            grad = n * (a * f) ** 2 * t / sigma
            if p.model == "rss":
                h = sigma - stack.sigma_limit(req.nominal, lim.fallout, lim.lower, lim.upper)
            else:
                v = n * np.abs(a) * m
                delta = float(v @ t)
                g, slope, _ = mean_shift_allowance(req.nominal, delta, lim)
                grad = grad - slope * v
                h = sigma - g
        if not (math.isfinite(h) and np.all(np.isfinite(grad))):
            return None
        price += mu * grad
        constant += mu * (h - float(grad @ t))
    free = p.free
    index = np.flatnonzero(free)
    cost_held = float(np.sum((n * p.unit_costs(np.where(free, 1.0, t)))[~free]))
    if index.size == 0:
        return cost_held + constant + float(price @ t)
    curves = p.curves.subset(index)
    t_b = minimise_linear_price(curves, price[free] / n[free], p.tightest[free], p.loosest[free])
    value = cost_held + float(n[free] @ curves.value(t_b)) + float(price[free] @ t_b)
    value += float(price[~free] @ t[~free]) + constant
    return value if math.isfinite(value) else None

