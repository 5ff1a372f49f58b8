"""Implicit assemblies: unknowns settled by closure equations (vector loops).

A case may declare ``[[unknown]]`` quantities (an angle, a position where a part comes to
rest) and as many ``[[closure]]`` equations ``F(x, u) = 0``, written in the expression
grammar of :mod:`allocator.chain` over contributors ``x`` and unknowns ``u``. A requirement's
``expression`` may then name unknowns: ``y = f(x, u(x))``.

- :func:`solve_loop` solves the equations at the nominals by damped Newton from the
  guesses, Jacobians by the complex step, to round-off, and gives ``du/dx`` by the implicit
  function theorem: ``du/dx = −(∂F/∂u)⁻¹ · ∂F/∂x``. :func:`allocator.chain.linearise` then
  gives every requirement ``dy/dx = ∂f/∂x + ∂f/∂u · du/dx`` (the contract formula), so every
  model, frontier, report and analysis uses it as it uses an expression's sensitivities.
- :func:`solve_samples` solves the loop for a block of sampled assemblies at once
  (vectorised Newton from the nominal solution); rows whose loop cannot close are marked.
- :class:`ResponseEvaluator` evaluates any requirement's exact response for an
  ``(n, contributors)`` array of sampled contributor values, with a ``closed`` mask: the
  entry point for Monte Carlo and importance sampling.

In an equation, as in a requirement, a contributor's name stands for the sum of its
``count`` instances. See docs/closure.md for turning a sketch into closure equations.

References
----------
.. [1] Chase, K. W., Gao, J. and Magleby, S. P. (1995). General 2-D tolerance analysis of
   mechanical assemblies with small kinematic adjustments. Journal of Design and
   Manufacturing 5(4), 263-274.
.. [2] Martins, J. R. R. A., Sturdza, P. and Alonso, J. J. (2003). The complex-step
   derivative approximation. ACM Trans. Math. Softw. 29(3), 245-262.
.. [3] Dennis, J. E. and Schnabel, R. B. (1996). Numerical Methods for Unconstrained
   Optimization and Nonlinear Equations. SIAM (damped Newton with backtracking, 6.3).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Mapping, NamedTuple, Protocol

import numpy as np

from .chain import CompiledExpression, compile_expression



class CaseLike(Protocol):
    """What this module reads of an :class:`allocator.model.Case`.

    Typed by its shape rather than imported: allocator.model imports this module (for
    ``Case.loop``), and the package keeps its import graph free of cycles.
    """

    unknowns: tuple
    closures: tuple
    contributors: tuple
    requirements: tuple

    @property
    def names(self) -> tuple[str, ...]: ...

    @property
    def unknown_names(self) -> tuple[str, ...]: ...

    @property
    def loop(self) -> LoopSolution | None: ...

    def index(self, name: str) -> int: ...


class RequirementLike(Protocol):
    """What this module reads of an :class:`allocator.model.Requirement`."""

    name: str
    chain: Mapping[str, float] | None
    expression: str | None

__all__ = [
    "ClosureError",
    "CompiledLoop",
    "LoopSolution",
    "ClosedResponse",
    "ResponseEvaluator",
    "LoopSensitivities",
    "compile_loop",
    "loop_sensitivities",
    "solve_loop",
    "solve_samples",
]

STEP = 1e-200  # complex step [-]: exact first derivatives, no cancellation
MAX_ITERATIONS = 100  # nominal solve
SAMPLE_ITERATIONS = 40  # per sampled assembly (starts from the nominal solution: a few suffice)
RESIDUAL_RTOL = 1e-9  # closed: every |F_i| <= RESIDUAL_RTOL · (size of the terms of F_i)
# condition number of the scaled ∂F/∂u beyond which the loop counts as at a dead point: an
# unknown would move 1e4 times more than the dimensions that move it. Near a double root
# the solution's relative error grows like cond²·eps (about 1e-6 at the limit); at an
# exact dead point Newton stops on round-off with the number near 1e5, past the limit
CONDITION_LIMIT = 1e4
STEP_CONDITION_LIMIT = 1e13  # on the way to the solution: beyond it no Newton step is meaningful
SCALE_FLOOR = 1e-6  # an equation's yardstick is at least this fraction of the loop's largest
ROUND_OFF = 4 * np.finfo(float).eps  # scaled residual at which a chord row is done
CHORD_ITERATIONS = 12  # chord steps with the nominal Jacobian before Newton takes over
CHORD_CONTRACTION = 0.5  # a chord step must at least halve the scaled residual
MIN_DAMPING = 2.0**-12  # smallest Newton step fraction tried before giving up


class ClosureError(ValueError):
    """The closure equations have no usable solution at the nominals (message is one line)."""


@dataclass(frozen=True)
class CompiledLoop:
    """A case's closure equations, checked and compiled.

    Attributes
    ----------
    contributors : tuple of str
        The case's contributor names, in case order.
    unknowns : tuple of str
        The unknowns, in case order.
    guesses : numpy.ndarray
        Start of the nominal solve, per unknown.
    labels : tuple of str
        Each equation's name (``closure[i]`` when it has none).
    equations : tuple of CompiledExpression
        ``F_i``; each is 0 when the loop closes.
    used : tuple of str
        Contributor names some equation uses (the only ones the loop depends on).
    """

    contributors: tuple[str, ...]
    unknowns: tuple[str, ...]
    guesses: np.ndarray
    labels: tuple[str, ...]
    equations: tuple[CompiledExpression, ...]
    used: tuple[str, ...]


def compile_loop(case: CaseLike) -> CompiledLoop:
    """Compile the closure equations of ``case`` (names: contributors and unknowns).

    Raises
    ------
    ClosureError
        An equation is not allowed by the expression grammar.
    """
    from .chain import ExpressionError

    allowed = case.names + case.unknown_names
    equations, labels = [], []
    for i, closure in enumerate(case.closures, start=1):
        label = closure.name or f"closure[{i}]"
        try:
            equations.append(compile_expression(closure.equation, allowed, what="a contributor or unknown"))
        except ExpressionError as err:
            raise ClosureError(f"{label}: {err}") from None
        labels.append(label)
    unknown_set = set(case.unknown_names)
    used = dict.fromkeys(n for e in equations for n in e.names if n not in unknown_set)
    return CompiledLoop(
        contributors=case.names,
        unknowns=case.unknown_names,
        guesses=np.array([u.guess for u in case.unknowns], dtype=float),
        labels=tuple(labels),
        equations=tuple(equations),
        used=tuple(used),
    )


# --------------------------------------------------------------------------- one point


def _residual(loop: CompiledLoop, point: Mapping[str, float]) -> np.ndarray:
    """``F`` at ``point`` (real arithmetic: nan where an equation is undefined)."""
    out = np.empty(len(loop.equations))
    for i, eq in enumerate(loop.equations):
        out[i] = float(np.real(eq.evaluate(point)))
    return out


def _jacobian(loop: CompiledLoop, point: Mapping[str, float], wrt: tuple[str, ...]) -> np.ndarray:
    """``∂F/∂wrt`` at ``point`` by the complex step, all variables in one evaluation per equation."""
    k = len(wrt)
    env: dict = dict(point)
    for j, name in enumerate(wrt):
        lane = np.full(k, complex(point[name]), dtype=complex)
        lane[j] += 1j * STEP
        env[name] = lane
    out = np.empty((len(loop.equations), k))
    for i, eq in enumerate(loop.equations):
        value = np.asarray(eq.evaluate(env), dtype=complex)
        out[i] = np.broadcast_to(value, (k,)).imag / STEP
    return out


def _term_scale(j_u: np.ndarray, j_x: np.ndarray, u: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Size of each equation's terms, ``Σ_j |∂F_i/∂v_j|·|v_j|``: what a residual is compared with."""
    scale = np.abs(j_u) @ np.abs(u) + np.abs(j_x) @ np.abs(x)
    # an equation whose terms all vanish (a y-equation with every angle 0) is measured
    # against the loop's size: the equations of one loop share their units
    floor = SCALE_FLOOR * float(scale.max()) if scale.size and np.isfinite(scale.max()) else 0.0
    scale = np.maximum(scale, floor)
    fallback = np.abs(j_u).sum(axis=1) + np.abs(j_x).sum(axis=1)
    scale = np.where(scale > 0, scale, fallback)
    return np.where((scale > 0) & np.isfinite(scale), scale, 1.0)


