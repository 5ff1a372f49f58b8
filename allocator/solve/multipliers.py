"""Several separable requirements: Newton on the Lagrange multipliers, no conic solver.

Under worst case and rss (and mean shift without free mean shifts) every requirement's
constraint is a sum over contributors, ``Σ_i n_i w_ri t_i^p ≤ S_r`` (``p = 1``: worst case,
``w = |a|``; ``p = 2``: the statistical models after the change of variables to σ²,
``w = a² f²``; :class:`~allocator.solve.exact.SeparableDual`). For multipliers ``λ ≥ 0``
(one per requirement) the Lagrangian splits into one closed-form problem per contributor,
so the dual function

.. math::

    D(λ) = \\min_{lo ≤ t ≤ hi} Σ_i n_i C_i(t_i) + Σ_r λ_r (Σ_i n_i w_{ri} t_i^p − S_r)

costs one vectorised pass over the parts per evaluation. It is concave, and smooth for the
formula families (strictly convex costs): its gradient is the constraint excess
``spread(t(λ)) − S`` and its Hessian ``∂spread/∂λ`` follows from implicit differentiation
of the per-part stationarity. :class:`MultiplierNewton` maximises it by a projected Newton
method (Bertsekas 1982) with an Armijo line search on ``D`` itself; ``D(λ)`` at the end is
a lower bound on the least cost by weak duality, and ``t(λ)`` shrunk to meet every
requirement an upper bound, so the relative difference certifies the answer. When that
certificate is not reached (or a cost table makes ``t(λ)`` jump) the compiled conic problem
answers instead.

References
----------
.. [1] Bertsekas, D. P. (1982). Projected Newton methods for optimization problems with
   simple constraints. SIAM Journal on Control and Optimization 20(2), 221-246.
.. [2] Chase, K. W., Greenwood, W. H., Loosli, B. G. and Hauglund, L. F. (1990). Least
   cost tolerance allocation for mechanical assemblies with automated process selection.
   Manufacturing Review 3(1), 49-59.
"""

from __future__ import annotations

import math

import numpy as np

from .exact import SeparableDual, separable
from .problem import AllocationProblem

__all__ = ["applicable", "MultiplierNewton", "SOLVER_NAME", "GAP_LIMIT"]

SOLVER_NAME = "lagrange-multipliers"
GAP_LIMIT = 1e-9  # 'optimal' needs a certified relative gap at most this (else: conic)
MAX_STEPS = 200
ARMIJO = 1e-4
GROWTH = 10.0  # a multiplier grows at most this factor per step (a trust region in log λ)


def applicable(problem: AllocationProblem) -> bool:
    """True when :class:`MultiplierNewton` solves ``problem``: several separable
    requirements and formula costs only (a table's ``t(λ)`` jumps: conic path)."""
    return len(problem.requirements) > 1 and separable(problem) and not problem.curves.tables


class CertifiedNewton:
    """What the Newton paths on the prices share: the verdict on a polished answer.

    'optimal' only with the tolerances met after the polish and a certified relative gap
    at most :data:`GAP_LIMIT` against a Lagrangian lower bound; otherwise the fallback
    solver (built once, on first need) answers, or without one the result is 'failed'.
    """

    solver_name = SOLVER_NAME
    what = "Newton on the multipliers"

    def __init__(self, problem: AllocationProblem, fallback=None):
        self.problem = problem
        self._fallback = fallback
        self._conic = None
        self.steps = 0

    def _verdict(self, polished, theta, limits, bound, overrides, *, message, multipliers):
        """The optimal result if certified, else the fallback's answer (or 'failed')."""
        p = self.problem
        if polished is not None:
            cost = p.total_cost(polished)
            gap = (max(0.0, (cost - bound) / cost)
                   if cost > 0 and bound is not None and math.isfinite(bound) else None)
            verified = theta >= 1.0 - 1e-9 and p.feasible(polished, limits, rtol=p._rtol())
            if verified and gap is not None and gap <= GAP_LIMIT:
                return p.result(polished, limits, status="optimal", message=message, solver=self.solver_name,
                                iterations=self.steps, gap=gap, multipliers=multipliers)
        if self._fallback is None:
            return p.result(None, limits, status="failed", solver=self.solver_name,
                            message=f"{self.what} did not certify an optimum (no fallback solver given)")
        if self._conic is None:
            self._conic = self._fallback()
        return self._conic.solve(overrides)


