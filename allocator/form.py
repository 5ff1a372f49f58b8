"""FORM and SORM: the most probable failure point of a limit in standard normal space.

Standard normal space. Every random input becomes one coordinate ``u_j`` of a vector of
independent standard normals: a normal contributor one coordinate for the sum of its
``count`` instances (deviation ``σ·√count·u``), a uniform or triangular contributor one
coordinate per instance, mapped to its deviation through the inverse CDF of its own
distribution, ``x = F⁻¹(Φ(u))`` (the Rosenblatt transformation of independent inputs).
A contributor's value is nominal plus the sum of its instances' deviations (plus any mean
shift, in :attr:`StandardSpace.base`).

Per limit, with ``g(u) = (U − y)/σ`` or ``(y − L)/σ`` (failure ``g < 0``):

- **FORM**: the most probable failure point ``u*`` (the point of the limit surface
  ``g = 0`` closest to the origin) by the HL-RF iteration with a merit-function step
  (Hasofer & Lind 1974; Rackwitz & Fiessler 1978; Zhang & Der Kiureghian 1995), reliability
  index ``β = ±|u*|`` and ``P ≈ Φ(−β)``;
- **SORM**: Breitung's (1984) curvature correction ``P ≈ Φ(−β) Π (1 + β κ_i)^(−½)`` with the
  principal curvatures ``κ_i`` of the limit surface at ``u*``.

The response is evaluated by an *evaluator*: a function of an ``(n, contributors)`` array
of contributor values (each the sum of its instances, in case order) returning ``y`` (n,),
or ``(y, closed)`` with a boolean mask of the assemblies whose response exists (the rest
are failures, like an undefined response in the Monte Carlo). :func:`response_evaluator`
builds it for chains and expressions the way the Monte Carlo evaluates them; any other
requirement kind needs only its own evaluator.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Callable

import numpy as np

if TYPE_CHECKING:
    from .model import Case, Requirement

__all__ = [
    "Evaluator",
    "StandardSpace",
    "LimitState",
    "DesignPoint",
    "design_point",
    "response_evaluator",
    "responses",
    "BETA_MAX",
]

BETA_MAX = 37.0  # Φ(−37) ≈ 6e-300: a limit farther away than this is unreachable
MAX_HESSIAN_PARTS = 200  # SORM of an expression: at most this many contributors in its Hessian
_SQRT2 = math.sqrt(2.0)
_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)

Evaluator = Callable[[np.ndarray], object]


# --------------------------------------------------------------------------- the map u -> x


class StandardSpace:
    """The map from independent standard normals ``u`` to contributor values.

    Parameters
    ----------
    distributions : sequence of {'normal', 'uniform', 'triangular'}
        Per contributor.
    counts : array_like of int
        Instances per assembly [-].
    tolerances : array_like
        ± tolerance per contributor [length].
    sigma_factors : array_like
        σ/t per contributor (normal ones only are used) [-].
    base : array_like
        Value of each contributor (sum of its instances) with every deviation 0, mean
        shift included [length].

    Notes
    -----
    Coordinates are ordered by contributor. Deviations of one coordinate: normal
    ``σ√n·u``; uniform on ±t ``t·erf(u/√2)`` (= ``t(2Φ(u) − 1)``); symmetric triangular on
    ±t ``sign(u)·t·(1 − √(2Φ(−|u|)))``. Both are written with the smaller tail
    probability, so the map keeps its accuracy where failures happen.
    """

    def __init__(self, distributions, counts, tolerances, sigma_factors, base):
        counts = np.asarray(counts, dtype=int)
        t = np.asarray(tolerances, dtype=float)
        f = np.asarray(sigma_factors, dtype=float)
        owner, kind, scale = [], [], []
        for i, dist in enumerate(distributions):
            if dist == "normal":
                owner.append(i)
                kind.append(0)
                scale.append(f[i] * t[i] * math.sqrt(counts[i]))
            else:
                code = 1 if dist == "uniform" else 2
                owner += [i] * int(counts[i])
                kind += [code] * int(counts[i])
                scale += [t[i]] * int(counts[i])
        self.owner = np.array(owner, dtype=int)
        self.kind = np.array(kind, dtype=int)
        self.scale = np.array(scale, dtype=float)
        self.base = np.asarray(base, dtype=float)
        self.n = len(self.base)
        self.starts = np.searchsorted(self.owner, np.arange(self.n))

    @property
    def dimension(self) -> int:
        """Number of standard normal coordinates ``d``."""
        return len(self.owner)

    def deviations(self, u: np.ndarray) -> np.ndarray:
        """Deviation of each coordinate's instance (same shape as ``u``) [length]."""
        from scipy import special

        u = np.asarray(u, dtype=float)
        out = u * self.scale
        uni = self.kind == 1
        if uni.any():
            out[..., uni] = self.scale[uni] * special.erf(u[..., uni] / _SQRT2)
        tri = self.kind == 2
        if tri.any():
            a = u[..., tri]
            out[..., tri] = np.sign(a) * self.scale[tri] * (1.0 - np.sqrt(special.erfc(np.abs(a) / _SQRT2)))
        return out

    def derivatives(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """First and second derivatives of each deviation by its own coordinate."""
        from scipy import special

        u = np.asarray(u, dtype=float)
        d1 = np.broadcast_to(self.scale, u.shape).copy()
        d2 = np.zeros_like(u)
        log_pdf = -0.5 * u * u - _LOG_SQRT_2PI
        uni = self.kind == 1
        if uni.any():
            d1[..., uni] = 2.0 * self.scale[uni] * np.exp(log_pdf[..., uni])
            d2[..., uni] = -u[..., uni] * d1[..., uni]
        tri = self.kind == 2
        if tri.any():
            a = np.abs(u[..., tri])
            log_tail2 = math.log(2.0) + special.log_ndtr(-a)  # log 2Φ(−|u|)
            d1[..., tri] = self.scale[tri] * np.exp(log_pdf[..., tri] - 0.5 * log_tail2)
            mills = np.exp(log_pdf[..., tri] - log_tail2)  # φ / (2Φ(−|u|))
            d2[..., tri] = np.sign(u[..., tri]) * d1[..., tri] * (mills - a)
        return d1, d2

    def values(self, u: np.ndarray) -> np.ndarray:
        """Contributor values (rows × contributors) at standard normal points ``u`` [length]."""
        dev = self.deviations(np.atleast_2d(u))
        return self.base + np.add.reduceat(dev, self.starts, axis=1)


# --------------------------------------------------------------------------- the response


def responses(evaluate: Evaluator, values: np.ndarray) -> np.ndarray:
    """``y`` per row, NaN where the evaluator says the assembly does not close."""
    out = evaluate(values)
    if isinstance(out, tuple):
        y, closed = out
        y = np.where(np.asarray(closed, dtype=bool), np.asarray(y, dtype=float), np.nan)
    else:
        y = out
    return np.broadcast_to(np.asarray(y, dtype=float), (len(values),))


def response_evaluator(case: Case, requirement: Requirement) -> Evaluator:
    """The evaluator of a chain or expression requirement: values (n, contributors) -> y (n,).

    The expression is compiled and evaluated exactly as the Monte Carlo does
    (:func:`allocator.chain.compile_expression` on contributor names, the real part
    kept); a chain is ``ȳ + Σ a_i (x_i − x̄_i)``.
    """
    from .chain import compile_expression, linearise, nominal_values

    if case.unknowns:  # the closure equations solved per sampled assembly (docs/closure.md)
        from .closure import ResponseEvaluator

        solve = ResponseEvaluator(case)

        def through_loop(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
            response = solve(requirement, values)
            return response.values, response.closed

        return through_loop
    at = nominal_values(case)
    base = np.array([at[name] for name in case.names])
    if requirement.chain is not None:
        lin = linearise(case, requirement)
        a, y0 = lin.sensitivity, lin.nominal

        def chain(values: np.ndarray) -> np.ndarray:
            return y0 + (values - base) @ a

        return chain
    expr = compile_expression(requirement.expression, case.names)
    names = case.names

    def expression(values: np.ndarray) -> np.ndarray:
        env = {name: values[:, i] for i, name in enumerate(names)}
        with np.errstate(all="ignore"):
            return np.real(np.broadcast_to(expr.evaluate(env), (len(values),)))

    return expression


class LimitState:
    """``g(u)`` of one limit, failure ``g < 0``, with its gradient and Hessian in u-space.

    Parameters
    ----------
    space : StandardSpace
    evaluate : callable
        Contributor values (n, contributors) -> ``y`` or ``(y, closed)``.
    limit : float
        The limit [response].
    side : {+1, −1}
        +1 for an upper limit (``g = (limit − y)/scale``), −1 for a lower one
        (``g = (y − limit)/scale``).
    scale : float
        Response scale, e.g. its RSS σ, so that ``g`` is in σ [response].
    steps : numpy.ndarray
        Difference steps in each contributor value [length].
    linear : bool
        True when ``y`` is linear in the contributor values (its Hessian is 0).
    """

    def __init__(self, space: StandardSpace, evaluate: Evaluator, limit: float, side: int, scale: float,
                 steps: np.ndarray, linear: bool):
        self.space, self.evaluate, self.limit, self.side = space, evaluate, limit, side
        self.scale, self.steps, self.linear = scale, steps, linear

    def from_y(self, y: float | np.ndarray) -> float | np.ndarray:
        """``g`` [σ of the response] at response values ``y`` [response]; < 0 is failure."""
        return self.side * (self.limit - y) / self.scale  # side +1: upper limit, −1: lower

    def value(self, u: np.ndarray) -> float:
        """``g`` [σ of the response] at one standard normal point ``u``."""
        return float(self.from_y(responses(self.evaluate, self.space.values(u))[0]))

    def _x_gradient(self, x: np.ndarray) -> np.ndarray:
        """Central differences of y in the contributor values (one evaluator call)."""
        n, h = len(x), self.steps
        rows = np.repeat(x[None, :], 2 * n, axis=0)
        rows[np.arange(n), np.arange(n)] += h
        rows[n + np.arange(n), np.arange(n)] -= h
        y = responses(self.evaluate, rows)
        return (y[:n] - y[n:]) / (2.0 * h)

    def _involved(self, x: np.ndarray, dg_dx: np.ndarray) -> np.ndarray:
        """Contributors the response moves with: a non-zero slope or second difference."""
        n, h = len(x), 10.0 * self.steps
        rows = np.repeat(x[None, :], 2 * n + 1, axis=0)
        rows[np.arange(n), np.arange(n)] += h
        rows[n + np.arange(n), np.arange(n)] -= h
        y = responses(self.evaluate, rows)
        curved = (y[:n] - 2.0 * y[-1] + y[n : 2 * n]) != 0
        return np.flatnonzero((dg_dx != 0) | curved | ~np.isfinite(y[:n] + y[n : 2 * n]))

    def gradient(self, u: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        """``g(u)``, ``∇g(u)`` and ``∂g/∂x`` per contributor."""
        x = self.space.values(u)[0]
        g = float(self.from_y(responses(self.evaluate, x[None, :])[0]))
        dg_dx = -self.side * self._x_gradient(x) / self.scale
        d1, _ = self.space.derivatives(u)
        return g, dg_dx[self.space.owner] * d1, dg_dx

    def hessian(self, u: np.ndarray) -> np.ndarray:
        """Hessian of ``g`` in u-space by the chain rule (x-space Hessian by differences)."""
        space = self.space
        x = space.values(u)[0]
        _, _, dg_dx = self.gradient(u)
        d1, d2 = space.derivatives(u)
        h_u = np.diag(dg_dx[space.owner] * d2)
        if not self.linear:
            involved = self._involved(x, dg_dx)
            if len(involved) > MAX_HESSIAN_PARTS:
                raise _TooWide(len(involved))
            n = len(x)
            h = 10.0 * self.steps
            i, k = np.triu_indices(len(involved))
            i, k = involved[i], involved[k]
            rows = np.repeat(x[None, :], 4 * len(i), axis=0)
            m = len(i)
            for q, (si, sk) in enumerate(((1, 1), (1, -1), (-1, 1), (-1, -1))):
                block = rows[q * m : (q + 1) * m]
                block[np.arange(m), i] += si * h[i]
                block[np.arange(m), k] += sk * h[k]
            y = responses(self.evaluate, rows).reshape(4, m)
            second = (y[0] - y[1] - y[2] + y[3]) / (4.0 * h[i] * h[k])
            h_x = np.zeros((n, n))
            h_x[i, k] = second
            h_x[k, i] = second
            h_x *= -self.side / self.scale
            o = space.owner
            h_u += h_x[np.ix_(o, o)] * np.outer(d1, d1)
        return h_u


class _TooWide(Exception):
    """The expression's Hessian would need too many contributors (SORM is left out)."""


# --------------------------------------------------------------------------- FORM and SORM


@dataclass(frozen=True)
class DesignPoint:
    """Most probable failure point of one limit (FORM), with the SORM correction.

    Attributes
    ----------
    status : {'converged', 'unreachable', 'not-converged'}
        'unreachable': no failure within ``|u| ≤ BETA_MAX`` (probability below 1e-299).
    u : numpy.ndarray
        Design point in standard normal space.
    beta : float
        Reliability index, ``+|u*|`` when the nominal assembly is inside the limit [-].
    form : float
        ``Φ(−β)`` [-] (0 when unreachable; NaN when not converged).
    sorm : float
        Breitung's estimate [-]; NaN when it does not apply (β ≤ 0, ``1 + βκ ≤ 0``,
        not converged).
    curvatures : numpy.ndarray
        Principal curvatures of the limit surface at ``u*`` (positive: bending away
        from the origin) [1/σ].
    iterations : int
    """

    status: str
    u: np.ndarray
    beta: float
    form: float
    sorm: float
    curvatures: np.ndarray
    iterations: int
    note: str = ""  # why SORM is missing, if it is


def design_point(limit: LimitState, *, max_iterations: int = 100, tol: float = 1e-9, sorm: bool = True) -> DesignPoint:
    """Design point of one limit by the HL-RF iteration with a merit-function step.

    Parameters
    ----------
    limit : LimitState
    max_iterations : int
        HL-RF steps at most [-].
    tol : float
        ``|g|`` at convergence [σ of the response].
    sorm : bool
        Also compute the curvatures and Breitung's estimate.

    Returns
    -------
    DesignPoint

    Notes
    -----
    HL-RF: ``u ← [(∇g·u − g)/|∇g|²] ∇g``. The step toward it is halved until the merit
    ``½|u|² + c|g|`` decreases, with ``c > |u|/|∇g|`` (Zhang & Der Kiureghian 1995);
    trial points stay in ``|u| ≤ BETA_MAX``. Converged when ``|g| ≤ tol`` (g is in σ
    of the response) and ``u`` is parallel to ``∇g`` to ``1e-6``. SORM: the Hessian
    of ``g`` divided by ``|∇g|``, restricted to the plane normal to ``u*``, gives the
    curvatures ``κ_i``; ``P ≈ Φ(−β) Π (1 + β κ_i)^(−½)`` (Breitung 1984).

    References
    ----------
    .. [1] Hasofer, A. M. and Lind, N. C. (1974). Exact and invariant second-moment code
       format. Journal of the Engineering Mechanics Division 100(1), 111-121.
    .. [2] Rackwitz, R. and Fiessler, B. (1978). Structural reliability under combined
       random load sequences. Computers & Structures 9(5), 489-494.
    .. [3] Zhang, Y. and Der Kiureghian, A. (1995). Two improved algorithms for
       reliability analysis. Reliability and Optimization of Structural Systems,
       Springer, 297-304.
    .. [4] Breitung, K. (1984). Asymptotic approximations for multinormal integrals.
       Journal of Engineering Mechanics 110(3), 357-366.
    """
    from scipy import special

    d = limit.space.dimension
    u = np.zeros(d)
    g, grad, _ = limit.gradient(u)
    c = 1.0
    converged = False
    it = 0
    for it in range(1, max_iterations + 1):
        norm = float(np.linalg.norm(grad))
        if not (math.isfinite(g) and norm > 0 and np.all(np.isfinite(grad))):
            break
        target = (float(grad @ u) - g) / norm**2 * grad
        c = max(c, 2.0 * float(np.linalg.norm(u)) / norm + 1.0)
        merit = 0.5 * float(u @ u) + c * abs(g)
        step, accepted = 1.0, None
        while step > 1e-6:
            trial = u + step * (target - u)
            r = float(np.linalg.norm(trial))
            if r > BETA_MAX:
                trial *= BETA_MAX / r
            g_trial = limit.value(trial)
            if math.isfinite(g_trial) and 0.5 * float(trial @ trial) + c * abs(g_trial) <= merit:
                accepted = trial
                break
            step *= 0.5
        if accepted is None:  # no decrease: take the smallest finite step anyway
            accepted = u + step * (target - u)
        moved = float(np.linalg.norm(accepted - u))
        u = accepted
        g, grad, _ = limit.gradient(u)
        norm = float(np.linalg.norm(grad))
        if not (math.isfinite(g) and norm > 0):
            break
        alpha = -grad / norm
        off_line = float(np.linalg.norm(u - float(alpha @ u) * alpha))
        if abs(g) <= tol and off_line <= 1e-6 * max(1.0, float(np.linalg.norm(u))):
            converged = True
            break
        if np.linalg.norm(u) >= BETA_MAX * (1 - 1e-9) and g > 0 and moved < 1e-9:
            break
    radius = float(np.linalg.norm(u))
    empty = np.zeros(0)
    if not converged:
        if radius >= BETA_MAX * (1 - 1e-6) and math.isfinite(g) and g > 0:
            return DesignPoint("unreachable", u, math.inf, 0.0, 0.0, empty, it)
        return DesignPoint("not-converged", u, math.nan, math.nan, math.nan, empty, it)
    g0 = limit.value(np.zeros(d))
    beta = radius if g0 >= 0 else -radius
    p_form = float(special.ndtr(-beta))
    p_sorm, kappa, note = math.nan, empty, ""
    if sorm and d > 1 and beta > 0:
        alpha = -grad / np.linalg.norm(grad)
        basis, _ = np.linalg.qr(np.column_stack([alpha, np.eye(d)]))
        normal_plane = basis[:, 1:d]
        try:
            h = limit.hessian(u) / np.linalg.norm(grad)
        except _TooWide as wide:
            h = None
            note = f"SORM left out: the response moves with {wide.args[0]} contributors (at most {MAX_HESSIAN_PARTS})"
        if h is not None:
            kappa = np.linalg.eigvalsh(normal_plane.T @ h @ normal_plane)
            factors = 1.0 + beta * kappa
            if np.all(factors > 0):
                p_sorm = p_form * float(np.prod(factors ** -0.5))
            else:
                note = "SORM does not apply (a curvature with 1 + βκ ≤ 0)"
    elif sorm and d == 1 and beta > 0:
        p_sorm = p_form
    return DesignPoint("converged", u, beta, p_form, p_sorm, kappa, it, note)
