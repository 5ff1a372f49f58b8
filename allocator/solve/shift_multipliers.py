"""Several requirements under mean shift: Newton on two prices per requirement, no conic solver.

Under the mean-shift model each requirement's constraint is ``h_r(t) = σ_r(t) − g_r(δ_r(t)) ≤ 0``
with ``σ_r² = Σ n w_r t² + σ_held²`` (``w = a² f²``), ``δ_r = Σ n v_r t + δ_held``
(``v = |a| m``) and the concave, decreasing allowance ``g_r``
(:func:`~allocator.solve.problem.mean_shift_allowance`; linear for a one-sided limit).
The norm in ``σ`` makes the constraint non-separable, but with its multiplier ``μ_r`` the
stationarity of the Lagrangian is, per part,

.. math::

    C_i'(t_i) + t_i Σ_r α_r w_{ri} + Σ_r β_r v_{ri} = 0,\\qquad
    α_r = μ_r / σ_r,\\quad β_r = −μ_r g_r'(δ_r) ≥ 0,

separable for given prices ``(α, β)`` (:func:`~.exact.minimise_quadratic_price` with a
shift, as for one requirement in :class:`~.exact.MeanShiftExact`). What remains are two
equations per binding requirement,

.. math::

    F_{1r} = (σ_r − g_r(δ_r)) / g_r = 0,\\qquad F_{2r} = β_r + α_r σ_r g_r'(δ_r) = 0,

for the requirements that bind, and ``α_r = β_r = 0`` for the others. Requirements the
loosest tolerances meet can never bind (every constraint grows with every tolerance) and
keep zero prices. For the other ``k`` the complementarity ``α_r ≥ 0``, ``F_{1r} ≤ 0``,
``α_r F_{1r} = 0`` is written as one equation with the Fischer-Burmeister function
``φ(a, b) = a + b − √(a² + b²)`` (Fischer 1992), so that no active set is guessed: a
semismooth Newton method on the ``2k`` equations in the ``2k`` prices, with the exact
Jacobian (implicit differentiation of the per-part stationarity: four ``k × k`` sums over
the parts that requirements share), prices projected onto ``≥ 0`` and the step halved
until the residual norm falls. The answer is then re-checked in numpy and certified by the
Lagrangian bound of the tangent relaxation (:func:`~.continuous.lagrangian_bound`);
without a certified relative gap of at most :data:`GAP_LIMIT` the compiled conic problem
answers.

References
----------
.. [1] Fischer, A. (1992). A special Newton-type optimization method. Optimization 24(3-4),
   269-284.
.. [2] Greenwood, W. H. and Chase, K. W. (1987). A new tolerance analysis method for
   designers and manufacturers. Journal of Engineering for Industry 109(2), 112-116.
"""

from __future__ import annotations

import math

import numpy as np

from .. import stack
from .exact import minimise_quadratic_price
from .multipliers import GAP_LIMIT, CertifiedNewton
from .problem import AllocationProblem, allowance_with_curvature

__all__ = ["applicable", "ShiftMultiplierNewton", "SOLVER_NAME", "GAP_LIMIT"]

SOLVER_NAME = "shift-multipliers"
MAX_STEPS = 200
COLD_STEPS = 60  # Newton on every candidate at once: beyond this the growing set takes over
F1_TOL, F2_TOL = 1e-13, 1e-11  # the scaled residuals at which Newton has settled


def applicable(problem: AllocationProblem) -> bool:
    """True for several requirements under mean shift with a free mean shift and
    formula costs only (a table's minimiser jumps: conic path)."""
    return (
        len(problem.requirements) > 1
        and problem.model == "mean-shift"
        and bool(np.any(problem.mean_shifts[problem.free] > 0))
        and not problem.curves.tables
    )


