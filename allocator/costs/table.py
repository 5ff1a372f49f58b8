"""Table cost curve: measured (tolerance, cost) points, interpolated or chosen from.

``between = "interpolate"``: the piecewise-linear interpolant through the points;
``between = "choose"``: only the listed tolerances exist (a discrete choice). Used
continuously, a table must be convex and non-increasing (:func:`table_problem`).

References
----------
.. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
   tolerance allocation for mechanical assemblies with automated process selection",
   Manufacturing Review 3(1):49-59, 1990.
"""

from __future__ import annotations

from dataclasses import replace
from functools import lru_cache
from typing import NamedTuple

import numpy as np

from .family import RTOL, CurveFamily, CurveSpec, fmt

__all__ = ["Table", "table_problem", "BETWEEN"]

BETWEEN = ("interpolate", "choose")


class _Derived(NamedTuple):
    """What a table's points imply, worked out once per distinct table (read-only arrays)."""

    x: np.ndarray | None
    y: np.ndarray | None
    slopes: np.ndarray | None
    basic: str | None  # check_table without limits
    convex: str | None  # table_problem


def _derived(curve) -> _Derived:
    """The table's arrays and checks, cached on its points and ``between``.

    A sweep or a branch and bound asks a table for its points thousands of times; the
    points are immutable once loaded, so the arrays and the two checks are computed once.
    """
    try:
        return _derived_cached(
            tuple(curve.points_tolerance), tuple(curve.points_cost), curve.between
        )
    except TypeError:  # unhashable parts (a hand-built curve): work it out uncached
        return _derive(curve.points_tolerance, curve.points_cost, curve.between)


@lru_cache(maxsize=4096)
def _derived_cached(tolerances: tuple, costs: tuple, between: str) -> _Derived:
    return _derive(tolerances, costs, between)


def _derive(tolerances, costs, between) -> _Derived:
    x = np.array(tolerances, dtype=float)
    y = np.array(costs, dtype=float)
    basic = _check_points(x, y, between)
    if x.size < 2 or x.size != y.size:
        return _Derived(None, None, None, basic, basic)
    with np.errstate(divide="ignore", invalid="ignore"):  # a bad table: `basic` says why
        slopes = np.diff(y) / np.diff(x)
    for a in (x, y, slopes):
        a.setflags(write=False)
    convex = basic or _convex_problem(x, y, slopes)
    return _Derived(x, y, slopes, basic, convex)


def points(curve) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Breakpoints, costs and segment slopes of a table curve (read-only arrays)."""
    d = _derived(curve)
    if d.x is None:
        raise ValueError(d.basic or "table needs at least 2 points")
    return d.x, d.y, d.slopes


def range_slack(x: np.ndarray) -> float:
    return RTOL * max(abs(x[-1]), x[-1] - x[0])


def _in_range(x: np.ndarray, t):
    """``t`` (a float or an array) inside the tolerances ``x`` up to round-off (NaN: not)."""
    slack = range_slack(x)
    return (t >= x[0] - slack) & (t <= x[-1] + slack)


def _listed(x: np.ndarray, t):
    """``t`` (a float or an array) one of the listed tolerances ``x`` up to round-off."""
    return np.abs(np.asarray(t)[..., None] - x).min(axis=-1) <= range_slack(x)


def _rise_problem(x: np.ndarray, y: np.ndarray) -> str | None:
    """The first segment over which a table's cost rises (beyond round-off), or None.

    The slack is 1e-9 of the largest cost, so a flat segment written with round-off
    (1.0 then 1.0000000000000002) does not count as rising.
    """
    cost_slack = RTOL * max(float(np.max(np.abs(y))), 1e-300)
    rises = np.flatnonzero(np.diff(y) > cost_slack)
    if not rises.size:
        return None
    j = rises[0]
    return (
        f"cost rises between tolerance {fmt(x[j])} and {fmt(x[j + 1])} "
        f"(from {fmt(y[j])} to {fmt(y[j + 1])})"
    )


def check_table(curve, limits) -> str | None:
    """First problem with a table's points, ``between`` and limits, or None."""
    basic = _derived(curve).basic
    if basic or limits is None:
        return basic
    x = points(curve)[0]
    lo, hi = (float(v) for v in limits)
    slack = range_slack(x)
    if lo < x[0] - slack or hi > x[-1] + slack:
        return (
            f"limits [{fmt(lo)}, {fmt(hi)}] reach outside the table's tolerances "
            f"[{fmt(x[0])}, {fmt(x[-1])}]"
        )
    return None