def _singular_parts(loop: CompiledLoop, j_u: np.ndarray, j_x: np.ndarray) -> tuple[float, list[str], list[str]]:
    """Condition number of the scaled ``∂F/∂u`` and, when it is too large, the equations
    and unknowns of its near-null direction.

    Each row is divided by the norm of the equation's whole gradient (``∂F_i/∂u`` and
    ``∂F_i/∂x``; not by ``∂F_i/∂u`` alone: an equation that stops depending on the
    unknowns while the contributors still move it, as at a dead point, must show as a
    small row), each column by its norm (the units of the unknowns do not matter).
    """
    m = j_u.shape[0]
    if not (np.all(np.isfinite(j_u)) and np.all(np.isfinite(j_x))):
        return math.inf, list(loop.labels), list(loop.unknowns)
    dead = [loop.labels[i] for i in range(m) if not np.any(j_u[i])]
    if dead:
        return math.inf, dead, list(loop.unknowns)
    scaled = j_u / (np.abs(j_u).sum(axis=1) + np.abs(j_x).sum(axis=1))[:, None]
    cols = np.linalg.norm(scaled, axis=0)
    if np.any(cols == 0):
        free = [loop.unknowns[k] for k in range(m) if cols[k] == 0]
        return math.inf, list(loop.labels), free
    scaled = scaled / cols[None, :]
    if not np.all(np.isfinite(scaled)):
        return math.inf, list(loop.labels), list(loop.unknowns)
    left, sv, right_t = np.linalg.svd(scaled)
    cond = math.inf if sv[-1] == 0 else float(sv[0] / sv[-1])
    if cond <= CONDITION_LIMIT:
        return cond, [], []
    eq_weight, unk_weight = np.abs(left[:, -1]), np.abs(right_t[-1])
    equations = [loop.labels[i] for i in range(m) if eq_weight[i] >= 0.2 * eq_weight.max()]
    unknowns = [loop.unknowns[k] for k in range(m) if unk_weight[k] >= 0.2 * unk_weight.max()]
    return cond, equations, unknowns


