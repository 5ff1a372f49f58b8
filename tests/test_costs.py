"""Cost curves checked against independent numerics (finite differences, scipy root
finding, a conic solver) and closed-form Lagrange results.

Parameter values below are invented for the tests; they are not from a publication.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import approx_fprime, brentq, minimize_scalar

from allocator.costs import (
    check_curve,
    cost_derivative,
    cost_value,
    cvx_cost,
    cvx_costs,
    inverse_derivative,
    table_is_convex_decreasing,
    table_problem,
)
from allocator.model import CostCurve

cp = pytest.importorskip("cvxpy")

RECIPROCAL = CostCurve("reciprocal", a=0.8, b=0.004)
POWER = CostCurve("reciprocal-power", a=2.0, b=0.0004, k=1.2)
SPOTTS = CostCurve("reciprocal-power", a=0.0, b=2e-4, k=2.0)
EXPONENTIAL = CostCurve("exponential", a=0.5, b=6.0, c=40.0)
TABLE = CostCurve(
    "table",
    points_tolerance=(0.005, 0.01, 0.02, 0.05, 0.1),
    points_cost=(12.0, 7.0, 4.0, 2.2, 1.5),
)
FORMULAS = [RECIPROCAL, POWER, SPOTTS, EXPONENTIAL]
ALL = FORMULAS + [TABLE]
IDS = ["reciprocal", "power-1.2", "spotts-k2", "exponential"]

# Tighter than Clarabel's defaults: near the optimum the cost is flat (second order), so
# a 1e-8 duality gap only pins t to about 1e-4 relative (1e-10 trips "inaccurate").
SOLVE = dict(solver="CLARABEL", tol_gap_abs=1e-9, tol_gap_rel=1e-9, tol_feas=1e-9)


def central_difference(f, x, h):
    return (f(x + h) - f(x - h)) / (2 * h)


# --------------------------------------------------------------------------- values


def test_value_formulas_by_hand():
    # evaluated by hand from the curve definitions
    assert cost_value(RECIPROCAL, 0.05) == pytest.approx(0.8 + 0.004 / 0.05)
    assert cost_value(POWER, 0.02) == pytest.approx(2.0 + 0.0004 / 0.02**1.2)
    assert cost_value(EXPONENTIAL, 0.03) == pytest.approx(0.5 + 6.0 * math.exp(-1.2))


def test_scalar_in_float_out_and_vectorised():
    assert isinstance(cost_value(RECIPROCAL, 0.05), float)
    assert isinstance(cost_derivative(TABLE, 0.05), float)
    t = np.array([[0.01, 0.02], [0.05, 0.1]])
    for curve in ALL:
        values = cost_value(curve, t)
        assert values.shape == t.shape
        assert values[0, 0] == pytest.approx(cost_value(curve, 0.01))


@pytest.mark.parametrize("curve", FORMULAS, ids=IDS)
def test_formula_rejects_non_positive_tolerance(curve):
    with pytest.raises(ValueError, match="must be > 0"):
        cost_value(curve, [0.01, 0.0])
    with pytest.raises(ValueError, match="must be > 0"):
        cost_derivative(curve, -0.1)


def test_table_interpolates_and_refuses_outside_range():
    # interpolation checked against scipy's independent linear interpolant
    from scipy.interpolate import interp1d

    ref = interp1d(TABLE.points_tolerance, TABLE.points_cost)
    t = np.linspace(0.005, 0.1, 37)
    np.testing.assert_allclose(cost_value(TABLE, t), ref(t), rtol=1e-12)
    with pytest.raises(ValueError, match="outside the table's range"):
        cost_value(TABLE, 0.004)
    with pytest.raises(ValueError, match="outside the table's range"):
        cost_derivative(TABLE, 0.2)
    # round-off at the ends is accepted
    assert cost_value(TABLE, 0.1 * (1 + 1e-13)) == pytest.approx(1.5)


def test_choose_table_only_listed_tolerances_exist():
    choose = CostCurve(
        "table", points_tolerance=(0.01, 0.02, 0.05), points_cost=(5.0, 3.0, 2.0),
        between="choose",
    )
    np.testing.assert_allclose(cost_value(choose, [0.01, 0.02, 0.05]), [5.0, 3.0, 2.0])
    with pytest.raises(ValueError, match="not one of the listed tolerances"):
        cost_value(choose, 0.03)


# --------------------------------------------------------------------------- derivatives


@pytest.mark.parametrize("curve", FORMULAS, ids=IDS)
@pytest.mark.parametrize("t", [0.004, 0.02, 0.07, 0.3])
def test_derivative_matches_finite_differences(curve, t):
    analytic = cost_derivative(curve, t)
    h = 1e-6 * t
    central = central_difference(lambda x: cost_value(curve, x), t, h)
    assert analytic == pytest.approx(central, rel=1e-6)
    # scipy's forward difference as a second, independent estimate
    forward = approx_fprime(np.array([t]), lambda x: cost_value(curve, x[0]), 1e-8 * t)[0]
    assert analytic == pytest.approx(forward, rel=1e-4)


def test_table_derivative_is_segment_slope_and_left_at_kinks():
    x = np.array(TABLE.points_tolerance)
    mids = (x[:-1] + x[1:]) / 2
    h = 1e-9
    for m in mids:
        assert cost_derivative(TABLE, m) == pytest.approx(
            central_difference(lambda s: cost_value(TABLE, s), m, h), rel=1e-5
        )
    # interior breakpoint: one-sided difference from the left
    for knot in x[1:]:
        left = (cost_value(TABLE, knot) - cost_value(TABLE, knot - 1e-7)) / 1e-7
        assert cost_derivative(TABLE, knot) == pytest.approx(left, rel=1e-5)
    # first breakpoint: only the right segment exists
    right = (cost_value(TABLE, x[0] + 1e-7) - cost_value(TABLE, x[0])) / 1e-7
    assert cost_derivative(TABLE, x[0]) == pytest.approx(right, rel=1e-5)


@pytest.mark.parametrize("curve", FORMULAS, ids=IDS)
def test_formula_curves_are_convex_decreasing(curve):
    t = np.geomspace(1e-3, 1.0, 200)
    d = cost_derivative(curve, t)
    assert np.all(d < 0)
    assert np.all(np.diff(d) > 0)


# --------------------------------------------------------------------------- inverse slope


@pytest.mark.parametrize("curve", FORMULAS, ids=IDS)
def test_inverse_derivative_matches_brentq(curve):
    lo, hi = 0.002, 0.5
    targets = np.linspace(cost_derivative(curve, lo), cost_derivative(curve, hi), 9)[1:-1]
    ours = inverse_derivative(curve, targets, lo, hi)
    for s, t in zip(targets, ours):
        ref = brentq(lambda x: cost_derivative(curve, x) - s, lo, hi, xtol=1e-14, rtol=1e-12)
        assert t == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize("curve", FORMULAS, ids=IDS)
def test_inverse_derivative_clips_to_bounds(curve):
    lo, hi = 0.01, 0.1
    steep = cost_derivative(curve, lo) * 10  # steeper than anywhere in [lo, hi]
    flat = cost_derivative(curve, hi) / 10
    np.testing.assert_allclose(inverse_derivative(curve, [steep, flat, 0.0, 1.0], lo, hi),
                               [lo, hi, hi, hi])
    assert isinstance(inverse_derivative(curve, steep, lo, hi), float)


def test_inverse_derivative_table_minimises_linearised_cost():
    # t*(s) minimises C(t) - s*t; check by exact enumeration over a fine grid
    grid = np.linspace(0.005, 0.1, 19001)
    costs = cost_value(TABLE, grid)
    slopes = cost_derivative(TABLE, np.array([0.007, 0.015, 0.03, 0.07]))
    for s in np.concatenate([slopes * 1.1, slopes * 0.9, [-5000.0, -1.0]]):
        t = inverse_derivative(TABLE, s, 0.005, 0.1)
        best = grid[np.argmin(costs - s * grid)]
        assert t == pytest.approx(best, abs=1e-5)
        assert t in TABLE.points_tolerance
    # bounds inside a segment are honoured by clipping
    assert inverse_derivative(TABLE, -1.0, 0.005, 0.06) == 0.06
    assert inverse_derivative(TABLE, -5000.0, 0.008, 0.1) == 0.008


def test_inverse_derivative_rejects_bad_input():
    with pytest.raises(ValueError, match="0 < lo <= hi"):
        inverse_derivative(RECIPROCAL, -1.0, 0.1, 0.01)
    bent = CostCurve("table", points_tolerance=(0.01, 0.02, 0.05), points_cost=(5.0, 4.5, 2.0))
    with pytest.raises(ValueError, match="not convex"):
        inverse_derivative(bent, -10.0, 0.01, 0.05)


# --------------------------------------------------------------------------- cvxpy forms


@pytest.mark.parametrize("curve", ALL, ids=IDS + ["table"])
def test_cvx_cost_value_equals_cost_value(curve):
    t = cp.Variable()
    expr = cvx_cost(curve, t, count=3)
    assert expr.is_dcp() and expr.is_convex()
    for value in [0.005, 0.0123, 0.02, 0.047, 0.1]:
        t.value = value
        assert float(expr.value) == pytest.approx(3 * cost_value(curve, value), rel=1e-12)


@pytest.mark.parametrize("curve", ALL, ids=IDS + ["table"])
@pytest.mark.parametrize("lam", [2.0, 40.0, 600.0])
def test_cvx_cost_stationarity_matches_inverse_derivative(curve, lam):
    # min C(t) + lam*t on [lo, hi]: Lagrange stationarity C'(t*) = -lam (clipped)
    lo, hi = 0.005, 0.1
    t = cp.Variable()
    problem = cp.Problem(cp.Minimize(cvx_cost(curve, t) + lam * t), [t >= lo, t <= hi])
    problem.solve(**SOLVE)
    assert problem.status == "optimal"
    expected = inverse_derivative(curve, -lam, lo, hi)
    assert float(t.value) == pytest.approx(expected, rel=2e-4, abs=1e-6)
    # and an independent bounded 1-D minimiser agrees on the optimal value
    ref = minimize_scalar(lambda x: cost_value(curve, x) + lam * x, bounds=(lo, hi),
                          method="bounded", options={"xatol": 1e-10})
    assert problem.value == pytest.approx(ref.fun, rel=1e-6)


def test_cvx_costs_equals_sum_of_values_with_mixed_families():
    rng = np.random.default_rng(7)
    curves = []
    for i in range(60):
        family = i % 5
        if family == 0:
            curves.append(CostCurve("reciprocal", a=rng.uniform(0, 2), b=rng.uniform(1e-3, 1e-2)))
        elif family == 1:
            # several distinct exponents: each needs its own power atom
            curves.append(CostCurve("reciprocal-power", a=1.0, b=1e-4, k=[0.5, 1.2, 2.0][i % 3]))
        elif family == 2:
            curves.append(CostCurve("exponential", a=0.2, b=rng.uniform(1, 5), c=rng.uniform(10, 50)))
        elif family == 3:
            curves.append(TABLE if i % 2 else CostCurve(
                "table", points_tolerance=(0.005, 0.1), points_cost=(4.0, 1.0)))
        else:
            curves.append(None)
    counts = rng.integers(1, 4, size=len(curves)).astype(float)
    t = cp.Variable(len(curves))
    total = cvx_costs(curves, t, counts)
    assert total.is_dcp()
    values = rng.uniform(0.005, 0.1, size=len(curves))
    t.value = values
    expected = sum(n * cost_value(c, v) for c, v, n in zip(curves, values, counts) if c is not None)
    assert float(total.value) == pytest.approx(expected, rel=1e-12)


def test_cvx_costs_reciprocal_worst_case_closed_form():
    # Chase, Greenwood, Loosli & Hauglund (1990), "Least cost tolerance allocation for
    # mechanical assemblies with automated process selection": with C_i = a_i + b_i/t_i and
    # the worst-case stack sum t_i = T, Lagrange stationarity gives
    # t_i = T * sqrt(b_i) / sum_j sqrt(b_j).
    b = np.array([0.004, 0.001, 0.009, 0.0025, 0.016])
    curves = [CostCurve("reciprocal", a=1.0, b=bi) for bi in b]
    total_tol = 0.12
    t = cp.Variable(b.size)
    problem = cp.Problem(cp.Minimize(cvx_costs(curves, t)), [cp.sum(t) <= total_tol, t >= 1e-4])
    problem.solve(**SOLVE)
    assert problem.status == "optimal"
    expected = total_tol * np.sqrt(b) / np.sqrt(b).sum()
    np.testing.assert_allclose(t.value, expected, rtol=1e-4)


def test_cvx_costs_spotts_closed_form():
    # Spotts (1973), "Allocation of tolerances to minimize cost of assembly": C_i = b_i/t_i^2
    # with sum t_i = T gives t_i proportional to b_i^(1/3) (stationarity 2 b_i / t_i^3 = lam).
    b = np.array([1e-4, 8e-4, 2.7e-3])
    curves = [CostCurve("reciprocal-power", a=0.0, b=bi, k=2.0) for bi in b]
    t = cp.Variable(3)
    problem = cp.Problem(cp.Minimize(cvx_costs(curves, t)), [cp.sum(t) <= 0.06, t >= 1e-4])
    problem.solve(**SOLVE)
    assert problem.status == "optimal"
    np.testing.assert_allclose(t.value, 0.06 * np.cbrt(b) / np.cbrt(b).sum(), rtol=1e-4)


def test_cvx_rejects_choose_and_bent_tables():
    choose = CostCurve("table", points_tolerance=(0.01, 0.05), points_cost=(3.0, 1.0),
                       between="choose")
    bent = CostCurve("table", points_tolerance=(0.01, 0.02, 0.05), points_cost=(5.0, 4.5, 2.0))
    t = cp.Variable()
    with pytest.raises(ValueError, match="discrete"):
        cvx_cost(choose, t)
    with pytest.raises(ValueError, match="not convex"):
        cvx_costs([RECIPROCAL, bent], cp.Variable(2))
    with pytest.raises(ValueError, match="shape"):
        cvx_costs([RECIPROCAL, POWER], cp.Variable(3))


# --------------------------------------------------------------------------- table checks


def test_convexity_detection():
    assert table_is_convex_decreasing(TABLE)
    straight = CostCurve("table", points_tolerance=(0.01, 0.02, 0.03),
                         points_cost=(3.0, 2.0, 1.0 + 1e-15))
    assert table_is_convex_decreasing(straight)  # round-off must not count as a bend
    flat_end = CostCurve("table", points_tolerance=(0.01, 0.02, 0.03), points_cost=(3.0, 1.0, 1.0))
    assert table_is_convex_decreasing(flat_end)

    rising = CostCurve("table", points_tolerance=(0.01, 0.02, 0.05), points_cost=(5.0, 3.0, 3.5))
    assert not table_is_convex_decreasing(rising)
    assert table_problem(rising).startswith("cost rises between tolerance 0.02 and 0.05 (from 3 to 3.5)")

    bent = CostCurve("table", points_tolerance=(0.01, 0.02, 0.05), points_cost=(5.0, 4.5, 2.0))
    assert not table_is_convex_decreasing(bent)
    message = table_problem(bent)
    assert message.startswith("not convex at tolerance 0.02")
    assert "\n" not in message

    assert table_problem(RECIPROCAL) is None


def test_table_checks_and_values_do_not_depend_on_how_the_points_are_held():
    """A table's points and checks are worked out once per distinct table (a sweep asks
    for them thousands of times): a curve built by hand with lists (unhashable) gives the
    same values, slopes and messages as the loaded tuples, and the shared arrays cannot be
    changed by a caller (which would corrupt every later use). Values against
    ``numpy.interp`` of the listed points."""
    from allocator.costs.table import points

    for tol, cost in [((0.01, 0.02, 0.05), (5.0, 3.0, 2.4)), ((0.01, 0.02, 0.05), (5.0, 4.5, 2.0))]:
        as_tuples = CostCurve("table", points_tolerance=tol, points_cost=cost)
        as_lists = CostCurve("table", points_tolerance=list(tol), points_cost=list(cost))
        assert table_problem(as_lists) == table_problem(as_tuples)
        for x, y in zip(points(as_lists), points(as_tuples)):
            np.testing.assert_array_equal(x, y)
        t = np.array([0.01, 0.015, 0.03, 0.05])
        if table_problem(as_tuples) is None:
            np.testing.assert_allclose(as_lists.value(t), np.interp(t, tol, cost), rtol=1e-15)
        x, y, slopes = points(as_tuples)
        with pytest.raises(ValueError):
            x[0] = 1.0  # read-only: the arrays are shared by every later call
        np.testing.assert_allclose(slopes, np.diff(cost) / np.diff(tol), rtol=1e-15)
    bad = CostCurve("table", points_tolerance=(0.01, 0.01, 0.05), points_cost=(5.0, 3.0, 2.4))
    assert "strictly increasing" in table_problem(bad)  # the checks still say what is wrong


# --------------------------------------------------------------------------- check_curve


@pytest.mark.parametrize(
    "curve, limits, message",
    [
        (CostCurve("reciprocal", a=0.8, b=-1), None, "b must be > 0 (got -1)"),
        (CostCurve("reciprocal", a=-0.5, b=1), None, "a must be >= 0 (got -0.5)"),
        (CostCurve("reciprocal-power", a=1, b=1, k=0), None, "k must be > 0 (got 0)"),
        (CostCurve("exponential", a=1, b=1, c=-2), None, "c must be > 0 (got -2)"),
        (CostCurve("exponential", a=1, b=math.inf, c=2), None, "b must be finite (got inf)"),
        (CostCurve("reciprocal", a=math.nan, b=1), None, "a must be finite (got nan)"),
        (CostCurve("quadratic", a=1, b=1), None, "unknown cost curve 'quadratic'"),
        (CostCurve("table", points_tolerance=(0.01,), points_cost=(1.0,)), None,
         "table needs at least 2 points (got 1)"),
        (CostCurve("table", points_tolerance=(0.01, 0.02), points_cost=(1.0,)), None,
         "table has 2 tolerances but 1 costs"),
        (CostCurve("table", points_tolerance=(0.02, 0.02), points_cost=(2.0, 1.0)), None,
         "table tolerances must be strictly increasing (got 0.02 then 0.02)"),
        (CostCurve("table", points_tolerance=(0.0, 0.02), points_cost=(2.0, 1.0)), None,
         "table tolerances must be > 0 (got 0)"),
        (CostCurve("table", points_tolerance=(0.01, 0.02), points_cost=(2.0, -1.0)), None,
         "table costs must be >= 0 (got -1)"),
        (CostCurve("table", points_tolerance=(0.01, 0.02), points_cost=(2.0, 1.0),
                   between="nearest"), None, "between must be 'interpolate' or 'choose'"),
        (TABLE, (0.001, 0.05), "limits [0.001, 0.05] reach outside the table's tolerances"),
        (RECIPROCAL, (0.05, 0.01), "limits must satisfy 0 < tightest <= loosest"),
        (RECIPROCAL, (0.0, 0.01), "limits must satisfy 0 < tightest <= loosest"),
    ],
)
def test_check_curve_messages(curve, limits, message):
    problem = check_curve(curve, limits)
    assert problem is not None and problem.startswith(message)
    assert "\n" not in problem


@pytest.mark.parametrize("curve", ALL, ids=IDS + ["table"])
def test_check_curve_accepts_valid(curve):
    assert check_curve(curve) is None
    assert check_curve(curve, (0.005, 0.1)) is None


def test_model_costcurve_delegates_here():
    assert RECIPROCAL.value(0.05) == cost_value(RECIPROCAL, 0.05)
    assert RECIPROCAL.derivative(0.05) == cost_derivative(RECIPROCAL, 0.05)


# --------------------------------------------------------------------------- the registry
#
# Every registered family is checked here through the registry, so a new family is covered
# as soon as it has an example curve below (test_every_family_has_an_example fails until
# it has). References: central finite differences, scipy.optimize.minimize_scalar, a dense
# grid (exact enumeration) and cvxpy's own evaluation of the solver form.

from allocator.costs import FAMILIES, family  # noqa: E402
from allocator.solve.exact import minimise_linear_price, minimise_quadratic_price  # noqa: E402
from allocator.solve.problem import CurveSet, scaled_curve  # noqa: E402

EXAMPLES = {
    "reciprocal": RECIPROCAL,
    "reciprocal-power": POWER,
    "exponential": EXPONENTIAL,
    "table": TABLE,
}
REGISTERED = sorted(FAMILIES)


def test_every_family_has_an_example():
    assert set(EXAMPLES) == set(FAMILIES)


def family_curves(name: str, count: int = 6, seed: int = 3):
    """The example and, for formula families, random variants (each parameter times
    e^u, u uniform on [-1, 1]: the signs and so the checks stay satisfied)."""
    example = EXAMPLES[name]
    fam = family(name)
    if fam.piecewise:
        return [example]
    rng = np.random.default_rng(seed)
    out = [example]
    for _ in range(count - 1):
        scaled = {q.name: getattr(example, q.name) * math.exp(rng.uniform(-1, 1))
                  for q in fam.parameters}
        out.append(CostCurve(name, **scaled))
    return out


def sample_points(curve, count: int = 7, seed: int = 5) -> np.ndarray:
    """Random tolerances inside a table's range (away from its kinks) or on [0.004, 0.2]."""
    rng = np.random.default_rng(seed)
    if family(curve.curve).piecewise:
        x = np.asarray(curve.points_tolerance)
        seg = rng.integers(0, x.size - 1, count)
        return x[seg] + rng.uniform(0.1, 0.9, count) * (x[seg + 1] - x[seg])
    return np.exp(rng.uniform(math.log(0.004), math.log(0.2), count))


