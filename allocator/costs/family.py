"""What a cost-curve family is: the one object that knows everything about one curve.

A family (reciprocal, reciprocal-power, exponential, table) holds side by side its
parameters and their checks, its value, slope, curvature, inverse slope and per-part
minimisers, its scaling to other units and its convex-solver form. Everything else in the
package asks the family (through :mod:`allocator.costs.registry`), so adding a curve is
one subclass of :class:`CurveFamily` registered there, plus its documentation and tests.

The arithmetic is vectorised over the parts of one family: :meth:`CurveFamily.params`
packs many curves into parameter arrays once, and every method then works on those arrays
and a tolerance array of the same length (or on the scalars of :meth:`CurveFamily.one`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Callable, Protocol, Sequence

import numpy as np

if TYPE_CHECKING:  # cvxpy is imported lazily
    import cvxpy as cp

# the parameters of many curves of one family, by name, one array element per curve
Params = dict[str, np.ndarray]



class CurveSpec(Protocol):
    """What a family reads from a cost curve: :class:`allocator.costs.curve.CostCurve` is one.

    The families take this interface rather than the class, so that the class (whose
    ``value`` asks the registry) and the families need not import each other.
    """

    curve: str
    a: float
    b: float
    c: float
    k: float
    points_tolerance: tuple[float, ...]
    points_cost: tuple[float, ...]
    between: str

def as_float_or_array(values):
    """Scalar in -> float out; array in -> array out."""
    return float(values) if np.ndim(values) == 0 else values

__all__ = ["Parameter", "CurveFamily", "SmoothFamily", "fmt"]

# Relative slack for round-off: a solver may return a tolerance a hair outside a table's
# range, and measured tables written with few digits should not fail convexity by 1e-15.
RTOL = 1e-9


def fmt(x: float) -> str:
    """Short number for messages (``0.02``, ``1e-05``, ``-1``)."""
    return f"{float(x):g}"


@dataclass(frozen=True)
class Parameter:
    """One number of a formula family, as the case file gives it.

    ``value > lower`` (``strict``) or ``value >= lower``, finite; ``default`` None means the
    case file must give it.
    """

    name: str
    lower: float = 0.0
    strict: bool = True
    default: float | None = None
    meaning: str = ""

    @property
    def bound(self) -> str:
        """``"> 0"`` or ``">= 0"``."""
        return f"{'>' if self.strict else '>='} {fmt(self.lower)}"

    @property
    def bound_keywords(self) -> dict[str, float]:
        """The bound as ``{"gt": lower}`` or ``{"ge": lower}``."""
        return {"gt" if self.strict else "ge": self.lower}

    def problem(self, value: float) -> str | None:
        """``"b must be > 0 (got -1)"`` or None."""
        value = float(value)
        if not math.isfinite(value):
            return f"{self.name} must be finite (got {fmt(value)})"
        if value <= self.lower if self.strict else value < self.lower:
            return f"{self.name} must be {self.bound} (got {fmt(value)})"
        return None


class CurveFamily:
    """One family of cost curves; subclasses fill in the formulas.

    Attributes
    ----------
    name : str
        The ``curve`` value in a case file.
    formula : str
        Plain-text formula for reports, e.g. ``"a + b/t"``.
    parameters : tuple of Parameter
        The numbers a formula family takes (stored on :class:`CostCurve` under these names).
    case_keys : tuple of str
        Keys a case file's cost table may hold besides ``curve``.
    piecewise : bool
        True for families with kinks at listed tolerances (no curvature, no closed-form
        minimisers; the solvers treat these parts one by one).

    Conventions of the vectorised methods: ``p`` is what :meth:`params` (many curves,
    arrays) or :meth:`one` (one curve, scalars) returned, ``t`` a tolerance array matching
    it [length]. Minimisers return the unclipped minimiser (``inf`` where nothing pulls
    the tolerance tighter); the caller clips to the limits, which is exact for a convex
    function of one variable.
    """

    name: str = ""
    formula: str = ""
    parameters: tuple[Parameter, ...] = ()
    case_keys: tuple[str, ...] = ()
    piecewise: bool = False

    # ------------------------------------------------------------------ parameters
    def check(self, curve: CurveSpec, limits: Sequence[float] | None) -> str | None:
        """First problem with the curve's parameters (limits already checked), or None."""
        for parameter in self.parameters:
            problem = parameter.problem(getattr(curve, parameter.name))
            if problem:
                return problem
        return None

    def describe(self, curve: CurveSpec, number: Callable[[float], str]) -> tuple[str, str]:
        """The formula and the parameters as text, numbers formatted by ``number``."""
        return self.formula, ", ".join(
            f"{q.name} = {number(getattr(curve, q.name))}" for q in self.parameters
        )

    def params(self, curves: Sequence[CurveSpec]) -> Params:
        """The parameters of many curves of this family as arrays."""
        return {
            q.name: np.array([getattr(c, q.name) for c in curves], dtype=float)
            for q in self.parameters
        }

    def one(self, curve: CurveSpec) -> dict[str, float]:
        """The parameters of one curve as floats."""
        return {q.name: float(getattr(curve, q.name)) for q in self.parameters}

    def take(self, p: Params, keep: np.ndarray) -> Params:
        """The parameters of the parts where ``keep`` (a boolean mask) is True."""
        return {key: value[keep] for key, value in p.items()}

    def scaled(self, curve: CurveSpec, length: float, cost: float) -> CurveSpec:
        """The curve of ``cost(length·τ) / cost`` in the scaled tolerance ``τ``."""
        raise NotImplementedError

    # ------------------------------------------------------------------ one curve, checked
    def domain(self, curve: CurveSpec, t: np.ndarray) -> np.ndarray:
        """``t`` where the curve is defined (clipped onto it within round-off), else ValueError."""
        if not np.all(t > 0):  # also catches NaN
            bad = t[~(t > 0)] if t.ndim else t
            raise ValueError(f"tolerance must be > 0 (got {fmt(np.ravel(bad)[0])})")
        return t

    def value_at(self, curve: CurveSpec, t: np.ndarray) -> np.ndarray:
        """Checked value of one curve (``t`` any shape)."""
        return self.value(self.one(curve), self.domain(curve, t))

    def derivative_at(self, curve: CurveSpec, t: np.ndarray) -> np.ndarray:
        """Checked slope of one curve (``t`` any shape)."""
        return self.derivative(self.one(curve), self.domain(curve, t))

    def inverse_derivative_at(self, curve: CurveSpec, slope: np.ndarray) -> np.ndarray:
        """Unclipped ``t`` with ``C'(t) = slope`` for one curve (``inf`` if never reached)."""
        return self.linear_minimiser(self.one(curve), -slope)

    # ------------------------------------------------------------------ vectorised
    def value(self, p: Params, t: np.ndarray) -> np.ndarray:
        """Unit cost [currency]; NaN where ``t`` is outside the curve's domain."""
        raise NotImplementedError

    def derivative(self, p: Params, t: np.ndarray) -> np.ndarray:
        """dC/dt [currency/length]."""
        raise NotImplementedError

    def curvature(self, p: Params, t: np.ndarray) -> np.ndarray:
        """d²C/dt² [currency/length²] (0 for piecewise-linear families)."""
        raise NotImplementedError

    def kinks(self, curve: CurveSpec) -> np.ndarray:
        """Tolerances where the curve has a kink [length] (none for smooth families)."""
        return np.empty(0)

    def at_breakpoint(self, p: Params, t: np.ndarray, rtol: float) -> np.ndarray:
        """True where a part sits on a kink of its curve."""
        return np.zeros(np.shape(t), dtype=bool)

    def linear_minimiser(self, p: Params, s: np.ndarray) -> np.ndarray:
        """Minimiser of ``C(t) + s·t``, i.e. the root of ``C'(t) = −s`` (unclipped)."""
        raise NotImplementedError

    def quadratic_minimiser(
        self, p: Params, q: np.ndarray, lo: np.ndarray, hi: np.ndarray, shift: np.ndarray | None = None,
        start: np.ndarray | None = None,
    ) -> np.ndarray:
        """Minimiser of ``C(t) + q t²/2 (+ shift·t)`` (unclipped inside ``[lo, hi]``);
        ``start``: a guess near it (the last minimiser of an iteration), where an
        iterative method starts."""
        raise NotImplementedError

    # ------------------------------------------------------------------ convex-solver form
    def cvx_key(self, curve: CurveSpec) -> tuple:
        """Curves with equal keys share one vectorised cvxpy expression."""
        return (self.name,)

    def cvx(self, curves: Sequence[CurveSpec], t: cp.Expression, weight: np.ndarray) -> tuple[float, cp.Expression]:
        """``(constant, expression)`` with ``constant + expression = Σ w_i C_i(t_i)``.

        ``curves`` share one :meth:`cvx_key`; ``t`` is a cvxpy vector of their tolerances,
        ``weight`` a numpy vector. cvxpy is imported by the caller's first use.
        """
        raise NotImplementedError