def _fmt(x: float) -> str:
    return f"{x:.6g}"


def _not_closed(detail: str) -> ClosureError:
    return ClosureError(f"the loop does not close at the nominals: {detail}")


def _singular_error(where: str, cond: float, equations: list[str], unknowns: list[str]) -> ClosureError:
    size = "exactly singular" if math.isinf(cond) else f"singular (condition number {cond:.2g})"
    return _not_closed(
        f"{where} the closure equations {', '.join(equations)} are {size} in the unknowns "
        f"{', '.join(unknowns)}: the mechanism is at or near a dead point (toggle), or the "
        "equations do not determine those unknowns; change the nominals, the guesses or "
        "the choice of unknowns"
    )


@dataclass(frozen=True)
class LoopSolution:
    """The closure equations solved at the nominals (result of :func:`solve_loop`).

    Attributes
    ----------
    unknowns : tuple of str
    values : numpy.ndarray
        Each unknown's nominal value [its own unit].
    d_unknowns : numpy.ndarray
        ``du/dx``: shape (unknowns, contributors), contributors in case order, ``x`` the
        value of a contributor (the sum of its instances) [unknown unit / length].
    residual : numpy.ndarray
        ``F`` at the solution, per equation (round-off) [equation unit].
    scale : numpy.ndarray
        Size of each equation's terms at the solution, the residual's yardstick.
    condition : float
        Condition number of the scaled ``∂F/∂u`` at the solution [-].
    jacobian : numpy.ndarray
        ``∂F/∂u`` at the solution, shape (equations, unknowns).
    iterations : int
        Newton iterations taken.
    labels : tuple of str
        Equation names.
    """

    unknowns: tuple[str, ...]
    values: np.ndarray
    d_unknowns: np.ndarray
    residual: np.ndarray
    scale: np.ndarray
    condition: float
    iterations: int
    labels: tuple[str, ...]
    jacobian: np.ndarray

    @property
    def values_by_name(self) -> dict[str, float]:
        """Unknown name -> nominal value."""
        return {n: float(v) for n, v in zip(self.unknowns, self.values)}


