"""Cost-versus-tolerance curves: value, slope, inverse slope and convex-solver form.

One family per published model, each a plain function of a :class:`~allocator.model.CostCurve`
and the ± tolerance ``t`` [length]. Every family is convex and decreasing in ``t`` on
``t > 0`` (tables: when :func:`table_is_convex_decreasing` holds), which is what makes the
least-cost allocation a convex problem.

==================== ================================ ==========================================
curve                cost(t) [currency]               source
==================== ================================ ==========================================
``reciprocal``       ``a + b/t``                      Chase, Greenwood, Loosli & Hauglund (1990)
``reciprocal-power`` ``a + b/t**k``                   Sutherland & Roth (1975); k = 2: Spotts (1973)
``exponential``      ``a + b*exp(-c*t)``              Speckhart (1972)
``table``            piecewise linear through points  measured shop data
==================== ================================ ==========================================

cvxpy is imported lazily, inside the functions that build solver expressions.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from .model import CURVES, CostCurve

__all__ = [
    "cost_value",
    "cost_derivative",
    "inverse_derivative",
    "table_is_convex_decreasing",
    "table_problem",
    "check_curve",
    "cvx_cost",
    "cvx_costs",
]

# Relative slack for round-off: a solver may return a tolerance a hair outside a table's
# range, and measured tables written with few digits should not fail convexity by 1e-15.
_RTOL = 1e-9

_BETWEEN = ("interpolate", "choose")


def _fmt(x: float) -> str:
    """Short number for messages (``0.02``, ``1e-05``, ``-1``)."""
    return f"{float(x):g}"


def _as_float_or_array(values: np.ndarray):
    """Scalar in -> float out; array in -> array out."""
    return float(values) if np.ndim(values) == 0 else values


def _positive_tolerance(t) -> np.ndarray:
    t = np.asarray(t, dtype=float)
    if not np.all(t > 0):  # also catches NaN
        bad = t[~(t > 0)] if t.ndim else t
        raise ValueError(f"tolerance must be > 0 (got {_fmt(np.ravel(bad)[0])})")
    return t


def _table(curve: CostCurve) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Breakpoints, costs and segment slopes of a table curve."""
    x = np.asarray(curve.points_tolerance, dtype=float)
    y = np.asarray(curve.points_cost, dtype=float)
    if x.size < 2 or x.size != y.size:
        raise ValueError(check_curve(curve) or "table needs at least 2 points")
    return x, y, np.diff(y) / np.diff(x)


def _rise_problem(x: np.ndarray, y: np.ndarray) -> str | None:
    """The first segment over which a table's cost rises (beyond round-off), or None.

    The slack is 1e-9 of the largest cost, so a flat segment written with round-off
    (1.0 then 1.0000000000000002) does not count as rising.
    """
    cost_slack = _RTOL * max(float(np.max(np.abs(y))), 1e-300)
    rises = np.flatnonzero(np.diff(y) > cost_slack)
    if not rises.size:
        return None
    j = rises[0]
    return (
        f"cost rises between tolerance {_fmt(x[j])} and {_fmt(x[j + 1])} "
        f"(from {_fmt(y[j])} to {_fmt(y[j + 1])})"
    )


def _table_range_slack(x: np.ndarray) -> float:
    return _RTOL * max(abs(x[-1]), x[-1] - x[0])


