r"""Allocation under the exact distribution of a linear chain (model ``convolution``).

The rss and mean-shift models take the response as normal. The ``convolution`` model
uses the response's exact distribution instead: every contributor with its stated
distribution (normal with its cp, uniform, triangular; ``count`` independent instances),
convolved numerically (:mod:`allocator.convolve`), with the mean at the worse end of the
mean-shift band ``ȳ ± δ`` when mean shifts are given. The constraint of requirement
``j`` is ``F_j(t) ≤ p_j``: the exact fallout at most the target.

Method: sequential convex approximation started at the rss optimum (mean-shift optimum
when the case has mean shifts). At the current feasible tolerances ``t``, for each
requirement,

1. the free tolerances are scaled along the ray ``s·t`` to the point ``t̂_j`` where the
   exact fallout equals the target (a 1-D root of a monotone function);
2. the gradient ``g = ∇F_j(t̂_j)`` is taken by central differences on a fixed grid;
3. the constraint is replaced by the weighted root-sum-square
   ``ρ_j(t) = sqrt(Σ_i w_i t_i²) ≤ 1`` with ``w_i = g_i / (t̂_i Σ_l g_l t̂_l)``: a convex
   set whose boundary touches the exact one at ``t̂_j`` with the same normal.

``ρ_j`` is an rss σ with other sensitivities, so the surrogate is an rss allocation,
solved by the same solvers (exact dual, conic problem). Its optimum is scaled back onto
the exact feasible set (the largest uniform scale of the free tolerances that meets every
target), and the step is kept only when it lowers the cost (else halved, geometrically).
At a fixed point the surrogate's optimality conditions are those of the exact problem,
so the answer is a KKT point; the residual of the conditions is measured and reported.
The iterations use a coarse grid (2**12 points), then a few a finer one (2**15); the answer
is scaled onto the target with the default grid (2**18 points) and re-checked there before
it is called optimal.

What is proven: the answer meets every target by the full-resolution evaluation, and it
satisfies the first-order (KKT) conditions to the reported residual. What is not: global
optimality. The exact feasible set ``{t : F_j(t) ≤ p_j}`` is not convex in general, so
another KKT point could be cheaper (docs/convolution.md).
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Callable, Mapping

import numpy as np
from scipy import optimize, special

from .. import stack
from ..convolve import band_fallout, chain_fallout, linear_sum_distribution, uniform_halves, uniform_sum_sf
from ..errors import CaseError, UsageError
from ..ppm import fraction_to_ppm
from .problem import (
    FALLOUT_RTOL,
    AllocationProblem,
    NeedsDiscrete,
    RequirementData,
    check_fix_values,
)
from .result import Allocation

__all__ = [
    "LINEAR_CHAIN_ONLY",
    "ConvolutionProblem",
    "ConvolutionAllocation",
    "convolution_solver",
]

SOLVER_NAME = "convolution-sca"
LINEAR_CHAIN_ONLY = "convolution needs a linear chain; use rss or mean-shift, then verify"
COARSE_POINTS = 2**12  # grid across the bounded part during the iterations (~1e-5 relative)
REFINE_POINTS = 2**15  # then a few steps on a finer grid (~1e-7 relative)
REFINE_ITERATIONS = 3
GRADIENT_STEP = 1e-4  # relative step of the central differences
MAX_ITERATIONS = 40
STEP_TRIES = 6  # step halvings before the iteration counts as converged
MOVE_TOL = 1e-8  # largest relative change of a tolerance that still counts as a move
COST_RTOL = 1e-12  # relative cost decrease of a step below which the iteration has converged
INVERSION_RTOL = 1e-5  # grid and independent fallouts must agree to this fraction of the target
KKT_RTOL = 1e-4  # first-order residual (relative to the cost gradient) accepted as a KKT point
_Z = 3.0  # the surrogate as an rss requirement: σ ≤ U / z with U = z
_Z_PPM = fraction_to_ppm(float(special.ndtr(-_Z)))


class ConvolutionProblem(AllocationProblem):
    """An :class:`~allocator.solve.problem.AllocationProblem` whose statistics are exact.

    :meth:`statistics` (and through it the re-check, :meth:`feasible`, :meth:`diagnose`
    and the result) gives the exact fallout of each requirement from the stated
    distributions, with the mean at the worse end of ``ȳ ± δ``, ``δ = Σ n|a| m t``.
    """

    def __init__(self, case, fix: Mapping[str, float] | None = None, *, check: bool = True):
        super().__init__(case, "convolution", fix, check=check)
        self.distributions = tuple(c.distribution for c in case.contributors)
        self._last = None  # (key, statistics) of the last call: the answer is re-checked twice

    def distribution(self, j: int, t, **resolution):
        """The centred distribution of requirement ``j``'s response at tolerances ``t``."""
        a = self.requirements[j].sensitivity
        return linear_sum_distribution(a, self.counts, t, self.distributions, self.sigma_factors, **resolution)

    def fallout(self, j: int, t, lim, **resolution) -> tuple[float, float, float, float]:
        """``(below, above, mean, δ)``: exact fallout fractions of requirement ``j`` at the
        worse end of its mean-shift band, that end [response] and ``δ`` [response].
        ``resolution`` goes to :func:`allocator.convolve.linear_sum_distribution`."""
        req = self.requirements[j]
        delta = stack.mean_shift_delta(req.sensitivity, self.counts, self.mean_shifts, t)
        below, above, mean = chain_fallout(req.sensitivity, self.counts, t, self.distributions,
                                           self.sigma_factors, req.nominal, delta, lim.lower, lim.upper,
                                           **resolution)
        return below, above, mean, delta

    def statistics(self, t, limits) -> list[dict]:
        """As :meth:`AllocationProblem.statistics`, with the exact fallout (default grid)."""
        t = np.asarray(t, dtype=float)
        key = (t.tobytes(), tuple(limits))
        if self._last is not None and self._last[0] == key:
            return [dict(s) for s in self._last[1]]  # the answer's re-check, asked for again
        out = self._statistics(t, limits)
        self._last = (key, out)
        return [dict(s) for s in out]

    def _statistics(self, t, limits) -> list[dict]:
        n, f = self.counts, self.sigma_factors
        out = []
        for j, (req, lim) in enumerate(zip(self.requirements, limits)):
            a = req.sensitivity
            below, above, mean, delta = self.fallout(j, t, lim)
            fallout = below + above
            if lim.lower is None and lim.upper is None:
                excess = -1.0
            else:
                excess = fallout / lim.fallout - 1.0
            out.append({
                "half_width": stack.worst_case_half_width(a, n, t),
                "sigma": stack.rss_sigma(a, n, f * t),
                "delta": delta, "mean": mean, "fallout": fallout, "excess": excess,
            })
        return out