def solve_loop(case: CaseLike) -> LoopSolution:
    """Solve the closure equations of ``case`` at the nominals; ``du/dx`` there.

    Parameters
    ----------
    case : allocator.model.Case
        With ``unknowns`` and as many ``closures``.

    Returns
    -------
    LoopSolution

    Raises
    ------
    ClosureError
        "the loop does not close at the nominals: ..." when an equation is undefined at the
        guesses, ``∂F/∂u`` is singular (the equations and unknowns involved are named) or
        Newton does not converge (the last residual per equation is given).

    Notes
    -----
    Damped Newton: ``Δu = −(∂F/∂u)⁻¹ F``, step ``λΔu`` with ``λ`` halved until the scaled
    residual ``‖F/s‖`` decreases (Armijo), ``s_i = Σ_j |∂F_i/∂v_j|·|v_j|`` over contributors
    and unknowns. Once every ``|F_i| ≤ 1e-9·s_i``, full steps continue as long as they
    reduce the residual: at a regular root one or two (quadratic convergence) bring ``F``
    to round-off; at a (near-)double root convergence is linear and the iteration runs on
    until ``∂F/∂u`` shows itself singular. The loop is singular (at or near a dead point)
    when the condition number of ``∂F/∂u`` exceeds 1e4, rows scaled by the norm of each
    equation's whole gradient (unknowns and contributors), columns by their norms.
    Jacobians by the complex step (exact to machine precision). At the solution, by the
    implicit function theorem, ``du/dx = −(∂F/∂u)⁻¹ ∂F/∂x``.
    """
    from .chain import nominal_values

    loop = compile_loop(case)
    x_nominal = nominal_values(case)
    point = dict(x_nominal)
    u = loop.guesses.copy()
    point.update(zip(loop.unknowns, u))
    x_used = np.array([x_nominal[n] for n in loop.used])

    residual = _residual(loop, point)
    if not np.all(np.isfinite(residual)):
        bad = [f"{lab} = {_fmt(r)}" for lab, r in zip(loop.labels, residual) if not math.isfinite(r)]
        raise _not_closed(f"at the guesses an equation is not defined ({', '.join(bad)}); change the guesses")
    j_u = _jacobian(loop, point, loop.unknowns)
    j_x = _jacobian(loop, point, loop.used) if loop.used else np.zeros((len(u), 0))
    scale = _term_scale(j_u, j_x, u, x_used)

    def merit(r: np.ndarray) -> float:
        return float(np.linalg.norm(r / scale))

    iterations = 0
    for iterations in range(1, MAX_ITERATIONS + 1):
        met = bool(np.all(np.abs(residual) <= RESIDUAL_RTOL * scale))
        if met and not np.any(residual):
            break
        # on the way Newton may pass ill-conditioned points; it stops only where it cannot step
        cond, eqs, unks = _singular_parts(loop, j_u, j_x)
        if cond > STEP_CONDITION_LIMIT:
            raise _singular_error(f"at {_values_text(loop, u)} (Newton iteration {iterations})", cond, eqs, unks)
        step = np.linalg.solve(j_u, -residual)
        damping, accepted = 1.0, None
        while damping >= MIN_DAMPING:
            trial = u + damping * step
            point.update(zip(loop.unknowns, trial))
            r_trial = _residual(loop, point)
            if np.all(np.isfinite(r_trial)) and merit(r_trial) <= (1.0 - 1e-4 * damping) * merit(residual):
                accepted = trial, r_trial
                break
            if met:  # polishing: round-off reached, no full step improves it
                break
            damping *= 0.5
        if accepted is None:
            point.update(zip(loop.unknowns, u))
            if met:
                break
            raise _not_closed(
                "Newton stalls (no step reduces the residual) at "
                f"{_values_text(loop, u)}; last residual {_residual_text(loop, residual)}: "
                "the loop may have no solution at the nominals, or the guesses are too far from it"
            )
        u, residual = accepted
        j_u = _jacobian(loop, point, loop.unknowns)
        j_x = _jacobian(loop, point, loop.used) if loop.used else np.zeros((len(u), 0))
    else:
        if not np.all(np.abs(residual) <= RESIDUAL_RTOL * scale):
            raise _not_closed(
                f"Newton did not converge in {MAX_ITERATIONS} iterations; last residual "
                f"{_residual_text(loop, residual)} at {_values_text(loop, u)}"
            )

    point.update(zip(loop.unknowns, u))
    j_u = _jacobian(loop, point, loop.unknowns)
    j_x = _jacobian(loop, point, loop.used) if loop.used else np.zeros((len(u), 0))
    scale = _term_scale(j_u, j_x, u, x_used)
    if not np.all(np.abs(residual) <= RESIDUAL_RTOL * scale):
        raise _not_closed(f"last residual {_residual_text(loop, residual)} at {_values_text(loop, u)}")
    cond, eqs, unks = _singular_parts(loop, j_u, j_x)
    if cond > CONDITION_LIMIT:
        raise _singular_error("at the solution", cond, eqs, unks)
    d_used = -np.linalg.solve(j_u, j_x)
    d_unknowns = np.zeros((len(u), len(loop.contributors)))
    position = {n: i for i, n in enumerate(loop.contributors)}
    for k, name in enumerate(loop.used):
        d_unknowns[:, position[name]] = d_used[:, k]
    return LoopSolution(
        unknowns=loop.unknowns,
        values=u,
        d_unknowns=d_unknowns,
        residual=residual,
        scale=scale,
        condition=cond,
        iterations=iterations,
        labels=loop.labels,
        jacobian=j_u,
    )