@pytest.mark.parametrize("name", REGISTERED)
def test_family_slope_and_curvature_match_finite_differences(name):
    fam = family(name)
    for curve in family_curves(name):
        p = fam.params([curve])
        for t in sample_points(curve):
            h = 1e-6 * t
            slope = cost_derivative(curve, t)
            assert slope == pytest.approx(
                central_difference(lambda x: cost_value(curve, x), t, h), rel=1e-6, abs=1e-9)
            assert slope < 0  # decreasing
            bend = fam.curvature(p, np.array([t]))[0]
            assert bend == pytest.approx(
                central_difference(lambda x: cost_derivative(curve, x), t, h), rel=1e-5, abs=1e-6)
            assert bend >= 0  # convex


@pytest.mark.parametrize("name", REGISTERED)
def test_family_inverse_slope_minimises_linearised_cost(name):
    """inverse_derivative(C'(t)) gives back t (formulas), and for every family it is the
    minimiser of C(t) − s·t on the limits (checked on a dense grid)."""
    for curve in family_curves(name):
        t = sample_points(curve)
        lo, hi = float(t.min()) * 0.5, float(t.max()) * 1.5
        if family(name).piecewise:
            lo = max(lo, curve.points_tolerance[0])
            hi = min(hi, curve.points_tolerance[-1])
        else:
            back = inverse_derivative(curve, cost_derivative(curve, t), lo, hi)
            assert back == pytest.approx(t, rel=1e-10)
        grid = np.geomspace(lo, hi, 20001)
        for s in cost_derivative(curve, t):
            best = inverse_derivative(curve, s, lo, hi)
            reached = cost_value(curve, best) - s * best
            assert reached <= np.min(cost_value(curve, grid) - s * grid) + 1e-12 * abs(reached)