def convolution_solver(case, fix: Mapping[str, float] | None, surrogate_solver: Callable):
    """The ``convolution`` solver for ``case`` (what the dispatch returns for this model).

    Parameters
    ----------
    case : Case
    fix : mapping, optional
        Contributor name -> held ± tolerance [length].
    surrogate_solver : callable
        ``problem -> solver`` for an rss or mean-shift problem (the dispatch's
        :func:`~allocator.solve.dispatch.continuous_solver`).

    Raises
    ------
    CaseError
        An expression requirement, or ``[allocation].rounding`` (field named).
    UsageError
        A contributor that needs a choice of process or of listed tolerances
        (continuous tolerances only), or a bad ``fix`` entry.
    """
    file = str(case.path) if case.path is not None else None
    for k, req in enumerate(case.requirements, start=1):
        if not req.is_linear:
            raise CaseError(f"model convolution: {LINEAR_CHAIN_ONLY}", file=file,
                            field=f"requirement[{k}] ({req.name}).expression")
    if case.allocation.rounding is not None:
        raise CaseError("model convolution allocates continuous tolerances, without rounding "
                        "(use rss or mean-shift for rounded tolerances, then verify)", file=file,
                        field="allocation.rounding")
    try:
        problem = ConvolutionProblem(case, check_fix_values(case, fix), check=True)
    except NeedsDiscrete as err:
        raise UsageError(f"model convolution allocates continuous tolerances only: {err}") from None
    return ConvolutionAllocation(problem, surrogate_solver)