def _values_text(loop: CompiledLoop, u: np.ndarray) -> str:
    return ", ".join(f"{n} = {_fmt(v)}" for n, v in zip(loop.unknowns, u))


def _residual_text(loop: CompiledLoop, residual: np.ndarray) -> str:
    return ", ".join(f"{lab} = {r:.3g}" for lab, r in zip(loop.labels, residual))


# --------------------------------------------------------------------------- many points


def _batch_residual(loop: CompiledLoop, env_x: dict, u: np.ndarray) -> np.ndarray:
    """``F`` for every row: ``env_x`` name -> (rows,), ``u`` (rows, unknowns); real arithmetic."""
    env = dict(env_x)
    env.update({name: u[:, k] for k, name in enumerate(loop.unknowns)})
    out = np.empty(u.shape)
    for i, eq in enumerate(loop.equations):
        out[:, i] = np.broadcast_to(np.real(eq.evaluate(env)), (u.shape[0],))
    return out


def _batch_jacobian(loop: CompiledLoop, env_x: dict, u: np.ndarray) -> np.ndarray:
    """``∂F/∂u`` for every row, shape (rows, equations, unknowns), by the complex step."""
    rows, m = u.shape
    env = {name: value[:, None] for name, value in env_x.items()}
    lanes = np.eye(m) * (1j * STEP)
    env.update({name: u[:, k][:, None] + lanes[k] for k, name in enumerate(loop.unknowns)})
    out = np.empty((rows, m, m))
    for i, eq in enumerate(loop.equations):
        value = np.asarray(eq.evaluate(env), dtype=complex)
        out[:, i, :] = np.broadcast_to(value, (rows, m)).imag / STEP
    return out