class MultiplierNewton(CertifiedNewton):
    """Projected Newton on the multipliers of several separable requirements.

    Parameters
    ----------
    problem : AllocationProblem
        Must satisfy :func:`applicable`.
    fallback : callable, optional
        Builds the solver that answers when the dual does not certify its answer (the
        compiled conic problem, as :func:`allocator.solve.dispatch.continuous_solver`
        passes it); called at most once. Without it such a solve returns 'failed'.

    Notes
    -----
    Only the requirements the loosest tolerances violate can bind; the others keep
    ``λ = 0``. From a start built from the cost slopes at the middle of the limits
    (each part's slope shared among the requirements it is in), each step solves
    ``(−H_FF) d = g_F`` on the multipliers that are positive or whose constraint is
    violated (``F``; the others stay at 0), caps the growth of each multiplier to a
    factor :data:`GROWTH`, projects onto ``λ ≥ 0`` and halves the step until ``D``
    rises by the Armijo fraction of the predicted ascent. It stops when the scaled
    excess of every free multiplier's constraint is at round-off or no step improves.
    The answer counts only with a certified relative gap of at most :data:`GAP_LIMIT`
    after the numpy re-check.
    """

    def __init__(self, problem: AllocationProblem, *, fallback=None):
        if not applicable(problem):
            raise ValueError("needs several separable requirements and formula costs")
        super().__init__(problem, fallback)
        self.dual = SeparableDual(problem)

    # ------------------------------------------------------------------ solve

    def solve(self, overrides=None):
        """Allocate; returns an :class:`~allocator.solve.result.Allocation`."""
        problem, dual = self.problem, self.dual
        limits = problem.limits(overrides)
        reason = problem.diagnose(limits)
        if reason:
            return problem.infeasible(limits, reason, SOLVER_NAME)
        rhs, allowance = dual.rhs(limits)
        t_free, lam = self._maximise(rhs)
        polished, theta = problem.polish(problem.full(t_free), limits)
        bound = float(dual.bound(lam, np.where(np.isfinite(rhs), rhs, 0.0)))
        return self._verdict(
            polished, theta, limits, bound, overrides,
            message=f"Lagrange dual of {len(rhs)} requirements maximised by Newton on the "
            "multipliers; re-checked against every requirement",
            multipliers=dual.multipliers(lam, allowance),
        )

    # ------------------------------------------------------------------ the dual

    def _maximise(self, rhs):
        """``(free tolerances meeting every requirement up to round-off, λ per requirement)``."""
        dual = self.dual
        m = rhs.size
        lam_full = np.zeros(m)
        if dual.index.size == 0:
            return dual.hi.copy(), lam_full
        finite = np.isfinite(rhs)
        loose = dual.spreads(dual.hi)
        rows = np.flatnonzero(finite & (loose > rhs))
        if rows.size == 0:
            return dual.hi.copy(), lam_full
        w, coef, target = dual.weight[rows], dual.coef[rows], rhs[rows]
        scale = np.maximum(np.abs(target), 1e-300)
        lo, hi = dual.lo, dual.hi
        squared = dual.squared

        def evaluate(lam):
            v = lam @ w
            t = dual.tolerances(v, pinned=False)
            g = (coef @ (t * t if squared else t) - target) / scale
            value = dual.cost(t) + float(lam @ (g * scale))
            return t, v, g, value

        pairs = _SharedParts(w, coef)

        def hessian(t, v, free):
            """``∂²D/∂λ_r∂λ_s = ∂spread_r/∂λ_s`` for r, s in ``free``: symmetric, negative semidefinite."""
            curvature = dual.curves.curvature(t)
            inside = (t > lo) & (t < hi)
            with np.errstate(divide="ignore", invalid="ignore"):
                if squared:  # C' + 2vt = 0: dt/dv = −2t/(C'' + 2v); d(t²)/dv = 2t dt/dv
                    slope = np.where(inside & (v > 0), -4.0 * t * t / (curvature + 2.0 * v), 0.0)
                else:  # C' = −v: dt/dv = −1/C''
                    slope = np.where(inside & (curvature > 0), -1.0 / curvature, 0.0)
            slope = np.where(np.isfinite(slope), slope, 0.0)
            if pairs.sparse:
                return pairs.matrix(slope)[np.ix_(free, free)]
            return (coef[free] * slope) @ w[free].T

        lam = self._start(w, lo, hi)
        reference = lam.copy()
        t, v, g, value = evaluate(lam)
        self.steps = 0
        for _ in range(MAX_STEPS):
            free = (lam > 0) | (g > 0)
            if not free.any() or float(np.max(np.abs(g[free]))) <= 1e-14:
                break
            self.steps += 1
            idx = np.flatnonzero(free)
            zeroed = np.zeros(0, dtype=int)
            while True:
                if idx.size == 0:
                    step = np.zeros(0)
                    break
                step = self._newton_step(hessian(t, v, idx), (g * scale)[idx], lam[idx], reference[idx])
                if step is None:
                    break
                # a multiplier the step takes below 0 while its constraint is slack goes
                # to 0 and leaves the Newton block (else the projected step need not rise)
                out = (lam[idx] + step < 0) & (g[idx] < 0)
                if not out.any():
                    break
                zeroed = np.concatenate([zeroed, idx[out]])
                idx = idx[~out]
            if step is None:
                break
            accepted = None
            alpha = 1.0
            for _ in range(60):
                trial = lam.copy()
                trial[zeroed] = (1.0 - alpha) * lam[zeroed]
                trial[idx] = np.maximum(lam[idx] + alpha * step, 0.0)
                state = evaluate(trial)
                rise = float((g * scale) @ (trial - lam))
                if rise > 1e-13 * abs(value):
                    if state[3] >= value + ARMIJO * rise and state[3] >= value:
                        accepted = trial, state
                        break
                elif np.max(np.abs(state[2][free])) < np.max(np.abs(g[free])):
                    # D no longer resolves the rise (round-off): the step counts when it
                    # shrinks the largest excess, as Newton does near the maximum
                    accepted = trial, state
                    break
                alpha *= 0.5
            if accepted is None:
                break
            lam, (t, v, g, value) = accepted
        lam_full[rows] = lam
        return self._shrink(t, coef, target), lam_full

    @staticmethod
    def _newton_step(h, g, lam, reference):
        """The Newton ascent step ``(−H + εI)⁻¹ g`` in multipliers scaled to ``reference``,
        shortened as a whole so that no multiplier grows more than :data:`GROWTH` times;
        None when there is nothing to move."""
        if g.size == 0:
            return None
        ref = np.maximum(lam, 1e-3 * reference)
        neg = -h * ref[:, None] * ref[None, :]
        diag = np.diag(neg)
        top = float(diag.max())
        flat = diag <= 1e-12 * top if top > 0 else np.ones(g.size, dtype=bool)
        step = np.where(flat, np.sign(g) * GROWTH, 0.0)  # no curvature: a decade at a time
        keep = np.flatnonzero(~flat)
        if keep.size:
            sub = neg[np.ix_(keep, keep)]
            try:
                step[keep] = np.linalg.solve(sub + 1e-12 * top * np.eye(keep.size), (g * ref)[keep])
            except np.linalg.LinAlgError:
                return None
        if not np.all(np.isfinite(step)):
            return None
        big = float(np.max(step))
        if big > GROWTH - 1.0:
            step *= (GROWTH - 1.0) / big
        return step * ref

    def _start(self, w, lo, hi) -> np.ndarray:
        """First multipliers: per requirement, the median over its parts of the price
        that makes the middle of the limits stationary, each part's price shared among
        the requirements it is in."""
        dual = self.dual
        mid = np.sqrt(lo * hi)
        slope = -dual.curves.derivative(mid)
        member = w > 0
        shares = np.maximum(member.sum(axis=0), 1)
        lam = np.empty(w.shape[0])
        with np.errstate(divide="ignore", invalid="ignore"):
            for r in range(w.shape[0]):
                k = member[r]
                wr = w[r, k]
                per = slope[k] / (2.0 * wr * mid[k] if dual.squared else wr) / shares[k]
                per = per[np.isfinite(per) & (per > 0)]
                lam[r] = float(np.median(per)) if per.size else 1.0
        return lam

    def _shrink(self, t, coef, target):
        """``t`` with every requirement met to round-off (``max(lo, θ t)``, θ ≤ 1)."""
        dual = self.dual
        power = 2 if dual.squared else 1
        goal = target * (1.0 - 1e-12)
        out = t
        for _ in range(20):
            spread = coef @ out**power
            over = spread > goal
            if not over.any():
                return out
            theta = float(np.min((goal[over] / spread[over]) ** (1.0 / power)))
            out = np.maximum(dual.lo, min(theta, 1.0 - 1e-15) * out)
        return out