@pytest.mark.parametrize("name", REGISTERED)
def test_family_vectorised_evaluation_and_minimisers(name):
    """CurveSet (what the solvers use) against the one-curve functions, and the per-part
    minimisers of the exact dual against scipy's bounded minimiser, all parts at once."""
    curves = family_curves(name)
    parts = [c for c in curves for _ in range(3)]
    t = np.concatenate([sample_points(c, 3, seed=i) for i, c in enumerate(curves)])
    cs = CurveSet(parts)
    assert cs.value(t) == pytest.approx([cost_value(c, x) for c, x in zip(parts, t)], rel=1e-14)
    assert cs.derivative(t) == pytest.approx(
        [cost_derivative(c, x) for c, x in zip(parts, t)], rel=1e-14)
    assert list(cs.subset(np.arange(1, len(parts), 2)).value(t[1::2])) == list(cs.value(t)[1::2])

    rng = np.random.default_rng(11)
    lo = np.array([c.points_tolerance[0] if c.points_tolerance else 0.003 for c in parts])
    hi = np.array([c.points_tolerance[-1] if c.points_tolerance else 0.3 for c in parts])
    s = -cs.derivative(t) * rng.uniform(0.5, 2.0, t.size)
    q = s / t
    shift = s * rng.uniform(0.0, 1.0, t.size)
    some_zero = np.where(np.arange(t.size) % 3 == 0, 0.0, shift)  # parts without mean shift
    start = np.exp(rng.uniform(np.log(lo), np.log(hi)))  # Newton's start anywhere in range
    answers = {
        "linear": (minimise_linear_price(cs, s, lo, hi), np.zeros_like(q), s),
        "quadratic": (minimise_quadratic_price(cs, q, lo, hi), q, np.zeros_like(s)),
        "shifted": (minimise_quadratic_price(cs, q, lo, hi, shift), q, shift),
        "shifted, some zero": (minimise_quadratic_price(cs, q, lo, hi, some_zero), q, some_zero),
        "shifted, from a start": (minimise_quadratic_price(cs, q, lo, hi, shift, start=start), q, shift),
    }
    # a zero shift is the plain quadratic step: its closed form, not an iteration towards it
    zero = some_zero == 0
    assert np.array_equal(answers["shifted, some zero"][0][zero], answers["quadratic"][0][zero])
    assert answers["shifted, from a start"][0] == pytest.approx(answers["shifted"][0], rel=1e-12)
    for kind, (found, qq, ss) in answers.items():
        for i, curve in enumerate(parts):
            def f(x, i=i, curve=curve):
                return cost_value(curve, x) + 0.5 * qq[i] * x * x + ss[i] * x
            ref = minimize_scalar(f, bounds=(lo[i], hi[i]), method="bounded",
                                  options={"xatol": 1e-12 * hi[i]})
            assert lo[i] <= found[i] <= hi[i]
            assert f(found[i]) <= f(ref.x) + 1e-9 * abs(f(ref.x)), (kind, i)