def _table_inside(curve: CostCurve, t: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``t`` clipped onto the table range, or ValueError if it is really outside."""
    slack = _table_range_slack(x)
    outside = (t < x[0] - slack) | (t > x[-1] + slack) | np.isnan(t)
    if np.any(outside):
        bad = np.ravel(t[outside] if t.ndim else t)[0]
        raise ValueError(
            f"tolerance {_fmt(bad)} is outside the table's range [{_fmt(x[0])}, {_fmt(x[-1])}]"
        )
    return np.clip(t, x[0], x[-1])


def _unknown_curve(curve: CostCurve) -> ValueError:
    return ValueError(f"unknown cost curve {curve.curve!r} (expected one of {', '.join(CURVES)})")


def cost_value(curve: CostCurve, t):
    """Unit cost of one part made to ± tolerance ``t``.

    Parameters
    ----------
    curve : CostCurve
        The cost model; its ``curve`` names the family.
    t : float or array_like
        ± tolerance (symmetric half-width), > 0 [length].

    Returns
    -------
    float or numpy.ndarray
        Cost of one part [currency]; a float for a scalar ``t``.

    Raises
    ------
    ValueError
        ``t <= 0``; for a table, ``t`` outside the listed tolerances' range, or (``between =
        "choose"``) a ``t`` that is not one of the listed tolerances.

    Notes
    -----
    .. math::

        \\text{reciprocal:}\\quad C(t) = a + b/t \\qquad
        \\text{reciprocal-power:}\\quad C(t) = a + b/t^k \\qquad
        \\text{exponential:}\\quad C(t) = a + b\\,e^{-ct}

    A ``table`` with ``between = "interpolate"`` is the piecewise-linear interpolant through
    ``(points_tolerance, points_cost)``; with ``between = "choose"`` only the listed
    tolerances exist. A round-off slack of 1e-9 (relative to the table's largest tolerance)
    is accepted at the ends of the range and when matching listed tolerances.

    References
    ----------
    .. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
       tolerance allocation for mechanical assemblies with automated process selection",
       Manufacturing Review 3(1):49-59, 1990.
    .. [2] G. H. Sutherland and B. Roth, "Mechanism design: accounting for manufacturing
       tolerances and costs in function generating problems", Journal of Engineering for
       Industry 97(1):283-286, 1975.
    .. [3] M. F. Spotts, "Allocation of tolerances to minimize cost of assembly", Journal of
       Engineering for Industry 95(3):762-764, 1973.
    .. [4] F. H. Speckhart, "Calculation of tolerance based on a minimum cost approach",
       Journal of Engineering for Industry 94(2):447-453, 1972.

    Examples
    --------
    >>> from allocator.model import CostCurve
    >>> cost_value(CostCurve("reciprocal", a=0.8, b=0.004), 0.05)
    0.88
    >>> cost_value(CostCurve("table", points_tolerance=(0.01, 0.05), points_cost=(3.0, 1.0)), 0.03)
    2.0
    """
    kind = curve.curve
    if kind == "table":
        x, y, _ = _table(curve)
        t = _table_inside(curve, np.asarray(t, dtype=float), x)
        if curve.between == "choose":
            # only the listed tolerances exist: refuse to invent a cost between them
            nearest = np.abs(t[..., None] - x).min(axis=-1)
            if np.any(nearest > _table_range_slack(x)):
                bad = np.ravel(t[nearest > _table_range_slack(x)] if t.ndim else t)[0]
                raise ValueError(
                    f"tolerance {_fmt(bad)} is not one of the listed tolerances "
                    "(between = 'choose')"
                )
        return _as_float_or_array(np.interp(t, x, y))
    t = _positive_tolerance(t)
    if kind == "reciprocal":
        value = curve.a + curve.b / t
    elif kind == "reciprocal-power":
        value = curve.a + curve.b * t ** (-curve.k)
    elif kind == "exponential":
        value = curve.a + curve.b * np.exp(-curve.c * t)
    else:
        raise _unknown_curve(curve)
    return _as_float_or_array(value)


def cost_derivative(curve: CostCurve, t):
    """Slope of the cost curve, d cost / d tolerance, at ``t``.

    Parameters
    ----------
    curve : CostCurve
        The cost model.
    t : float or array_like
        ± tolerance, > 0 (for a table: inside its range) [length].

    Returns
    -------
    float or numpy.ndarray
        dC/dt [currency/length]; negative for a decreasing curve.

    Raises
    ------
    ValueError
        ``t <= 0``, or a table tolerance outside the listed range.

    Notes
    -----
    .. math::

        \\text{reciprocal:}\\ C'(t) = -b/t^2 \\qquad
        \\text{reciprocal-power:}\\ C'(t) = -k\\,b/t^{k+1} \\qquad
        \\text{exponential:}\\ C'(t) = -b\\,c\\,e^{-ct}

    A table's derivative is the slope of the segment holding ``t``. At an interior
    breakpoint, where the curve has a kink, the **left** segment's slope is returned
    (the one-sided derivative from below); at the first breakpoint the first segment's
    slope. The same segment slopes are used for ``between = "choose"`` tables (the slope
    of their piecewise-linear relaxation).

    References
    ----------
    .. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
       tolerance allocation for mechanical assemblies with automated process selection",
       Manufacturing Review 3(1):49-59, 1990.
    .. [2] G. H. Sutherland and B. Roth, "Mechanism design: accounting for manufacturing
       tolerances and costs in function generating problems", Journal of Engineering for
       Industry 97(1):283-286, 1975.
    .. [3] F. H. Speckhart, "Calculation of tolerance based on a minimum cost approach",
       Journal of Engineering for Industry 94(2):447-453, 1972.

    Examples
    --------
    >>> from allocator.model import CostCurve
    >>> round(cost_derivative(CostCurve("reciprocal", a=0.8, b=0.004), 0.05), 6)
    -1.6
    >>> table = CostCurve("table", points_tolerance=(0.01, 0.02, 0.05), points_cost=(5.0, 3.0, 2.4))
    >>> cost_derivative(table, [0.015, 0.02, 0.03]).round(6)
    array([-200., -200.,  -20.])
    """
    kind = curve.curve
    if kind == "table":
        x, _, slopes = _table(curve)
        t = _table_inside(curve, np.asarray(t, dtype=float), x)
        # side="left" puts an interior breakpoint into the segment on its left
        segment = np.clip(np.searchsorted(x, t, side="left") - 1, 0, slopes.size - 1)
        return _as_float_or_array(slopes[segment])
    t = _positive_tolerance(t)
    if kind == "reciprocal":
        slope = -curve.b / t**2
    elif kind == "reciprocal-power":
        slope = -curve.k * curve.b * t ** (-curve.k - 1.0)
    elif kind == "exponential":
        slope = -curve.b * curve.c * np.exp(-curve.c * t)
    else:
        raise _unknown_curve(curve)
    return _as_float_or_array(slope)


def inverse_derivative(curve: CostCurve, slope, lo: float, hi: float):
    """Tolerance at which the cost curve has a given slope, clipped to ``[lo, hi]``.

    This is the inner step of the exact Lagrange-dual allocation: for a multiplier
    ``λ`` and a constraint weight ``w``, the contributor's best tolerance solves
    ``C'(t) = -λ·w``.

    Parameters
    ----------
    curve : CostCurve
        A convex, decreasing cost model (a table must pass
        :func:`table_is_convex_decreasing`).
    slope : float or array_like
        Target slope dC/dt [currency/length], normally < 0. A slope ``>= 0`` is never
        reached by a decreasing curve and gives ``hi``.
    lo, hi : float
        Tightest and loosest allowed ± tolerance, ``0 < lo <= hi`` [length].

    Returns
    -------
    float or numpy.ndarray
        ``t`` in ``[lo, hi]`` [length]; a float for a scalar ``slope``.

    Raises
    ------
    ValueError
        Bad bounds, or a table that is not convex and decreasing.

    Notes
    -----
    ``C'`` is increasing for a convex curve, so the clipped inverse is well defined and
    equals the minimiser of ``C(t) - slope·t`` over ``[lo, hi]``:

    .. math::

        t^* = \\operatorname{clip}\\big(C'^{-1}(s),\\ lo,\\ hi\\big),\\qquad
        C'^{-1}(s) = \\begin{cases}
            \\sqrt{b/(-s)} & \\text{reciprocal} \\\\
            (k\\,b/(-s))^{1/(k+1)} & \\text{reciprocal-power} \\\\
            \\ln(b\\,c/(-s))/c & \\text{exponential}
        \\end{cases}

    For a table the answer is the breakpoint whose subgradient
    ``[slope of left segment, slope of right segment]`` contains ``s`` (the first such
    breakpoint when ``s`` equals a segment slope exactly, i.e. the tightest of the tied
    tolerances). ``lo``/``hi`` inside a segment are honoured by the clipping, which is exact
    for a convex function of one variable.

    References
    ----------
    .. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
       tolerance allocation for mechanical assemblies with automated process selection",
       Manufacturing Review 3(1):49-59, 1990.
    .. [2] G. H. Sutherland and B. Roth, "Mechanism design: accounting for manufacturing
       tolerances and costs in function generating problems", Journal of Engineering for
       Industry 97(1):283-286, 1975.
    .. [3] F. H. Speckhart, "Calculation of tolerance based on a minimum cost approach",
       Journal of Engineering for Industry 94(2):447-453, 1972.

    Examples
    --------
    >>> from allocator.model import CostCurve
    >>> curve = CostCurve("reciprocal", a=0.8, b=0.004)
    >>> round(inverse_derivative(curve, -1.6, 0.005, 0.2), 9)
    0.05
    >>> inverse_derivative(curve, [-1e6, -1.6, -1e-6], 0.005, 0.2).round(9)
    array([0.005, 0.05 , 0.2  ])
    """
    lo, hi = float(lo), float(hi)
    if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo <= hi):
        raise ValueError(f"bounds must satisfy 0 < lo <= hi (got [{_fmt(lo)}, {_fmt(hi)}])")
    s = np.asarray(slope, dtype=float)
    if np.any(np.isnan(s)):
        raise ValueError("slope must not be NaN")
    kind = curve.curve
    if kind == "table":
        problem = table_problem(curve)
        if problem:
            raise ValueError(f"table cost has no inverse slope: {problem}")
        x, _, slopes = _table(curve)
        # first breakpoint whose right-hand slope reaches s (last one if none does)
        t = x[np.searchsorted(slopes, s, side="left")]
    else:
        # -s <= 0 means "never reached": +inf, which the clip turns into hi
        neg = np.where(s < 0, -s, 0.0)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if kind == "reciprocal":
                t = np.sqrt(curve.b / neg)
            elif kind == "reciprocal-power":
                t = (curve.k * curve.b / neg) ** (1.0 / (curve.k + 1.0))
            elif kind == "exponential":
                t = np.log(curve.b * curve.c / neg) / curve.c
            else:
                raise _unknown_curve(curve)
    return _as_float_or_array(np.clip(t, lo, hi))


def table_problem(curve: CostCurve) -> str | None:
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
    if curve.curve != "table":
        return None
    basic = check_curve(curve)
    if basic:
        return basic
    x, y, slopes = _table(curve)
    rise = _rise_problem(x, y)
    if rise:
        return rise
    slope_slack = _RTOL * max(float(np.max(np.abs(slopes))), 1e-300)
    bends = np.flatnonzero(np.diff(slopes) < -slope_slack)
    if bends.size:
        j = bends[0]
        return (
            f"not convex at tolerance {_fmt(x[j + 1])} (slope {_fmt(slopes[j])} then "
            f"{_fmt(slopes[j + 1])}: the cost must flatten as the tolerance grows)"
        )
    return None


def table_is_convex_decreasing(curve: CostCurve) -> bool:
    """True when a table's cost is non-increasing and convex in the tolerance.

    Parameters
    ----------
    curve : CostCurve
        A ``table`` curve.

    Returns
    -------
    bool
        ``table_problem(curve) is None``.

    Notes
    -----
    .. math:: C_{j+1} \\le C_j, \\qquad s_j \\le s_{j+1}

    with the segment slopes :math:`s_j` and the round-off slack of :func:`table_problem`.

    References
    ----------
    .. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
       tolerance allocation for mechanical assemblies with automated process selection",
       Manufacturing Review 3(1):49-59, 1990.

    Examples
    --------
    >>> from allocator.model import CostCurve
    >>> table_is_convex_decreasing(CostCurve("table", points_tolerance=(0.01, 0.02, 0.05),
    ...                                      points_cost=(5.0, 4.5, 2.0)))
    False
    """
    if curve.curve != "table":
        raise ValueError(f"not a table curve: {curve.curve!r}")
    return table_problem(curve) is None


def check_curve(curve: CostCurve, limits: Sequence[float] | None = None) -> str | None:
    """First problem with a cost curve's parameters (and limits), or None.

    Parameters
    ----------
    curve : CostCurve
        The cost model to check.
    limits : (float, float), optional
        Tightest and loosest ± tolerance the curve will be used on [length]. For a table
        they must lie inside the listed tolerances.

    Returns
    -------
    str or None
        A short, single-line message such as ``"b must be > 0 (got -1)"``; the caller adds
        the file and field path.

    Notes
    -----
    The contract is ``a >= 0``, ``b > 0``, ``c > 0`` (exponential), ``k > 0``
    (reciprocal-power), all finite; a table has at least 2 points, strictly increasing
    tolerances > 0, costs >= 0 and ``between`` in {interpolate, choose}; an
    ``interpolate`` table's cost never rises from one point to the next (1e-9 relative
    slack), while a ``choose`` table may list a dominated entry (a looser tolerance that
    costs more, which no least-cost choice takes). Under it

    .. math:: C(t) \\ge 0,\\quad C'(t) < 0,\\quad C''(t) > 0 \\quad (t > 0)

    for the three formula families. Convexity of tables is checked separately by
    :func:`table_problem`, because a ``choose`` table need not be convex.

    References
    ----------
    .. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
       tolerance allocation for mechanical assemblies with automated process selection",
       Manufacturing Review 3(1):49-59, 1990.
    .. [2] G. H. Sutherland and B. Roth, "Mechanism design: accounting for manufacturing
       tolerances and costs in function generating problems", Journal of Engineering for
       Industry 97(1):283-286, 1975.
    .. [3] F. H. Speckhart, "Calculation of tolerance based on a minimum cost approach",
       Journal of Engineering for Industry 94(2):447-453, 1972.

    Examples
    --------
    >>> from allocator.model import CostCurve
    >>> check_curve(CostCurve("reciprocal", a=0.8, b=-1))
    'b must be > 0 (got -1)'
    >>> check_curve(CostCurve("exponential", a=1.0, b=2.0, c=30.0), limits=(0.01, 0.1)) is None
    True
    """
    kind = curve.curve
    if kind not in CURVES:
        return f"unknown cost curve {kind!r} (expected one of {', '.join(CURVES)})"

    if limits is not None:
        if len(limits) != 2:
            return f"limits must be [tightest, loosest] (got {len(limits)} values)"
        lo, hi = (float(v) for v in limits)
        if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo <= hi):
            return f"limits must satisfy 0 < tightest <= loosest (got [{_fmt(lo)}, {_fmt(hi)}])"

    if kind == "table":
        return _check_table(curve, limits)

    needed = {
        "reciprocal": ("a", "b"),
        "reciprocal-power": ("a", "b", "k"),
        "exponential": ("a", "b", "c"),
    }[kind]
    for name in needed:
        value = float(getattr(curve, name))
        if not math.isfinite(value):
            return f"{name} must be finite (got {_fmt(value)})"
        if name == "a" and value < 0:
            return f"a must be >= 0 (got {_fmt(value)})"
        if name != "a" and value <= 0:
            return f"{name} must be > 0 (got {_fmt(value)})"
    return None


def _check_table(curve: CostCurve, limits: Sequence[float] | None) -> str | None:
    if curve.between not in _BETWEEN:
        return f"between must be 'interpolate' or 'choose' (got {curve.between!r})"
    x = np.asarray(curve.points_tolerance, dtype=float)
    y = np.asarray(curve.points_cost, dtype=float)
    if x.size != y.size:
        return f"table has {x.size} tolerances but {y.size} costs"
    if x.size < 2:
        return f"table needs at least 2 points (got {x.size})"
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        return "table values must be finite"
    if np.any(x <= 0):
        return f"table tolerances must be > 0 (got {_fmt(x[x <= 0][0])})"
    steps = np.flatnonzero(np.diff(x) <= 0)
    if steps.size:
        j = steps[0]
        return (
            "table tolerances must be strictly increasing "
            f"(got {_fmt(x[j])} then {_fmt(x[j + 1])})"
        )
    if np.any(y < 0):
        return f"table costs must be >= 0 (got {_fmt(y[y < 0][0])})"
    if curve.between == "interpolate":
        # interpolated costs are used continuously: a looser tolerance that costs more is
        # an error in the data (a 'choose' table may list such a dominated entry)
        rise = _rise_problem(x, y)
        if rise:
            return (
                f"{rise}: an interpolated cost must not rise as the tolerance loosens "
                '(write between = "choose" if only the listed tolerances exist)'
            )
    if limits is not None:
        lo, hi = (float(v) for v in limits)
        slack = _table_range_slack(x)
        if lo < x[0] - slack or hi > x[-1] + slack:
            return (
                f"limits [{_fmt(lo)}, {_fmt(hi)}] reach outside the table's tolerances "
                f"[{_fmt(x[0])}, {_fmt(x[-1])}]"
            )
    return None


# --------------------------------------------------------------------------- convex forms


def _table_lines(curve: CostCurve) -> tuple[np.ndarray, np.ndarray]:
    """Intercepts and slopes of a convex table's segment lines (cost = i + s·t)."""
    problem = table_problem(curve)
    if problem:
        raise ValueError(f"table cost is not convex and decreasing: {problem}")
    x, y, slopes = _table(curve)
    return y[:-1] - slopes * x[:-1], slopes


def _require_continuous(curve: CostCurve) -> None:
    if curve.is_discrete:
        raise ValueError(
            "a 'choose' table has no continuous cost; it needs the discrete (mixed-integer) "
            "allocation"
        )


def cvx_cost(curve: CostCurve, t_var, count: float = 1.0):
    """cvxpy expression of ``count · cost(t)`` for a scalar variable or affine expression.

    Parameters
    ----------
    curve : CostCurve
        A convex, decreasing cost model (not a ``choose`` table).
    t_var : cvxpy.Expression
        Scalar ± tolerance, a Variable or affine expression [length]. The caller bounds it
        (``t >= limits[0] > 0``; for a table, inside the table's range).
    count : float
        Number of identical parts per assembly [-].

    Returns
    -------
    cvxpy.Expression
        Convex, DCP-compliant expression [currency].

    Raises
    ------
    ValueError
        A non-convex table or a ``choose`` table.

    Notes
    -----
    Exact cone forms only, no sampling or rational approximation:

    .. math::

        n\\,(a + b\\,\\mathrm{inv\\_pos}(t)),\\quad
        n\\,(a + b\\,t^{-k})\\ \\text{(power cone)},\\quad
        n\\,(a + b\\,e^{-ct})\\ \\text{(exponential cone)},\\quad
        n\\max_j\\,(C_j + s_j\\,(t - t_j))\\ \\text{(table)}.

    The table form is the pointwise maximum of its segment lines, equal to the
    interpolant on the table's range for a convex table (and larger outside it).

    References
    ----------
    .. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
       tolerance allocation for mechanical assemblies with automated process selection",
       Manufacturing Review 3(1):49-59, 1990.
    .. [2] G. H. Sutherland and B. Roth, "Mechanism design: accounting for manufacturing
       tolerances and costs in function generating problems", Journal of Engineering for
       Industry 97(1):283-286, 1975.
    .. [3] F. H. Speckhart, "Calculation of tolerance based on a minimum cost approach",
       Journal of Engineering for Industry 94(2):447-453, 1972.
    .. [4] S. Boyd and L. Vandenberghe, Convex Optimization, Cambridge University Press,
       2004, section 3.2.3 (pointwise maximum of convex functions).

    Examples
    --------
    >>> import cvxpy as cp
    >>> from allocator.model import CostCurve
    >>> t = cp.Variable()
    >>> expr = cvx_cost(CostCurve("reciprocal", a=0.8, b=0.004), t, count=2)
    >>> t.value = 0.05
    >>> round(float(expr.value), 9)
    1.76
    """
    import cvxpy as cp

    _require_continuous(curve)
    kind = curve.curve
    n = float(count)
    if kind == "reciprocal":
        return n * curve.a + n * curve.b * cp.inv_pos(t_var)
    if kind == "reciprocal-power":
        return n * curve.a + n * curve.b * cp.power(t_var, -float(curve.k), approx=False)
    if kind == "exponential":
        return n * curve.a + n * curve.b * cp.exp(-float(curve.c) * t_var)
    if kind == "table":
        intercepts, slopes = _table_lines(curve)
        lines = [n * i + (n * s) * t_var for i, s in zip(intercepts, slopes)]
        return lines[0] if len(lines) == 1 else cp.maximum(*lines)
    raise _unknown_curve(curve)


def cvx_costs(curves: Sequence[CostCurve | None], t_vector, counts=None):
    """cvxpy expression of the total cost ``Σ count_i · cost_i(t_i)``, built per family.

    Contributors are grouped by curve family (and by exponent ``k`` for
    reciprocal-power, because cvxpy's power atom takes one scalar exponent), and each group
    becomes one vectorised expression, so building the problem stays fast for thousands of
    contributors.

    Parameters
    ----------
    curves : sequence of CostCurve or None
        One cost model per element of ``t_vector``; None adds no cost (e.g. a fixed
        contributor).
    t_vector : cvxpy.Expression
        Vector of ± tolerances, shape ``(len(curves),)`` [length], bounded by the caller.
    counts : array_like, optional
        Parts per assembly for each element (default 1) [-].

    Returns
    -------
    cvxpy.Expression
        Scalar convex expression [currency].

    Raises
    ------
    ValueError
        Length mismatch, a non-convex table or a ``choose`` table.

    Notes
    -----
    .. math::

        \\sum_i n_i C_i(t_i) = \\sum_i n_i a_i
        + \\sum_{i\\in R} n_i b_i\\,\\mathrm{inv\\_pos}(t_i)
        + \\sum_k \\sum_{i\\in P_k} n_i b_i\\,t_i^{-k}
        + \\sum_{i\\in E} n_i b_i\\,e^{-c_i t_i}
        + \\sum_{i\\in T} n_i \\max_j (\\alpha_{ij} + s_{ij} t_i)

    Tables with fewer segments are padded by repeating their last line, so all tables
    share one elementwise maximum.

    References
    ----------
    .. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
       tolerance allocation for mechanical assemblies with automated process selection",
       Manufacturing Review 3(1):49-59, 1990.
    .. [2] G. H. Sutherland and B. Roth, "Mechanism design: accounting for manufacturing
       tolerances and costs in function generating problems", Journal of Engineering for
       Industry 97(1):283-286, 1975.
    .. [3] F. H. Speckhart, "Calculation of tolerance based on a minimum cost approach",
       Journal of Engineering for Industry 94(2):447-453, 1972.

    Examples
    --------
    >>> import cvxpy as cp, numpy as np
    >>> from allocator.model import CostCurve
    >>> curves = [CostCurve("reciprocal", a=1.0, b=0.01), None,
    ...           CostCurve("exponential", a=0.5, b=2.0, c=20.0)]
    >>> t = cp.Variable(3)
    >>> total = cvx_costs(curves, t, counts=[2, 1, 1])
    >>> t.value = np.array([0.05, 0.1, 0.05])
    >>> round(float(total.value), 6)
    3.635759
    """
    import cvxpy as cp

    m = len(curves)
    if t_vector.shape not in ((m,), (m, 1)) and not (m == 1 and t_vector.shape == ()):
        raise ValueError(f"t_vector has shape {t_vector.shape}, expected ({m},)")
    if t_vector.shape == ():
        t_vector = cp.reshape(t_vector, (1,), order="C")
    elif t_vector.ndim == 2:
        t_vector = cp.reshape(t_vector, (m,), order="C")
    n = np.ones(m) if counts is None else np.broadcast_to(np.asarray(counts, dtype=float), (m,))

    groups: dict[tuple, list[int]] = {}
    for i, curve in enumerate(curves):
        if curve is None:
            continue
        _require_continuous(curve)
        if curve.curve == "reciprocal-power":
            key = ("reciprocal-power", float(curve.k))
        elif curve.curve in CURVES:
            key = (curve.curve,)
        else:
            raise _unknown_curve(curve)
        groups.setdefault(key, []).append(i)

    constant = 0.0
    terms = []
    for key, members in groups.items():
        idx = np.asarray(members, dtype=int)
        sub = [curves[i] for i in members]
        w = n[idx]
        t = t_vector[idx]
        family = key[0]
        if family == "table":
            lines = [_table_lines(c) for c in sub]
            width = max(len(s) for _, s in lines)
            # pad by repeating the last line: the maximum is unchanged
            icpt = np.array([np.pad(i, (0, width - len(i)), mode="edge") for i, _ in lines])
            slope = np.array([np.pad(s, (0, width - len(s)), mode="edge") for _, s in lines])
            cols = [
                cp.Constant(w * icpt[:, j]) + cp.multiply(w * slope[:, j], t)
                for j in range(width)
            ]
            terms.append(cp.sum(cols[0] if width == 1 else cp.maximum(*cols)))
            continue
        a = np.array([c.a for c in sub], dtype=float)
        b = np.array([c.b for c in sub], dtype=float)
        constant += float(w @ a)
        if family == "reciprocal":
            terms.append(cp.sum(cp.multiply(w * b, cp.inv_pos(t))))
        elif family == "reciprocal-power":
            terms.append(cp.sum(cp.multiply(w * b, cp.power(t, -key[1], approx=False))))
        else:  # exponential
            c = np.array([cv.c for cv in sub], dtype=float)
            terms.append(cp.sum(cp.multiply(w * b, cp.exp(cp.multiply(-c, t)))))
    total = cp.Constant(constant)
    for term in terms:
        total = total + term
    return total