class _SharedParts:
    """``Σ_i coef_ri · slope_i · w_si`` for every pair of requirements, over shared parts only.

    Each chain holds a few of the parts, so most products in the dense ``(coef·slope) wᵀ``
    are zero: with ``c_i`` requirements through part ``i`` the pairs number ``Σ c_i²``
    (about ``30² m²/n`` for 30-part chains) instead of ``m² n``. The pairs are listed once;
    each Hessian is then one weighted ``bincount``. Used when the pairs are fewer than a
    quarter of the dense products.
    """

    def __init__(self, w: np.ndarray, coef: np.ndarray):
        k, parts = w.shape
        rows, cols = np.nonzero((w > 0).T)  # sorted by part, then requirement
        part, req = rows, cols
        count = np.bincount(part, minlength=parts)
        total = int(np.sum(count.astype(np.int64) ** 2))
        self.k = k
        self.sparse = k > 1 and total < 0.25 * k * k * parts
        if not self.sparse:
            return
        start = np.concatenate([[0], np.cumsum(count)[:-1]])
        per_entry = count[part]
        first = np.repeat(np.arange(part.size), per_entry)
        offset = np.arange(first.size) - np.repeat(np.cumsum(per_entry) - per_entry, per_entry)
        second = start[part[first]] + offset
        self.part = part[first]
        r, s = req[first], req[second]
        self.flat = r * k + s
        self.value = coef[r, self.part] * w[s, self.part]

    def matrix(self, slope: np.ndarray) -> np.ndarray:
        """The ``k × k`` matrix for per-part ``slope``."""
        out = np.bincount(self.flat, weights=self.value * slope[self.part], minlength=self.k * self.k)
        return out.reshape(self.k, self.k)