def _check_points(x: np.ndarray, y: np.ndarray, between: str) -> str | None:
    """First problem with a table's points and ``between`` (limits aside), or None."""
    if between not in BETWEEN:
        return f"between must be 'interpolate' or 'choose' (got {between!r})"
    if x.size != y.size:
        return f"table has {x.size} tolerances but {y.size} costs"
    if x.size < 2:
        return f"table needs at least 2 points (got {x.size})"
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        return "table values must be finite"
    if np.any(x <= 0):
        return f"table tolerances must be > 0 (got {fmt(x[x <= 0][0])})"
    steps = np.flatnonzero(np.diff(x) <= 0)
    if steps.size:
        j = steps[0]
        return (
            "table tolerances must be strictly increasing "
            f"(got {fmt(x[j])} then {fmt(x[j + 1])})"
        )
    if np.any(y < 0):
        return f"table costs must be >= 0 (got {fmt(y[y < 0][0])})"
    if between == "interpolate":
        # interpolated costs are used continuously: a looser tolerance that costs more is
        # an error in the data (a 'choose' table may list such a dominated entry)
        rise = _rise_problem(x, y)
        if rise:
            return (
                f"{rise}: an interpolated cost must not rise as the tolerance loosens "
                '(write between = "choose" if only the listed tolerances exist)'
            )
    return None


def table_problem(curve: CurveSpec) -> str | None:
    """Why a table cannot be used as a continuous convex cost, or None if it can.

    Parameters
    ----------
    curve : CostCurve
        A ``table`` curve (other families are convex and decreasing by construction and
        give None).

    Returns
    -------
    str or None
        One line such as ``"cost rises between tolerance 0.02 and 0.05 (from 3 to 3.5)"`` or
        ``"not convex at tolerance 0.05 (slope -20 then -40 ...)"``.

    Notes
    -----
    A continuous least-cost allocation is a convex problem only if every cost is convex
    and non-increasing in ``t``. For the piecewise-linear table through
    :math:`(t_j, C_j)` this means

    .. math::

        C_{j+1} \\le C_j \\quad\\text{and}\\quad s_j \\le s_{j+1},\\qquad
        s_j = \\frac{C_{j+1}-C_j}{t_{j+1}-t_j},

    checked with a relative slack of 1e-9 (of the largest cost, resp. the largest
    |slope|) so that round-off does not reject a straight line. A ``between = "choose"``
    table needs neither property (it is handled as a discrete choice); call this only when
    the table is to be used continuously.

    References
    ----------
    .. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
       tolerance allocation for mechanical assemblies with automated process selection",
       Manufacturing Review 3(1):49-59, 1990.

    Examples
    --------
    >>> from allocator.model import CostCurve
    >>> table_problem(CostCurve("table", points_tolerance=(0.01, 0.02, 0.05),
    ...                         points_cost=(5.0, 3.0, 3.5), between="choose"))
    'cost rises between tolerance 0.02 and 0.05 (from 3 to 3.5)'
    >>> table_problem(CostCurve("table", points_tolerance=(0.01, 0.02, 0.05),
    ...                         points_cost=(5.0, 3.0, 2.4))) is None
    True
    """
    if curve.curve != Table.name:
        return None
    return _derived(curve).convex