def _increasing_root(phi, lo: float, hi: float, *, xtol: float, first: float = 1e-3):
    """A root of the non-decreasing ``phi`` on ``[lo, hi]`` (``lo ≤ 0 ≤ hi``), bracketed
    outwards from 0 in steps growing eightfold (the answer is usually near 0).

    Returns
    -------
    (x, kind)
        ``kind`` 'root'; 'high' when ``phi ≤ 0`` up to ``hi``; 'low' when ``phi > 0`` down
        to ``lo``.
    """
    f0 = phi(0.0)
    if f0 == 0:
        return 0.0, "root"
    direction, end = (1.0, hi) if f0 < 0 else (-1.0, lo)
    near, step = 0.0, first
    while True:
        far = direction * step
        if direction * (far - end) >= 0:
            far = end
        f_far = phi(far)
        if (f_far > 0) != (f0 > 0) or f_far == 0:
            break
        if far == end:
            return end, ("high" if direction > 0 else "low")
        near, step = far, step * 8.0
    a, b = sorted((near, far))
    return optimize.brentq(phi, a, b, xtol=xtol, rtol=4 * np.finfo(float).eps), "root"


def _as_rss(problem: AllocationProblem, model: str, requirements=None) -> AllocationProblem:
    """A plain AllocationProblem sharing ``problem``'s arrays, under ``model``."""
    out = AllocationProblem.__new__(AllocationProblem)
    out.__dict__.update(problem.__dict__)
    out.model = model
    if requirements is not None:
        out.requirements = tuple(requirements)
    return out