class ShiftMultiplierNewton(CertifiedNewton):
    """Newton on the prices ``(α, β)`` of several mean-shift requirements.

    Parameters
    ----------
    problem : AllocationProblem
        Must satisfy :func:`applicable`.
    fallback : callable, optional
        Builds the solver that answers when Newton does not certify its answer (the
        compiled conic problem, as :func:`allocator.solve.dispatch.continuous_solver`
        passes it); called at most once. Without it such a solve returns 'failed'.
    """

    solver_name = SOLVER_NAME
    what = "Newton on the mean-shift prices"

    def __init__(self, problem: AllocationProblem, *, fallback=None):
        if not applicable(problem):
            raise ValueError("needs several requirements under mean shift with free mean shifts")
        super().__init__(problem, fallback)
        p = problem
        free, held = p.free, ~p.free
        self.index = np.flatnonzero(free)
        self.lo, self.hi = p.tightest[free], p.loosest[free]
        self.n = p.counts[free]
        self.curves = p.curves.subset(self.index)
        a = np.array([r.sensitivity for r in p.requirements]).reshape(len(p.requirements), -1)
        w = (a * p.sigma_factors) ** 2
        v = np.abs(a) * p.mean_shifts
        self.w, self.v = w[:, free], v[:, free]  # (requirements, free parts)
        t_held = p.held[held]
        self.var_held = (w[:, held] * p.counts[held]) @ (t_held * t_held)
        self.delta_held = (v[:, held] * p.counts[held]) @ t_held
        self._warm = None  # (candidates, α, β, reference α) of the last settled solve

    # ------------------------------------------------------------------ pieces

    def _tolerances(self, rows, alpha, beta):
        return minimise_quadratic_price(self.curves, alpha @ self.w[rows], self.lo, self.hi,
                                        shift=beta @ self.v[rows])

    def _state(self, t, rows):
        """``(σ, δ)`` of ``rows`` at free tolerances ``t``."""
        nt = self.n * t
        sigma = np.sqrt(self.w[rows] @ (nt * t) + self.var_held[rows])
        delta = self.v[rows] @ nt + self.delta_held[rows]
        return sigma, delta

    # ------------------------------------------------------------------ solve

    def solve(self, overrides=None):
        """Allocate; returns an :class:`~allocator.solve.result.Allocation`."""
        from .continuous import lagrangian_bound

        p = self.problem
        limits = p.limits(overrides)
        reason = p.diagnose(limits)
        if reason:
            return p.infeasible(limits, reason, SOLVER_NAME)
        out = self._solve(limits)
        if out is None:
            return self._verdict(None, 0.0, limits, None, overrides, message="", multipliers=None)
        t_free, mu = out
        polished, theta = p.polish(self._shrink(p.full(t_free), limits), limits)
        binding = sum(1 for x in mu if x > 0)
        return self._verdict(
            polished, theta, limits, lagrangian_bound(p, limits, polished, mu), overrides,
            message=f"KKT conditions of {binding} binding mean-shift requirement"
            f"{'s' if binding != 1 else ''} solved by Newton on their prices; "
            "re-checked against every requirement",
            multipliers=mu,
        )

    def _shrink(self, t, limits):
        """``t`` shrunk by the first of a few round-off factors that meets every requirement
        (Newton ends on the constraints, a hair either side); else ``t`` for the polish."""
        p = self.problem
        for theta in (1.0, 1.0 - 1e-13, 1.0 - 1e-11, 1.0 - 1e-9):
            trial = np.where(p.free, np.maximum(p.tightest, theta * t), t)
            if p.feasible(trial, limits):
                return trial
        return t

    def _solve(self, limits):
        """``(free tolerances, μ per requirement)`` or None."""
        m = len(limits)
        mu_out = [0.0] * m
        self.steps = 0
        if self.index.size == 0:
            return self.hi.copy(), mu_out
        limited = np.array([lim.lower is not None or lim.upper is not None for lim in limits])
        allowances = {}
        # only requirements the loosest tolerances violate can bind
        every = np.arange(m)
        sigma, delta = self._state(self.hi, every)
        candidates = []
        for r in np.flatnonzero(limited):
            if self._f1(r, limits[r], sigma[r], delta[r], allowances) > 0:
                candidates.append(int(r))
        if not candidates:
            return self.hi.copy(), mu_out
        rows = np.array(candidates)
        self._setup(rows, limits)
        out = None
        if self._warm is not None and self._warm[0] == tuple(candidates):
            # a sweep's previous point: Newton from its prices, if it settles from there
            _, alpha, beta, ref = self._warm
            out = self._newton(rows, alpha, beta, ref, limits)
        if out is None:
            out = self._cold(rows, limits)
        if out is None:
            out = self._growing(rows, limits)
        if out is None:
            return None
        self._setup(rows, limits)
        alpha, beta, ref, t = out
        self._warm = (tuple(candidates), alpha, beta, ref)
        sig, _ = self._state(t, rows)
        for r, a_r, s_r in zip(rows, alpha, sig):
            mu_out[int(r)] = float(a_r * s_r) if a_r > 0 else 0.0
        return t, mu_out

    def _growing(self, rows, limits):
        """Newton on a growing set: the most violated requirement first, then every one the
        answer still violates joins (its start price from the cost slopes); ``(α, β, ref, t)``
        over ``rows`` or None. Used when Newton on every candidate at once does not settle
        (prices of requirements that end slack can hold the others back)."""
        sigma, delta = self._state(self.hi, rows)
        excess = np.array([self._f1(r, limits[r], s_, d, {}) for r, s_, d in zip(rows, sigma, delta)])
        inside = np.zeros(rows.size, dtype=bool)
        inside[int(np.argmax(excess))] = True
        start = self._start(rows)
        alpha, beta = np.where(inside, start, 0.0), np.zeros(rows.size)
        for _ in range(rows.size):
            sub = rows[inside]
            self._setup(sub, limits)
            fitted = self._fit_domain(sub, alpha[inside], beta[inside])
            if fitted is None:
                return None
            alpha[inside] = self._onto_constraints(sub, fitted, beta[inside], limits)
            out = self._newton(sub, alpha[inside], beta[inside], start[inside], limits)
            if out is None:
                return None
            alpha[inside], beta[inside], _, t = out
            sigma, delta = self._state(t, rows)
            joining = ~inside & np.array([self._f1(r, limits[r], s_, d, {}) > 1e-12
                                          for r, s_, d in zip(rows, sigma, delta)])
            if not joining.any():
                return alpha, beta, start, t
            inside |= joining
            alpha = np.where(joining, start, alpha)
        return None

    def _fit_domain(self, rows, alpha, beta):
        """``α`` raised tenfold at a time until every mean band of ``rows`` stays inside its
        limits (``δ`` below the domain of :meth:`_setup`), or None."""
        for _ in range(30):
            t = self._tolerances(rows, alpha, beta)
            if np.all(self._state(t, rows)[1] < self._domain[0]):
                return alpha
            alpha = alpha * 10.0
        return None

    def _onto_constraints(self, rows, alpha, beta, limits):
        """``c α`` with the common factor ``c ≥ 1`` at which the most violated of ``rows`` just
        meets its limit (bisection in ``log c``, to 1 %): a start near the constraints."""
        def worst(c):
            t = self._tolerances(rows, c * alpha, beta)
            sigma, delta = self._state(t, rows)
            return max(self._f1(r, limits[r], s_, d, {}) for r, s_, d in zip(rows, sigma, delta))

        if worst(1.0) <= 0:
            return alpha
        lo, hi = 0.0, math.log(10.0)
        for _ in range(40):
            if worst(math.exp(hi)) <= 0:
                break
            lo, hi = hi, hi + math.log(10.0)
        else:
            return alpha
        while hi - lo > 0.01:
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if worst(math.exp(mid)) > 0 else (lo, mid)
        return math.exp(hi) * alpha

    def _cold(self, rows, limits):
        """Newton from prices built from the cost slopes: ``(α, β, ref, t)`` or None."""
        alpha = self._fit_domain(rows, self._start(rows), np.zeros(rows.size))
        if alpha is None:
            return None
        ref = alpha.copy()
        t = self._tolerances(rows, alpha, np.zeros(rows.size))
        sig, dlt = self._state(t, rows)
        slopes = np.array([self._allowance(r, limits[r], d)[1] for r, d in zip(rows, dlt)])
        beta = np.maximum(-alpha * sig * slopes, 0.0)
        beta[~np.isfinite(beta)] = 0.0
        return self._newton(rows, alpha, beta, ref, limits, COLD_STEPS)

    # ------------------------------------------------------------------ the Newton system

    def _setup(self, rows, limits):
        """Per candidate its domain (largest δ) and, for one limit, ``z`` (else inf); the pairs."""
        domain, z = np.empty(rows.size), np.full(rows.size, np.inf)
        for j, r in enumerate(rows):
            req, lim = self.problem.requirements[r], limits[r]
            domain[j] = min(stack.room(req.nominal, lim.lower, lim.upper))
            if not lim.two_sided:
                z[j] = -stack.normal_quantile(lim.fallout)
        self._domain = domain, z
        self._pairs = _Pairs(self.w[rows], self.v[rows], self.n)

    def _allowance(self, r, lim, delta):
        req = self.problem.requirements[r]
        return allowance_with_curvature(req.nominal, float(delta), lim)

    def _f1(self, r, lim, sigma, delta, cache):
        req = self.problem.requirements[r]
        domain = cache.get(r)
        if domain is None:
            domain = cache[r] = min(stack.room(req.nominal, lim.lower, lim.upper))
        if delta >= domain:
            return math.inf
        g = allowance_with_curvature(req.nominal, float(delta), lim)[0]
        return (sigma - g) / g if g > 0 else math.inf

    def _start(self, rows) -> np.ndarray:
        """First α: per requirement the median over its parts of the price that makes the
        middle of the limits stationary, each part's price shared among its requirements."""
        w = self.w[rows]
        mid = np.sqrt(self.lo * self.hi)
        slope = -self.curves.derivative(mid)
        member = w > 0
        shares = np.maximum(member.sum(axis=0), 1)
        alpha = np.empty(rows.size)
        with np.errstate(divide="ignore", invalid="ignore"):
            for j in range(rows.size):
                k = member[j]
                per = slope[k] / (w[j, k] * mid[k]) / shares[k]
                per = per[np.isfinite(per) & (per > 0)]
                alpha[j] = float(np.median(per)) if per.size else 1.0
        return alpha

    def _system(self, rows, alpha, beta, ref, limits):
        """Residuals and what the Jacobian needs at ``(α, β)``; None outside the domain.

        The first ``k`` residuals are ``φ(α/ref, −F1)`` with the Fischer-Burmeister
        function ``φ(a, b) = a + b − √(a² + b²)`` (zero exactly when ``a ≥ 0``, ``b ≥ 0``,
        ``ab = 0``: a requirement binds or has no price), the last ``k`` are ``F2``
        divided by ``ref σ |g'|`` (held constant in the Jacobian; F2 is 0 at the root).
        """
        t = self._tolerances(rows, alpha, beta)
        sigma, delta = self._state(t, rows)
        k = rows.size
        domain, z = self._domain
        if np.any(delta >= domain):
            return None
        # one limit: g = (room − δ)/z is linear (z = Φ⁻¹(1 − p)); two: the general allowance
        g, g1, g2 = (domain - delta) / z, -1.0 / z, np.zeros(k)
        for j in np.flatnonzero(~np.isfinite(z)):
            r = rows[j]
            g[j], g1[j], g2[j] = allowance_with_curvature(self.problem.requirements[r].nominal,
                                                          float(delta[j]), limits[r])
        if not (np.all(g > 0) and np.all(sigma > 0) and np.all(np.isfinite(g2))):
            return None
        f1 = (sigma - g) / g
        a, b = alpha / ref, -f1
        root = np.hypot(a, b)
        phi = a + b - root
        scale = ref * sigma * np.maximum(np.abs(g1), 1e-300)
        f2 = (beta + alpha * sigma * g1) / scale
        return t, np.concatenate([phi, f2]), sigma, g, g1, g2, scale, (a, b, root), f1

    def _jacobian(self, rows, alpha, ref, state):
        t, _, sigma, g, g1, g2, scale, (a, b, root), _ = state
        inside = (t > self.lo) & (t < self.hi)
        denominator = self.curves.curvature(t) + alpha @ self.w[rows]
        with np.errstate(divide="ignore", invalid="ignore"):
            s = np.where(inside & (denominator > 0), -1.0 / denominator, 0.0)
        s = np.where(np.isfinite(s), s, 0.0)
        st = s * t
        d_sigma_a, d_sigma_b, d_delta_a, d_delta_b = self._pairs.products(t * st, st, s)
        d_sigma_a /= sigma[:, None]
        d_sigma_b /= sigma[:, None]
        j11 = (d_sigma_a - g1[:, None] * d_delta_a) / g[:, None]
        j12 = (d_sigma_b - g1[:, None] * d_delta_b) / g[:, None]
        # Fischer-Burmeister: ∂φ/∂a = 1 − a/ρ, ∂φ/∂b = 1 − b/ρ (at a = b = 0 any (1 − 1/√2) pair)
        with np.errstate(divide="ignore", invalid="ignore"):
            da = np.where(root > 0, 1.0 - a / root, 1.0 - 1.0 / math.sqrt(2.0))
            db = np.where(root > 0, 1.0 - b / root, 1.0 - 1.0 / math.sqrt(2.0))
        p11 = -db[:, None] * j11 + np.diag(da / ref)
        p12 = -db[:, None] * j12
        j21 = (alpha * g1)[:, None] * d_sigma_a + (alpha * sigma * g2)[:, None] * d_delta_a
        j21 += np.diag(sigma * g1)
        j22 = (alpha * g1)[:, None] * d_sigma_b + (alpha * sigma * g2)[:, None] * d_delta_b
        j22 += np.eye(rows.size)
        return np.block([[p11, p12], [j21 / scale[:, None], j22 / scale[:, None]]])

    def _newton(self, rows, alpha, beta, ref, limits, max_steps: int = MAX_STEPS):
        """Semismooth Newton on the complementarity system; ``(α, β, ref, t)`` or None."""
        k = rows.size
        state = self._system(rows, alpha, beta, ref, limits)
        if state is None:
            return None
        for _ in range(max_steps):
            res = state[1]
            if np.all(np.abs(res[:k]) <= F1_TOL) and np.all(np.abs(res[k:]) <= F2_TOL):
                return alpha, beta, ref, state[0]
            self.steps += 1
            jac = self._jacobian(rows, alpha, ref, state)
            # equilibrate: the prices differ by many decades
            # (β's own scale is α σ |g'|, what F2 = 0 makes it)
            natural = np.maximum(alpha, 1e-6 * ref) * state[2] * np.abs(state[4])
            col = np.concatenate([np.maximum(alpha, 1e-6 * ref), np.maximum(beta, np.maximum(1e-6 * natural, 1e-300))])
            scaled = jac * col[None, :]
            row = 1.0 / np.maximum(np.abs(scaled).max(axis=1), 1e-300)
            try:
                step = np.linalg.solve(scaled * row[:, None], -res * row) * col
            except np.linalg.LinAlgError:
                return None
            if not np.all(np.isfinite(step)):
                return None
            base = float(res @ res)
            moved = None
            lam = 1.0
            for _ in range(50):
                a_new = np.maximum(alpha + lam * step[:k], 0.0)
                b_new = np.maximum(beta + lam * step[k:], 0.0)
                trial = self._system(rows, a_new, b_new, ref, limits)
                if trial is not None and float(trial[1] @ trial[1]) < base * (1 - 1e-4 * lam):
                    moved = a_new, b_new, trial
                    break
                lam *= 0.5
            if moved is None:
                if np.all(np.abs(res[:k]) <= 1e-10) and np.all(np.abs(res[k:]) <= 1e-8):
                    return alpha, beta, ref, state[0]  # round-off floor: no step improves any more
                return None
            alpha, beta, state = moved
        return None