def _convex_problem(x: np.ndarray, y: np.ndarray, slopes: np.ndarray) -> str | None:
    rise = _rise_problem(x, y)
    if rise:
        return rise
    slope_slack = RTOL * max(float(np.max(np.abs(slopes))), 1e-300)
    bends = np.flatnonzero(np.diff(slopes) < -slope_slack)
    if bends.size:
        j = bends[0]
        return (
            f"not convex at tolerance {fmt(x[j + 1])} (slope {fmt(slopes[j])} then "
            f"{fmt(slopes[j + 1])}: the cost must flatten as the tolerance grows)"
        )
    return None


def lines(curve) -> tuple[np.ndarray, np.ndarray]:
    """Intercepts and slopes of a convex table's segment lines (cost = i + s·t)."""
    problem = table_problem(curve)
    if problem:
        raise ValueError(f"table cost is not convex and decreasing: {problem}")
    x, y, slopes = points(curve)
    return y[:-1] - slopes * x[:-1], slopes


class Table(CurveFamily):
    """Piecewise-linear cost through listed points (or a choice among them).

    Parameters per part are the curves themselves (tables differ in length); the
    vectorised methods loop over the parts, which are few in practice.

    .. math::

        C(t) = C_j + s_j (t - t_j)\\ \\text{on}\\ [t_j, t_{j+1}],\\qquad
        s_j = \\frac{C_{j+1}-C_j}{t_{j+1}-t_j}
    """

    name = "table"
    formula = "table"
    case_keys = ("tolerance", "cost", "file", "between")
    piecewise = True

    def check(self, curve, limits):
        return check_table(curve, limits)

    def describe(self, curve, number):
        x = curve.points_tolerance
        if curve.is_discrete:
            return "listed tolerances only", "±" + ", ".join(number(t) for t in x)
        return f"table of {len(x)} points, interpolated", f"±{number(x[0])} to ±{number(x[-1])}"

    def params(self, curves):
        return tuple(curves)

    def one(self, curve):
        return curve

    def take(self, p, keep):
        return tuple(c for c, k in zip(p, keep) if k)

    def scaled(self, curve, length, cost):
        return replace(
            curve,
            points_tolerance=tuple(x / length for x in curve.points_tolerance),
            points_cost=tuple(y / cost for y in curve.points_cost),
        )

    # ------------------------------------------------------------------ one curve, checked
    def domain(self, curve, t):
        """``t`` clipped onto the table range, or ValueError if it is really outside."""
        x = points(curve)[0]
        outside = ~_in_range(x, t)
        if np.any(outside):
            bad = np.ravel(t[outside] if t.ndim else t)[0]
            raise ValueError(
                f"tolerance {fmt(bad)} is outside the table's range [{fmt(x[0])}, {fmt(x[-1])}]"
            )
        return np.clip(t, x[0], x[-1])

    def value_at(self, curve, t):
        x, y, _ = points(curve)
        t = self.domain(curve, t)
        if curve.between == "choose":
            # only the listed tolerances exist: refuse to invent a cost between them
            unlisted = ~_listed(x, t)
            if np.any(unlisted):
                bad = np.ravel(t[unlisted] if t.ndim else t)[0]
                raise ValueError(
                    f"tolerance {fmt(bad)} is not one of the listed tolerances "
                    "(between = 'choose')"
                )
        return np.interp(t, x, y)

    def derivative_at(self, curve, t):
        x, _, slopes = points(curve)
        t = self.domain(curve, t)
        # side="left" puts an interior breakpoint into the segment on its left
        segment = np.clip(np.searchsorted(x, t, side="left") - 1, 0, slopes.size - 1)
        return slopes[segment]

    def inverse_derivative_at(self, curve, slope):
        problem = table_problem(curve)
        if problem:
            raise ValueError(f"table cost has no inverse slope: {problem}")
        x, _, slopes = points(curve)
        # first breakpoint whose right-hand slope reaches s (last one if none does)
        return x[np.searchsorted(slopes, slope, side="left")]

    # ------------------------------------------------------------------ vectorised (a loop)
    def value(self, p, t):
        # value_at per part (the same rules), NaN where it would refuse (e.g. a current
        # tolerance outside the table), in Python floats without raising: the solvers'
        # results cost every table this way
        out = np.full(len(p), np.nan)
        for i, curve in enumerate(p):
            x, y = _derived(curve)[:2]
            ti = float(t[i])
            if x is None or not _in_range(x, ti):
                continue
            ti = min(max(ti, x[0]), x[-1])
            if curve.between == "choose" and not _listed(x, ti):
                continue
            out[i] = np.interp(ti, x, y)
        return out

    def derivative(self, p, t):
        return np.array(
            [self.derivative_at(c, np.asarray(float(t[i]))) for i, c in enumerate(p)], dtype=float
        ).reshape(len(p))

    def curvature(self, p, t):
        return np.zeros(len(p))

    def kinks(self, curve):
        return np.asarray(curve.points_tolerance, dtype=float)

    def at_breakpoint(self, p, t, rtol):
        out = np.zeros(len(p), dtype=bool)
        for i, curve in enumerate(p):
            x = np.asarray(curve.points_tolerance)
            out[i] = bool(np.any(np.abs(x - t[i]) <= rtol * x[-1]))
        return out

    rows_at_once = ("linear_minimiser", "quadratic_minimiser")  # s, q of shape (points, parts)

    def linear_minimiser(self, p, s):
        # as inverse_derivative_at per element; the table is checked once per part, not
        # once per row of a sweep's many right-hand sides
        s = np.asarray(s, dtype=float)
        out = np.empty(s.shape[:-1] + (len(p),))
        for i, curve in enumerate(p):
            problem = table_problem(curve)
            if problem:
                raise ValueError(f"table cost has no inverse slope: {problem}")
            x, _, slopes = points(curve)
            out[..., i] = x[np.searchsorted(slopes, -s[..., i], side="left")]
        return out

    def quadratic_minimiser(self, p, q, lo, hi, shift=None, start=None):
        # C(t) + q t²/2 + shift·t over the table's range: h(t) = C'(t) + q t + shift is
        # increasing, the minimiser is clip(−(s_j + shift)/q, x_j, x_{j+1}) for the last
        # segment j with h(x_j) <= 0 (the first breakpoint when none has); one part at a
        # time, every row of a sweep's many right-hand sides at once
        q = np.asarray(q, dtype=float)
        out = np.empty(q.shape[:-1] + (len(p),))
        for i, curve in enumerate(p):
            x, _, slopes = points(curve)
            qi = q[..., i]
            r = np.zeros(qi.shape) if shift is None else np.broadcast_to(np.asarray(shift, dtype=float)[..., i], qi.shape)
            s = slopes + r[..., None]
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                met = s + qi[..., None] * x[:-1] <= 0  # h(x_j) = C'(x_j+) + q x_j + shift <= 0
                j = met.shape[-1] - 1 - np.argmax(met[..., ::-1], axis=-1)  # the last such j
                s_j = np.take_along_axis(s, j[..., None], axis=-1)[..., 0]
                inside = np.clip(-s_j / qi, x[j], x[j + 1])
            t = np.where(met.any(axis=-1), inside, x[0])
            flat = ~(qi > 0)
            if flat.any():  # no quadratic term: the first breakpoint whose slope reaches −shift
                problem = table_problem(curve)
                if problem:
                    raise ValueError(f"table cost has no inverse slope: {problem}")
                t = np.where(flat, x[np.searchsorted(slopes, -r, side="left")], t)
            out[..., i] = t
        return out

    # ------------------------------------------------------------------ convex-solver form
    def cvx(self, curves, t, weight):
        import cvxpy as cp

        pieces = [lines(c) for c in curves]
        width = max(len(s) for _, s in pieces)
        # pad by repeating the last line: the maximum is unchanged
        icpt = np.array([np.pad(i, (0, width - len(i)), mode="edge") for i, _ in pieces])
        slope = np.array([np.pad(s, (0, width - len(s)), mode="edge") for _, s in pieces])
        cols = [
            cp.Constant(weight * icpt[:, j]) + cp.multiply(weight * slope[:, j], t)
            for j in range(width)
        ]
        return 0.0, cp.sum(cols[0] if width == 1 else cp.maximum(*cols))