class ConvolutionAllocation:
    """Least cost under the exact fallout of every requirement (see the module notes).

    Parameters
    ----------
    problem : ConvolutionProblem
    surrogate_solver : callable
        ``problem -> solver`` for the rss / mean-shift sub-problems.

    Examples
    --------
    >>> from allocator.case import load_case
    >>> from allocator.solve import allocate
    >>> case = load_case("cases/gearbox_end_play.toml")
    >>> exact, shifted = allocate(case, "convolution"), allocate(case, "mean-shift")
    >>> exact.status, bool(exact.total_cost <= shifted.total_cost * (1 + 1e-9))
    ('optimal', True)
    """

    def __init__(self, problem: ConvolutionProblem, surrogate_solver: Callable):
        self.problem = problem
        self._surrogate_solver = surrogate_solver
        p = problem
        self.start_model = "mean-shift" if np.any(p.mean_shifts > 0) else "rss"
        self._start = None
        self._points = COARSE_POINTS  # grid of the ray roots in the current phase
        self.evaluations = 0

    # ------------------------------------------------------------------ exact fallout

    def _fallout(self, j, t, lim, **resolution) -> float:
        self.evaluations += 1
        below, above, _, _ = self.problem.fallout(j, t, lim, **resolution)
        return below + above

    def _coarse(self, j, t, lim) -> float:
        return self._fallout(j, t, lim, bulk_points=self._points)

    def _gradient(self, j, t, lim) -> np.ndarray:
        r"""∇F_j at ``t`` [1/length].

        Normal contributors: central differences with the grid step held (the normal part
        is analytic, so the difference is smooth in ``t``). Uniform and triangular ones:
        the exact derivative in the half-width. With ``D`` the centred response and ``R``
        the response without one instance of a uniform on ``±c``,
        ``S_D(u) = (1/2c) ∫_{u−c}^{u+c} S_R(v) dv``, so

        .. math:: \frac{∂S_D(u)}{∂c} = \frac{S_R(u + c) + S_R(u − c)}{2c} − \frac{S_D(u)}{c};

        a triangular on ``±c`` is two uniforms on ``±c/2``, which gives the same formula
        with ``c/2`` and ``R`` holding the other half. Each tail is an upper tail of ``D``
        (``U − μ`` and ``μ − L``); a mean shift adds ``∂F/∂μ · ∂μ/∂t``. (Differences on the
        grid would be off by O(h/c) here, as the edge of a uniform moves across a bin.)
        """
        p = self.problem
        req = p.requirements[j]
        a = req.sensitivity
        n, f, kinds = p.counts, p.sigma_factors, p.distributions
        halves = uniform_halves(a, n, t, kinds)  # None: on the grid; else summed exactly
        delta = stack.mean_shift_delta(a, n, p.mean_shifts, t)
        if halves is None:
            base = p.distribution(j, t, bulk_points=COARSE_POINTS)
            grid = {"step": base.step} if base.step > 0 else {}
            _, _, mean = band_fallout(base, req.nominal, delta, lim.lower, lim.upper)
            sf_d, step = replace(base, mean=0.0).sf, base.step
        else:
            _, _, mean = chain_fallout(a, n, t, kinds, f, req.nominal, delta, lim.lower, lim.upper)
            sf_d, step = (lambda u: uniform_sum_sf(u, halves)), 0.0
        tails = [u for u in ((None if lim.upper is None else lim.upper - mean),
                             (None if lim.lower is None else mean - lim.lower)) if u is not None]
        g = np.zeros(t.size)
        involved = np.flatnonzero((a != 0) & (t > 0))
        bounded = [i for i in involved if kinds[i] != "normal"]
        slope_mean = 0.0
        if any(p.mean_shifts[i] > 0 for i in bounded) and delta > 0:
            spread = stack.rss_sigma(a, n, f * t)
            h = max(4.0 * step, 1e-6 * spread)
            density = lambda u: (sf_d(u - h) - sf_d(u + h)) / (2.0 * h)  # noqa: E731
            # F = S_D(U − μ) + S_D(μ − L): ∂F/∂μ = f_D(U − μ) − f_D(μ − L)
            if lim.upper is not None:
                slope_mean += density(lim.upper - mean)
            if lim.lower is not None:
                slope_mean -= density(mean - lim.lower)
            slope_mean *= 1.0 if mean >= req.nominal else -1.0
        for i in involved:
            if kinds[i] == "normal":
                e = GRADIENT_STEP * t[i]
                up, down = t.copy(), t.copy()
                up[i] += e
                down[i] -= e
                g[i] = (self._fallout(j, up, lim, **grid) - self._fallout(j, down, lim, **grid)) / (2.0 * e)
                continue
            # the response without one instance of i (a triangular keeps one uniform half)
            half = abs(a[i]) * t[i] * (0.5 if kinds[i] == "triangular" else 1.0)
            if halves is not None:
                rest = list(halves)
                del rest[int(np.argmin(np.abs(np.array(rest) - half)))]
                sf_r = lambda u, rest=rest: uniform_sum_sf(u, rest)  # noqa: E731
                d_half = sum((sf_r(u + half) + sf_r(u - half)) / (2.0 * half) - sf_d(u) / half for u in tails)
                g[i] = n[i] * abs(a[i]) * (d_half + slope_mean * p.mean_shifts[i])
                continue
            counts = n.copy()
            counts[i] -= 1
            coef, tol, kind, fac = a, t, list(kinds), f
            if kinds[i] == "triangular":
                coef, tol = np.append(a, a[i]), np.append(t, 0.5 * t[i])
                counts, kind, fac = np.append(counts, 1.0), kind + ["uniform"], np.append(f, 0.0)
            self.evaluations += 1
            rest = linear_sum_distribution(coef, counts, tol, kind, fac, **grid)
            d_half = sum((rest.sf(u + half) + rest.sf(u - half)) / (2.0 * half) - sf_d(u) / half
                         for u in tails)
            g[i] = n[i] * abs(a[i]) * (d_half + slope_mean * p.mean_shifts[i])
        return g

    # ------------------------------------------------------------------ scaling

    def _scaled(self, t, s) -> np.ndarray:
        out = t.copy()
        out[self.problem.free] *= s
        return out

    def _ray_root(self, j, t, lim) -> float | None:
        """``s`` with ``F_j(s·t_free, t_held) = p_j`` (None: not reached before the loosest)."""
        p = self.problem
        free = p.free & (t > 0)
        if not free.any():
            return None
        log_p = math.log(lim.fallout)
        phi = lambda x: math.log(max(self._coarse(j, self._scaled(t, math.exp(x)), lim), 1e-300)) - log_p  # noqa: E731
        cap = math.log(2.0 * float(np.max(p.loosest[free] / t[free])))
        x, kind = _increasing_root(phi, -700.0, max(cap, 0.0), xtol=1e-13)
        return math.exp(x) if kind == "root" else None

    def _project(self, t, limits, first: float = 1e-3, **resolution) -> np.ndarray:
        """The largest uniform scale of the free tolerances (clipped to their ranges) at
        which every requirement meets its target: ``clip(θ·t)``, the largest feasible θ."""
        p = self.problem
        free = p.free
        if not free.any():
            return t

        def at(theta):
            out = t.copy()
            out[free] = np.clip(theta * t[free], p.tightest[free], p.loosest[free])
            return out

        def excess(x):
            tt = at(math.exp(x))
            worst = -math.inf
            for j, lim in enumerate(limits):
                if lim.lower is None and lim.upper is None:
                    continue
                value = self._fallout(j, tt, lim, **resolution)
                worst = max(worst, math.log(max(value, 1e-300)) - math.log(lim.fallout))
            return worst

        lo = min(math.log(float(np.min(p.tightest[free] / t[free]))), 0.0)
        hi = max(math.log(float(np.max(p.loosest[free] / t[free]))), 0.0)
        x, kind = _increasing_root(excess, lo, hi, xtol=1e-12 if resolution else 1e-14, first=first)
        if kind == "high":
            return at(math.exp(hi))
        if kind == "low":
            return at(math.exp(lo))  # infeasible: the caller's re-check reports it
        width = 1e-14
        while excess(x) > 0 and x > lo:  # stay on the feasible side
            x = max(lo, x - width)
            width *= 4.0
        return at(math.exp(x))

    # ------------------------------------------------------------------ the surrogate

    def _surrogate_requirement(self, j, t, lim) -> RequirementData | None:
        p = self.problem
        s = self._ray_root(j, t, lim)
        if s is None:
            return None
        touch = self._scaled(t, s)
        g = self._gradient(j, touch, lim)
        involved = p.requirements[j].sensitivity != 0
        g = np.where(involved, np.maximum(g, 1e-12 * max(float(np.max(g)), 1e-300)), 0.0)
        gt = float(np.sum(g * touch))
        if not gt > 0:
            return None
        w = np.where(touch > 0, g / (np.where(touch > 0, touch, 1.0) * gt), 0.0)
        a = np.sqrt(w / (p.counts * p.sigma_factors**2))
        req = p.requirements[j]
        return RequirementData(req.name, 0.0, a, None, _Z, _Z_PPM, True)

    def _start_point(self, overrides) -> tuple[np.ndarray, str]:
        p = self.problem
        if self._start is None:
            self._start = self._surrogate_solver(_as_rss(p, self.start_model))
        start = self._start.solve(overrides)
        if start.status == "optimal":
            return start.allocated_array(), f"the {self.start_model} optimum"
        t = p.held.copy()
        t[p.free] = np.sqrt(p.tightest[p.free] * p.loosest[p.free])
        return t, "the middle of the tolerance ranges"

    # ------------------------------------------------------------------ solve

    def solve(self, overrides=None) -> Allocation:
        """Allocate with the case's limits, or with ``overrides`` (see
        :meth:`~allocator.solve.problem.AllocationProblem.limits`)."""
        p = self.problem
        self.evaluations = 0
        limits = p.limits(overrides)
        reason = p.diagnose(limits)
        if reason is not None:
            return p.infeasible(limits, reason, SOLVER_NAME)
        t, start = self._start_point(overrides)
        t, steps = self._iterate(t, limits, COARSE_POINTS, MAX_ITERATIONS)
        t, more = self._iterate(t, limits, REFINE_POINTS, REFINE_ITERATIONS)
        t = self._project(t, limits, first=1e-5)  # onto the targets by the default (full) grid
        return self._result(t, limits, start, steps + more)

    def _iterate(self, t, limits, points: int, most: int) -> tuple[np.ndarray, int]:
        """Convex steps from ``t`` with the ray roots and scaling on a ``points`` grid."""
        p = self.problem
        free = p.free
        self._points = points
        grid = {"bulk_points": points}
        t = self._project(t, limits, **grid)
        cost = p.total_cost(t)
        steps = 0
        for _ in range(most):
            rows = [self._surrogate_requirement(j, t, lim) for j, lim in enumerate(limits)
                    if lim.lower is not None or lim.upper is not None]
            rows = [r for r in rows if r is not None]
            if rows:
                surrogate = self._surrogate_solver(_as_rss(p, "rss", rows)).solve()
                if surrogate.status != "optimal":
                    break
                target = surrogate.allocated_array()
            else:
                target = np.where(free, p.loosest, t)
            lam, moved = 1.0, False
            for _ in range(STEP_TRIES):
                trial = t.copy()
                trial[free] = t[free] ** (1.0 - lam) * target[free] ** lam
                trial = self._project(trial, limits, **grid)
                trial_cost = p.total_cost(trial)
                if trial_cost < cost:
                    moved = True
                    break
                lam *= 0.5
            if not moved:
                break
            steps += 1
            change = float(np.max(np.abs(np.log(trial[free] / t[free])))) if free.any() else 0.0
            gain = (cost - trial_cost) / cost
            t, cost = trial, trial_cost
            if change < MOVE_TOL or gain < COST_RTOL:
                break
        return t, steps

    # ------------------------------------------------------------------ the answer

    def _multipliers(self, t, limits):
        """Multipliers μ ≥ 0 of ``F_j ≤ p_j`` and the relative first-order residual."""
        p = self.problem
        free = p.free
        grad_cost = (p.counts * p.curves.derivative(t))[free]
        rows = []
        for j, lim in enumerate(limits):
            if lim.lower is None and lim.upper is None:
                rows.append(np.zeros(free.sum()))
            else:
                rows.append(self._gradient(j, t, lim)[free])
        G = np.array(rows).reshape(len(limits), -1)
        flags = np.array(p.bound_flags(t))[free]
        at_low, at_high = flags == "tightest", flags == "loosest"
        scale = float(np.linalg.norm(grad_cost)) or 1.0

        def violation(mu):
            r = (grad_cost + G.T @ mu) / scale
            return np.where(at_low, np.minimum(r, 0.0), np.where(at_high, np.maximum(r, 0.0), r))

        if not free.any():
            return np.zeros(len(limits)), 0.0
        column = np.linalg.norm(G, axis=1)
        column = np.where(column > 0, column, 1.0)
        # scaled unknowns ν = μ·|g_j| / |∇C|, bounded below by 0
        fit = optimize.least_squares(
            lambda nu: violation(nu * scale / column), np.zeros(len(limits)), bounds=(0.0, np.inf),
            xtol=1e-15, ftol=1e-15, gtol=1e-15,
        )
        mu = fit.x * scale / column
        return mu, float(np.linalg.norm(violation(mu)))

    def _shadow(self, j, t, lim, mu) -> dict:
        """d(cost)/d(limit) and d(cost)/d(ppm) from the multiplier ``mu`` (envelope theorem)."""
        out = {"binding": "", "shadow_price": 0.0,
               "shadow_lower": None if lim.lower is None else 0.0,
               "shadow_upper": None if lim.upper is None else 0.0,
               "shadow_ppm": 0.0}
        if not mu > 0:
            return out
        p = self.problem
        req = p.requirements[j]
        sigma = stack.rss_sigma(req.sensitivity, p.counts, p.sigma_factors * t)
        h = 1e-4 * sigma if sigma > 0 else 1e-9
        _, _, mean, _ = p.fallout(j, t, lim)

        def tails(lower, upper):  # (below, above) with the mean held at the worse end
            below, above, _ = chain_fallout(req.sensitivity, p.counts, t, p.distributions,
                                            p.sigma_factors, mean, 0.0, lower, upper)
            return below, above

        if lim.lower is not None:  # ∂F/∂L = density at L
            density = (tails(lim.lower + h, None)[0] - tails(lim.lower - h, None)[0]) / (2 * h)
            out["shadow_lower"] = mu * density
        if lim.upper is not None:  # ∂F/∂U = −density at U
            density = (tails(None, lim.upper - h)[1] - tails(None, lim.upper + h)[1]) / (2 * h)
            out["shadow_upper"] = -mu * density
        out["shadow_ppm"] = -mu * 1e-6
        low, up = abs(out["shadow_lower"] or 0.0), abs(out["shadow_upper"] or 0.0)
        big = max(low, up)
        sides = [s for s, v in (("lower", low), ("upper", up)) if big > 0 and v >= 1e-3 * big]
        out["binding"] = "both" if len(sides) == 2 else (sides[0] if sides else "")
        out["shadow_price"] = out["shadow_upper"] if up >= low else out["shadow_lower"]
        return out

    def _independent_check(self, t, limits, stats) -> tuple[float, str]:
        """Compare each requirement's fallout (:func:`allocator.convolve.chain_fallout`: the
        grid, or exact rational arithmetic for a few uniform instances) with characteristic-
        function inversion (:func:`allocator.convolve.inversion_sf`), which shares no grid and
        no FFT with either.

        Returns
        -------
        (excess, requirement)
            The largest ``|difference| / allowed`` (≤ 1: they agree), ``allowed`` being
            :data:`INVERSION_RTOL` of the target or ten times the inversion's own error
            estimate, whichever is larger; and that requirement's name.
        """
        from ..convolve import _inversion

        p = self.problem
        worst, where = 0.0, ""
        for req, lim, s in zip(p.requirements, limits, stats):
            if lim.lower is None and lim.upper is None:
                continue
            args = (req.sensitivity, p.counts, t, p.distributions, p.sigma_factors)
            fallout, error = 0.0, 0.0
            for mean in {req.nominal - s["delta"], req.nominal + s["delta"]}:
                value, err = 0.0, 0.0
                for u in ((None if lim.upper is None else lim.upper - mean),
                          (None if lim.lower is None else mean - lim.lower)):
                    if u is not None:
                        v, e = _inversion(u, *args)
                        value, err = value + v, err + e
                if value >= fallout:
                    fallout, error = value, err
            allowed = max(INVERSION_RTOL * lim.fallout, 10.0 * error)
            excess = abs(fallout - s["fallout"]) / allowed
            if excess >= worst:
                worst, where = excess, req.name
        return worst, where

    def _result(self, t, limits, start, iterations) -> Allocation:
        p = self.problem
        stats = p.statistics(t, limits)  # the independent re-check: default (full) grid
        if not all(s["excess"] <= FALLOUT_RTOL for s in stats):
            worst = max(range(len(stats)), key=lambda k: stats[k]["excess"])
            return p.result(
                None, limits, status="failed", solver=SOLVER_NAME, iterations=iterations,
                message=(f"no verified optimum: the exact fallout of requirement '{p.requirements[worst].name}' is "
                         f"{fraction_to_ppm(stats[worst]['fallout']):.6g} ppm at the best tolerances "
                         f"found, above its target {limits[worst].fallout_ppm:g} ppm"),
            )
        disagreement, where = self._independent_check(t, limits, stats)
        if disagreement > 1.0:
            return p.result(
                None, limits, status="failed", solver=SOLVER_NAME, iterations=iterations,
                message=(f"no verified optimum: the exact fallout of requirement '{where}' and its "
                         f"independent re-check (characteristic-function inversion) differ by "
                         f"{disagreement:.1f} times what they may (1e-5 of the target, or ten times the "
                         "inversion's error estimate)"),
            )
        mu, residual = self._multipliers(t, limits)
        if residual <= KKT_RTOL:
            status = "optimal"
            message = (
                f"KKT point of the exact-fallout problem ({iterations} convex steps from {start}; "
                f"first-order conditions met to {residual:.1e} relative); exact fallout re-checked on "
                "the full grid and independently by characteristic-function inversion; not proven "
                "globally optimal (the exact feasible set need not be convex)"
            )
        else:
            status = "failed"
            message = (
                f"no verified optimum: the first-order (KKT) conditions of the exact problem are off by "
                f"{residual:.1e} relative after {iterations} steps; the tolerances shown meet every "
                "requirement (exact fallout re-checked)"
            )
        base = p.result(t, limits, status=status, message=message, solver=SOLVER_NAME,
                        iterations=iterations, marginal=False)
        if status != "optimal":
            return base
        records = [replace(r, **self._shadow(j, t, lim, float(m)))
                   for j, (r, lim, m) in enumerate(zip(base.requirements, limits, mu))]
        return p.result(t, limits, status=status, message=message, solver=SOLVER_NAME,
                        iterations=iterations, marginal=False, requirements=records)