class _Pairs:
    """The four ``k × k`` sums ``Σ_i X_ri · slope_i · Y_si`` of the Jacobian, over shared parts.

    ``X`` is ``n w`` or ``n v``, ``Y`` is ``w`` or ``v`` (``w = a² f²``, ``v = |a| m``). Each
    chain holds a few of the parts, so the pairs of requirements through a part number
    ``Σ_i c_i²`` (``c_i`` requirements through part ``i``) instead of ``k² n``: they are
    listed once, and each sum is one weighted ``bincount``. Dense products when the pairs
    are not fewer than a quarter of those.
    """

    def __init__(self, w: np.ndarray, v: np.ndarray, n: np.ndarray):
        k, parts = w.shape
        self.k = k
        self.w, self.v, self.nw, self.nv = w, v, w * n, v * n
        member = (w > 0) | (v > 0)
        count = member.sum(axis=0)
        self.sparse = k > 1 and int(np.sum(count.astype(np.int64) ** 2)) < 0.25 * k * k * parts
        if not self.sparse:
            return
        part, req = np.nonzero(member.T)  # sorted by part, then requirement
        start = np.concatenate([[0], np.cumsum(count)[:-1]])
        per_entry = count[part]
        first = np.repeat(np.arange(part.size), per_entry)
        offset = np.arange(first.size) - np.repeat(np.cumsum(per_entry) - per_entry, per_entry)
        second = start[part[first]] + offset
        self.part = part[first]
        r, s = req[first], req[second]
        self.flat = r * k + s
        self.values = [self.nw[r, self.part] * w[s, self.part], self.nw[r, self.part] * v[s, self.part],
                       self.nv[r, self.part] * w[s, self.part], self.nv[r, self.part] * v[s, self.part]]

    def products(self, slope_ww, slope_wv_vw, slope_vv):
        """``(nw·s_ww·wᵀ, nw·s·vᵀ, nv·s·wᵀ, nv·s_vv·vᵀ)`` with the middle two sharing a slope."""
        slopes = (slope_ww, slope_wv_vw, slope_wv_vw, slope_vv)
        if not self.sparse:
            return tuple((x * sl) @ y.T for x, y, sl in zip((self.nw, self.nw, self.nv, self.nv),
                                                           (self.w, self.v, self.w, self.v), slopes))
        size = self.k * self.k
        return tuple(np.bincount(self.flat, weights=val * sl[self.part], minlength=size).reshape(self.k, self.k)
                     for val, sl in zip(self.values, slopes))
