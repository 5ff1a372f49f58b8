"""Value, slope, inverse slope, checks and convex-solver form of any cost curve.

Each function looks the curve's family up in :mod:`allocator.costs.registry` and lets the
family do the arithmetic; the functions here add the argument checks and messages that
every family shares.

cvxpy is imported lazily, inside the functions that build solver expressions.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike

from .family import as_float_or_array as _as_float_or_array
from .family import fmt as _fmt
from .registry import CURVES, family, family_of
from .table import table_problem

if TYPE_CHECKING:
    import cvxpy as cp

    from .curve import CostCurve

__all__ = [
    "cost_value",
    "cost_derivative",
    "inverse_derivative",
    "table_is_convex_decreasing",
    "check_curve",
    "cvx_cost",
    "cvx_costs",
]


def cost_value(curve: CostCurve, t: ArrayLike) -> float | np.ndarray:
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
    return curve.value(t)


def cost_derivative(curve: CostCurve, t: ArrayLike) -> float | np.ndarray:
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
    return curve.derivative(t)


def inverse_derivative(curve: CostCurve, slope: ArrayLike, lo: float, hi: float) -> float | np.ndarray:
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
    t = family_of(curve).inverse_derivative_at(curve, s)
    return _as_float_or_array(np.clip(t, lo, hi))


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
    if not family_of(curve).piecewise:
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
    if curve.curve not in CURVES:
        return f"unknown cost curve {curve.curve!r} (expected one of {', '.join(CURVES)})"

    if limits is not None:
        if len(limits) != 2:
            return f"limits must be [tightest, loosest] (got {len(limits)} values)"
        lo, hi = (float(v) for v in limits)
        if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo <= hi):
            return f"limits must satisfy 0 < tightest <= loosest (got [{_fmt(lo)}, {_fmt(hi)}])"
    return family_of(curve).check(curve, limits)


# --------------------------------------------------------------------------- convex forms



def _require_continuous(curve: CostCurve) -> None:
    if curve.is_discrete:
        raise ValueError(
            "a 'choose' table has no continuous cost; it needs the discrete (mixed-integer) "
            "allocation"
        )


def cvx_cost(curve: CostCurve, t_var: cp.Expression, count: float = 1.0) -> cp.Expression:
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
    _require_continuous(curve)
    fam = family_of(curve)
    n = float(count)
    constant, term = fam.cvx([curve], t_var, np.array([n]))
    return term if constant == 0.0 else constant + term


def cvx_costs(
    curves: Sequence[CostCurve | None], t_vector: cp.Expression, counts: ArrayLike | None = None
) -> cp.Expression:
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
        groups.setdefault(family_of(curve).cvx_key(curve), []).append(i)

    constant = 0.0
    terms = []
    for key, members in groups.items():
        idx = np.asarray(members, dtype=int)
        part, term = family(key[0]).cvx([curves[i] for i in members], t_vector[idx], n[idx])
        constant += part
        terms.append(term)
    total = cp.Constant(constant)
    for term in terms:
        total = total + term
    return total