def _batch_step(j_u: np.ndarray, residual: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Newton steps ``−J⁻¹F`` per row and a mask of the rows where ``J`` is singular."""
    with np.errstate(all="ignore"):
        if j_u.shape[1] == 2:  # the plane loop: Cramer's rule, much cheaper than a LAPACK call per row
            (a, b), (c, d) = j_u[:, 0].T, j_u[:, 1].T
            det = a * d - b * c
            singular = ~np.isfinite(det) | (det == 0)
            det = np.where(singular, 1.0, det)
            step = np.column_stack([(b * residual[:, 1] - d * residual[:, 0]) / det,
                                    (c * residual[:, 0] - a * residual[:, 1]) / det])
            singular |= ~np.all(np.isfinite(step), axis=1)
            step[singular] = 0.0
            return step, singular
        try:
            step = np.linalg.solve(j_u, -residual[..., None])[..., 0]
            singular = ~np.all(np.isfinite(step), axis=1)
        except np.linalg.LinAlgError:  # some row exactly singular: solve the others
            singular = ~np.isfinite(np.linalg.cond(j_u)) | ~np.all(np.isfinite(j_u), axis=(1, 2))
            safe = np.where(singular[:, None, None], np.eye(j_u.shape[1]), j_u)
            step = np.linalg.solve(safe, -residual[..., None])[..., 0]
    step[singular] = 0.0
    return step, singular


def solve_samples(
    loop: CompiledLoop,
    values: np.ndarray,
    start: np.ndarray,
    scale: np.ndarray,
    jacobian: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Solve the closure for every row of ``values`` (vectorised chord and damped Newton).

    Parameters
    ----------
    loop : CompiledLoop
    values : numpy.ndarray
        Shape (rows, contributors): each contributor's value (sum of its instances) per
        sampled assembly, contributors in case order [length].
    start : numpy.ndarray
        Start per unknown, normally the nominal solution (:attr:`LoopSolution.values`).
    scale : numpy.ndarray
        Residual yardstick per equation (:attr:`LoopSolution.scale`).
    jacobian : numpy.ndarray, optional
        ``∂F/∂u`` at ``start`` (:attr:`LoopSolution.jacobian`). Given, the rows first take
        chord steps with it (one real evaluation per step, no per-row Jacobian): sampled
        assemblies lie close to the nominal one, so each step gains several digits. Rows
        where the chord does not contract go on with damped Newton.

    Returns
    -------
    unknowns : numpy.ndarray
        Shape (rows, unknowns); nan where the loop does not close.
    closed : numpy.ndarray of bool
        Shape (rows,): False where the equations have no solution near the nominal one
        (Newton stalls, diverges, meets an undefined value or a singular ``∂F/∂u``).
    """
    values = np.asarray(values, dtype=float)
    rows = values.shape[0]
    position = {n: i for i, n in enumerate(loop.contributors)}
    columns = {name: values[:, position[name]] for name in loop.used}
    u = np.tile(np.asarray(start, dtype=float), (rows, 1))
    closed = np.zeros(rows, dtype=bool)
    polished = np.zeros(rows, dtype=bool)  # took its full step after meeting the tolerance
    active = np.arange(rows)
    with np.errstate(all="ignore"):
        residual = _batch_residual(loop, columns, u)
        finite = np.all(np.isfinite(residual), axis=1)
        active = active[finite]
        if jacobian is not None and active.size:
            active = _chord(loop, columns, u, residual, scale, np.linalg.inv(jacobian), active, closed)
        for _ in range(SAMPLE_ITERATIONS):
            if not active.size:
                break
            env = {name: col[active] for name, col in columns.items()}
            r_act = residual[active]
            met = np.all(np.abs(r_act) <= RESIDUAL_RTOL * scale, axis=1)
            closed[active[met]] = True
            # one full step after the tolerance is met brings a regular root to round-off
            done = met & (polished[active] | ~np.any(r_act, axis=1))
            polished[active[met]] = True
            keep = ~done
            active, env, r_act, met = active[keep], {k: v[keep] for k, v in env.items()}, r_act[keep], met[keep]
            if not active.size:
                break
            step, singular = _batch_step(_batch_jacobian(loop, env, u[active]), r_act)
            base = np.linalg.norm(r_act / scale, axis=1)
            damping = np.ones(active.size)
            accepted = np.zeros(active.size, dtype=bool)
            trying = ~singular
            while np.any(trying):
                idx = np.flatnonzero(trying)
                trial = u[active[idx]] + damping[idx, None] * step[idx]
                sub_env = {k: v[idx] for k, v in env.items()}
                r_trial = _batch_residual(loop, sub_env, trial)
                good = np.all(np.isfinite(r_trial), axis=1) & (
                    np.linalg.norm(r_trial / scale, axis=1) <= (1.0 - 1e-4 * damping[idx]) * base[idx]
                )
                take = idx[good]
                u[active[take]] = trial[good]
                residual[active[take]] = r_trial[good]
                accepted[take] = True
                trying[take] = False
                # rows within tolerance stop at the first full step that does not help:
                # round-off reached
                trying[idx[~good & met[idx]]] = False
                damping[idx[~good]] *= 0.5
                trying &= damping >= MIN_DAMPING
            # a row that could not move is finished: closed if it had met the tolerance
            active = active[accepted]
    u[~closed] = np.nan
    return u, closed


def _chord(
    loop: CompiledLoop,
    columns: dict,
    u: np.ndarray,
    residual: np.ndarray,
    scale: np.ndarray,
    inverse: np.ndarray,
    active: np.ndarray,
    closed: np.ndarray,
) -> np.ndarray:
    """Chord steps ``u ← u − J₀⁻¹ F(u)`` on the rows ``active`` (``u``, ``residual`` and
    ``closed`` updated in place); returns the rows left for Newton.

    A row is closed when its scaled residual is at round-off; it is left for Newton as
    soon as a step fails to halve it (far from the nominal assembly the chord is slow,
    and Newton's own steps take it to round-off).
    """
    merit = np.linalg.norm(residual / scale, axis=1)
    pending = []  # rows where the chord does not contract: Newton's turn
    for _ in range(CHORD_ITERATIONS):
        if not active.size:
            break
        exact = merit[active] <= ROUND_OFF  # nothing left to gain
        closed[active[exact]] = True
        active = active[~exact]
        r_act = residual[active]
        trial = u[active] - r_act @ inverse.T
        r_trial = _batch_residual(loop, {k: v[active] for k, v in columns.items()}, trial)
        m_trial = np.linalg.norm(r_trial / scale, axis=1)
        good = np.all(np.isfinite(r_trial), axis=1) & (m_trial <= CHORD_CONTRACTION * merit[active])
        take = active[good]
        u[take], residual[take], merit[take] = trial[good], r_trial[good], m_trial[good]
        pending.append(active[~good])  # Newton polishes (or finds) these
        active = active[good]
    pending.append(active)  # still contracting after the last chord step
    return np.concatenate(pending)


# --------------------------------------------------------------------------- responses


class ClosedResponse(NamedTuple):
    """Responses of one requirement for sampled assemblies, and where the loop closed."""

    values: np.ndarray  # (rows,) response; nan where the loop does not close [response]
    closed: np.ndarray  # (rows,) bool; all True for a requirement that names no unknown


class ResponseEvaluator:
    """Exact responses of the requirements of ``case`` for arrays of sampled assemblies.

    Chains are summed, expressions evaluated as written (not linearised) and, for an
    expression that names unknowns, the closure equations are solved for every row first
    (:func:`solve_samples`, from the nominal solution).

    Parameters
    ----------
    case : allocator.model.Case

    Examples
    --------
    >>> import numpy as np
    >>> from allocator.case import load_case
    >>> case = load_case("cases/roller_clutch.toml")
    >>> evaluate = ResponseEvaluator(case)
    >>> x = np.array([[c.count * c.nominal for c in case.contributors]] * 2)
    >>> y, closed = evaluate("contact_angle", x)
    >>> bool(closed.all()), bool(np.allclose(y, y[0]))
    (True, True)
    """

    def __init__(self, case: CaseLike):
        self.case = case
        self.names = case.names
        unknown_set = set(case.unknown_names)
        allowed = case.names + case.unknown_names
        self._compiled: list[CompiledExpression | None] = []
        self._through_loop: list[bool] = []
        for r in case.requirements:
            if r.chain is not None:
                self._compiled.append(None)
                self._through_loop.append(False)
            else:
                expr = compile_expression(r.expression, allowed, what="a contributor or unknown")
                self._compiled.append(expr)
                self._through_loop.append(any(n in unknown_set for n in expr.names))
        self._loop = compile_loop(case) if any(self._through_loop) else None
        self._position = {r.name: j for j, r in enumerate(case.requirements)}

    def index(self, requirement: int | str | RequirementLike) -> int:
        """Position of a requirement given by position, name or object."""
        if isinstance(requirement, (int, np.integer)):
            return int(requirement)
        name = requirement if isinstance(requirement, str) else requirement.name
        return self._position[name]

    def through_loop(self, requirement: int | str | RequirementLike) -> bool:
        """True when the requirement's response names an unknown (needs the closure solved)."""
        return self._through_loop[self.index(requirement)]

    def solve(self, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Unknowns (rows, unknowns) and the ``closed`` mask for contributor values (rows, contributors)."""
        values = np.asarray(values, dtype=float)
        if self._loop is None:
            return np.empty((values.shape[0], 0)), np.ones(values.shape[0], dtype=bool)
        solution = self.case.loop
        return solve_samples(self._loop, values, solution.values, solution.scale, solution.jacobian)

    def __call__(
        self,
        requirement: int | str | RequirementLike,
        values: np.ndarray,
        *,
        unknowns: tuple[np.ndarray, np.ndarray] | None = None,
    ) -> ClosedResponse:
        """Response of one requirement for sampled assemblies.

        Parameters
        ----------
        requirement : int, str or Requirement
            Position in ``case.requirements``, name, or the requirement itself.
        values : numpy.ndarray
            Shape (rows, contributors), case order: each contributor's value, the sum of
            its ``count`` instances [length].
        unknowns : (numpy.ndarray, numpy.ndarray), optional
            A result of :meth:`solve` for the same ``values`` (saves solving again when
            several requirements go through the loop).

        Returns
        -------
        ClosedResponse
            ``(values, closed)``: the response per row (nan where the loop does not close,
            or the expression is undefined) and the rows where the loop closed.
        """
        j = self.index(requirement)
        values = np.asarray(values, dtype=float)
        rows = values.shape[0]
        req = self.case.requirements[j]
        if req.chain is not None:
            total = np.zeros(rows)
            for name, coeff in req.chain.items():
                total = total + float(coeff) * values[:, self.case.index(name)]
            return ClosedResponse(total, np.ones(rows, dtype=bool))
        expr = self._compiled[j]
        contributors = set(self.case.names)
        env = {name: values[:, self.case.index(name)] for name in expr.names if name in contributors}
        closed = np.ones(rows, dtype=bool)
        if self._through_loop[j]:
            u, closed = self.solve(values) if unknowns is None else unknowns
            env.update({name: u[:, k] for k, name in enumerate(self.case.unknown_names)})
        y = np.real(np.broadcast_to(expr.evaluate(env), (rows,))).astype(float)
        y = np.where(closed, y, np.nan)
        return ClosedResponse(y, closed)


# --------------------------------------------------------------------------- analysis


class LoopSensitivities(NamedTuple):
    """A requirement's sensitivities split into the direct part and the part through the loop."""

    unknowns: tuple[str, ...]  # unknowns the response names (empty: not through the loop)
    direct: np.ndarray  # ∂f/∂x with the unknowns held, per contributor [response / length]
    through_loop: np.ndarray  # ∂f/∂u · du/dx per contributor [response / length]


def loop_sensitivities(case: CaseLike, requirement: RequirementLike) -> LoopSensitivities:
    """Split ``dy/dx`` of ``requirement`` into ``∂f/∂x`` and ``∂f/∂u · du/dx`` at the nominals.

    Their sum is :attr:`allocator.chain.Linearisation.sensitivity`. A chain, or an
    expression naming no unknown, is all direct.

    Returns
    -------
    LoopSensitivities
    """
    from .chain import complex_step_gradient, linearise, nominal_values

    n = len(case.names)
    unknown_set = set(case.unknown_names)
    if requirement.chain is not None:
        return LoopSensitivities((), linearise(case, requirement).sensitivity, np.zeros(n))
    expr = compile_expression(requirement.expression, case.names + case.unknown_names, what="a contributor or unknown")
    named = tuple(u for u in case.unknown_names if u in expr.names)
    if not named:
        return LoopSensitivities((), linearise(case, requirement).sensitivity, np.zeros(n))
    solution = case.loop
    point = nominal_values(case)
    point.update(solution.values_by_name)
    grad = complex_step_gradient(expr._fn, expr.names, point)
    direct, through = np.zeros(n), np.zeros(n)
    for name, g in zip(expr.names, grad):
        if name in unknown_set:
            through += g * solution.d_unknowns[solution.unknowns.index(name)]
        else:
            direct[case.index(name)] += g
    return LoopSensitivities(named, direct, through)