@pytest.mark.parametrize("name", REGISTERED)
def test_family_cvx_form_equals_value(name):
    curves = family_curves(name)
    t = np.array([sample_points(c, 1, seed=i)[0] for i, c in enumerate(curves)])
    counts = np.arange(1, len(curves) + 1, dtype=float)
    tv = cp.Variable(len(curves))
    total = cvx_costs(curves, tv, counts)
    tv.value = t
    expected = sum(n * cost_value(c, x) for n, c, x in zip(counts, curves, t))
    assert float(total.value) == pytest.approx(expected, rel=1e-12)
    assert total.is_convex()
    for curve, x in zip(curves, t):
        one = cp.Variable()
        expr = cvx_cost(curve, one, count=2.0)
        one.value = x
        assert float(expr.value) == pytest.approx(2.0 * cost_value(curve, x), rel=1e-12)


@pytest.mark.parametrize("name", REGISTERED)
def test_family_scaling_parameter_checks_and_text(name):
    fam = family(name)
    for curve in family_curves(name):
        for t in sample_points(curve, 3):
            scaled = scaled_curve(curve, 0.01, 7.0)
            assert cost_value(scaled, t / 0.01) == pytest.approx(cost_value(curve, t) / 7.0, rel=1e-13)
        formula, params = fam.describe(curve, lambda v: f"{v:g}")
        assert formula and "\n" not in formula + params
        for q in fam.parameters:
            assert f"{q.name} = " in params
            bad = CostCurve(name, **{**fam.one(curve), q.name: q.lower - 1.0})
            assert check_curve(bad) == f"{q.name} must be {q.bound} (got {q.lower - 1.0:g})"
    assert set(fam.case_keys) >= {q.name for q in fam.parameters}