class SmoothFamily(CurveFamily):
    """A formula family: convex, decreasing and twice differentiable on ``t > 0``.

    Subclasses give the closed forms :meth:`slope_root` (``C'(t) = −s``) and
    :meth:`quadratic_root` (``C'(t) = −q t``); the mean-shift minimiser with a linear
    term is then found here, bracketed by those closed forms.
    """

    def slope_root(self, p: Params, s: np.ndarray) -> np.ndarray:
        """Root of ``C'(t) = −s`` for ``s > 0`` (any value elsewhere)."""
        raise NotImplementedError

    def quadratic_root(self, p: Params, q: np.ndarray) -> np.ndarray:
        """Root of ``C'(t) + q t = 0`` for ``q > 0`` (any value elsewhere)."""
        raise NotImplementedError

    def linear_minimiser(self, p: Params, s: np.ndarray) -> np.ndarray:
        s = np.asarray(s, dtype=float)
        with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
            t = np.asarray(self.slope_root(p, s), dtype=float)
        return np.where(np.isnan(t) | (s <= 0), np.inf, t)  # nothing pulls it tighter

    def _closed_quadratic(self, p, q) -> np.ndarray:
        with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
            t = np.asarray(self.quadratic_root(p, q), dtype=float)
        return np.where(np.isnan(t) | (q <= 0), np.inf, t)

    def quadratic_minimiser(
        self, p: Params, q: np.ndarray, lo: np.ndarray, hi: np.ndarray, shift: np.ndarray | None = None,
        start: np.ndarray | None = None,
    ) -> np.ndarray:
        """Minimiser of ``C(t) + q t²/2 (+ shift·t)``.

        Without ``shift`` in closed form. With ``shift`` (``C'(t) + q t + shift = 0``, the
        mean-shift stationarity) the root is bracketed by the one-term closed forms and
        found by safeguarded Newton steps in ``log t`` (vectorised), from ``start`` where
        given (inside the bracket), else from the bracket's geometric middle.
        """
        q = np.asarray(q, dtype=float)
        if shift is None:
            return self._closed_quadratic(p, q)
        shift = np.asarray(shift, dtype=float)
        # C' + q t + r = 0 lies between the roots of C' + q t = 0, C' + r = 0 (upper: either
        # term alone stops earlier) and those of C' + 2 q t = 0, C' + 2 r = 0 (lower)
        up = np.minimum(self._closed_quadratic(p, q), self.linear_minimiser(p, shift))
        low = np.minimum(
            self._closed_quadratic(p, 2.0 * q), self.linear_minimiser(p, 2.0 * shift)
        )
        up = np.clip(up, lo, hi)  # a root below lo (or above hi) ends at that limit
        low = np.clip(np.minimum(low, up), lo, up)
        # without the linear term (a part with no mean shift) the upper end is the root
        # itself: the bracket closes on it (Newton steps from inside would creep up to it,
        # each overshooting by round-off and bisecting)
        low = np.where(shift == 0, up, low)
        h_up = self.derivative(p, up) + q * up + shift
        h_low = self.derivative(p, low) + q * low + shift
        # a root beyond a limit (h < 0 at hi, or h > 0 at lo) ends at that limit at once
        first = np.sqrt(low * up) if start is None else np.clip(np.asarray(start, dtype=float), low, up)
        t = np.where(h_up <= 0, up, np.where(h_low >= 0, low, first))
        live = (low < up) & (h_up > 0) & (h_low < 0)
        for _ in range(60):
            if not live.any():
                break
            h = self.derivative(p, t) + q * t + shift
            slope = t * (self.curvature(p, t) + q)  # dh / d ln t
            low = np.where(live & (h < 0), t, low)
            up = np.where(live & (h > 0), t, up)
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                step = np.exp(np.log(t) - h / slope)
            # a converged step lands on the bracket end just set to t: closed bounds
            inside = (step >= low) & (step <= up) & np.isfinite(step)
            new = np.where(inside, step, np.sqrt(low * up))
            # quadratic convergence: after a Newton step this small the new point is exact
            # to round-off (demanding less than ~1e-13 only spins in the last bits)
            done = (np.abs(new / t - 1.0) <= 1e-13) & inside
            done |= up <= low * (1.0 + 1e-15)
            t = np.where(live, new, t)
            live &= ~done & (h != 0)
        return t