def test_table_value_in_bulk_equals_the_checked_value_or_nan():
    # what the solvers' results cost tables with: each part's value_at, NaN where that
    # refuses (outside the range, between listed tolerances of a 'choose' table, NaN)
    fam = family("table")
    rng = np.random.default_rng(5)
    for k in range(300):
        n = int(rng.integers(2, 7))
        x = np.sort(rng.uniform(0.001, 0.2, n))
        y = np.sort(rng.uniform(1.0, 10.0, n))[::-1]
        curve = CostCurve("table", points_tolerance=tuple(x), points_cost=tuple(y),
                          between=("interpolate", "choose")[k % 2])
        probes = [rng.uniform(0.0, 0.25), x[int(rng.integers(n))], x[0] * (1 - 1e-12),
                  x[-1] * (1 + 1e-12), x[0] - 1e-3, np.nan]
        bulk = fam.value([curve] * len(probes), np.array(probes))
        for t, got in zip(probes, bulk):
            try:
                want = float(fam.value_at(curve, np.asarray(float(t))))
            except ValueError:
                want = np.nan
            assert got == want or (np.isnan(got) and np.isnan(want)), (curve, t, got, want)


def test_lambert_w0_matches_scipy():
    # the exponential family's own W₀ (no scipy import on the allocation path) against scipy
    from scipy import special

    from allocator.costs.exponential import lambert_w0

    x = np.concatenate([np.logspace(-300, 300, 2000), [1.0, math.e, 0.5]])
    np.testing.assert_allclose(lambert_w0(x), special.lambertw(x).real, rtol=1e-13)
    # a few values at a time take the element-by-element path: the same answers
    few = np.array([lambert_w0(x[k:k + 3]) for k in range(0, x.size - 2, 3)]).ravel()
    np.testing.assert_allclose(few, special.lambertw(x[: few.size]).real, rtol=1e-13)
    assert lambert_w0(np.array([0.0, np.inf, -1.0])).tolist() == [0.0, np.inf, 0.0]
    assert lambert_w0(0.0) == 0.0 and lambert_w0(np.inf) == np.inf
    assert lambert_w0(1.0) == pytest.approx(0.5671432904097838, rel=1e-15)  # the omega constant (from memory)
