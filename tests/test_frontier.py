"""Trade-off frontier, fallout economics, their plots and the frontier command.

What each check compares against (outside the code under test):

- monotonicity: loosening a limit enlarges the feasible set, so the optimal value cannot
  rise (Boyd & Vandenberghe 2004, Convex Optimization, §5.6.1, the perturbed problem's
  optimal value p*(u) is non-increasing in the relaxation u);
- every point against an independent ``allocate`` of a copy of the case with that limit
  written into the requirement (a fresh solver, no overrides, no batching), to 1e-7;
- the one-call sweep of the exact dual against ``scipy.optimize.minimize`` (SLSQP) on an
  invented case, and on convex cost tables against ``scipy.optimize.linprog`` (worst case:
  a linear program in epigraph form) and SLSQP on the epigraph form (rss); the same for
  warm-started solves one limit at a time (as a discrete sweep's polish runs them);
- model ordering: the mean-shift feasible set lies inside the rss one (the band of means
  contains the nominal; Greenwood & Chase 1987, estimated mean shift), so rss ≤ mean shift
  always; worst case ≥ mean shift where exact enumeration of the tolerance box's vertices
  shows that every worst-case-feasible design also meets the mean-shift target;
- the economic optimum against the closed form of Lagrange multiplier allocation for
  reciprocal costs under rss (Chase, Greenwood, Loosli & Hauglund 1990, Manufacturing
  Review 3(1)) with the normal quantile from ``scipy.stats.norm``, against a brute-force
  scan of independent allocations, and against the stationarity condition
  dM/dp = −scrap_cost·1e-6 by finite differences;
- plot files: PNG signature (PNG specification, ISO/IEC 15948:2004, §5.2) and SVG parsed
  as XML with an ``svg`` root (W3C SVG 1.1).
"""

from __future__ import annotations

import math
import re
from pathlib import Path
import xml.etree.ElementTree as ET
from dataclasses import replace
from itertools import product

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, note, settings
from hypothesis import strategies as st
from scipy import optimize, stats

from allocator.cli.main import cli
from allocator.economics import (
    annual_cost,
    cost_per_assembly,
    fallout_economics,
    minimise_log,
    scrap_cost_per_assembly,
)
from allocator.errors import UsageError
from allocator.sweep import LimitSweep, frontier
from allocator.model import CostCurve, Economics, FrontierSettings
from allocator.plots import render_economics_plot, render_frontier_plot
from allocator.solve import allocate
from helpers import body_hub_plate_case, chain_requirement, contributor, make_case, run_on_a_terminal, unit_cost

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
REL = 1e-7


def _settings(examples: int):
    return settings(
        max_examples=examples,
        deadline=None,
        derandomize=True,
        database=None,
        print_blob=True,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    )


def _with_limit(case, name, vary, value):
    """A copy of ``case`` with the requirement's limit (or target) replaced."""
    reqs = tuple(replace(r, **{vary: float(value)}) if r.name == name else r for r in case.requirements)
    return replace(case, requirements=reqs)


def _close(a, b, rel=REL):
    return abs(a - b) <= rel * max(abs(a), abs(b), 1e-12)


# --------------------------------------------------------------------------- invented cases


@st.composite
def invented_cases(draw, mean_shift=False):
    """2-5 contributors, one linear requirement with both limits around the nominal."""
    n = draw(st.integers(2, 5))
    contributors, chain = [], {}
    for i in range(n):
        lo = draw(st.floats(0.002, 0.02))
        hi = lo * draw(st.floats(3.0, 20.0))
        kind = draw(st.sampled_from(["reciprocal", "reciprocal-power", "exponential"]))
        a = draw(st.floats(0.0, 2.0))
        if kind == "reciprocal":
            cost = CostCurve("reciprocal", a=a, b=draw(st.floats(1e-3, 2e-2)))
        elif kind == "reciprocal-power":
            cost = CostCurve("reciprocal-power", a=a, b=draw(st.floats(1e-5, 1e-3)), k=draw(st.floats(0.6, 2.5)))
        else:
            cost = CostCurve("exponential", a=a, b=draw(st.floats(0.5, 5.0)), c=draw(st.floats(5.0, 80.0)))
        distribution = draw(st.sampled_from(["normal", "normal", "uniform"]))
        extra = {}
        if distribution == "normal":
            extra["cp"] = draw(st.floats(1.0, 1.5))
        if mean_shift:
            extra["mean_shift"] = draw(st.floats(0.0, 0.3))
        contributors.append(contributor(
            f"c{i}", nominal=draw(st.floats(1.0, 50.0)), tolerance=math.sqrt(lo * hi), limits=(lo, hi),
            cost=cost, distribution=distribution, count=draw(st.integers(1, 2)), **extra,
        ))
        chain[f"c{i}"] = draw(st.sampled_from([1.0, -1.0])) * draw(st.floats(0.5, 2.0))
    nominal = sum(chain[c.name] * c.count * c.nominal for c in contributors)
    spread = sum(abs(chain[c.name]) * c.count * c.tolerance for c in contributors)
    lower = nominal - spread * draw(st.floats(0.8, 1.5))
    upper = nominal + spread * draw(st.floats(0.8, 1.5))
    ppm = draw(st.sampled_from([10.0, 100.0, 2700.0]))
    req = chain_requirement("gap", chain, lower=lower, upper=upper, fallout_ppm=ppm)
    return make_case(contributors, [req], models=("worst-case", "rss", "mean-shift"))


def _sweep_values(case, vary):
    """Values from tighter than any model can meet to looser than every tolerance needs."""
    req = case.requirements[0]
    nominal = sum(req.chain[c.name] * c.count * c.nominal for c in case.contributors)
    tight = sum(abs(req.chain[c.name]) * c.count * c.limits[0] for c in case.contributors)
    loose = sum(abs(req.chain[c.name]) * c.count * c.limits[1] for c in case.contributors)
    if vary == "upper":
        return np.linspace(nominal + 0.3 * tight, nominal + 1.5 * loose, 6)
    if vary == "lower":
        return np.linspace(nominal - 1.5 * loose, nominal - 0.3 * tight, 6)
    return np.geomspace(0.01, 50000.0, 6)


def _loosening(values, vary):
    """Indices in the order in which the swept quantity loosens."""
    order = list(range(len(values)))
    return order[::-1] if vary == "lower" else order


@pytest.mark.parametrize("vary", ["upper", "lower", "fallout_ppm"])
@_settings(10)
@given(case=invented_cases())
def test_frontier_monotone_and_equal_to_independent_allocations(case, vary):
    values = _sweep_values(case, vary)
    front = frontier(case, vary=vary, values=values)
    note(repr(front))
    for model in front.models:
        costs = front.costs[model]
        seen_feasible = False
        previous = math.inf
        for i in _loosening(front.values, vary):
            # independent allocation with the limit written into the case
            single = allocate(_with_limit(case, "gap", vary, front.values[i]), model)
            assert front.statuses[model][i] == single.status, (model, front.values[i], single.message)
            if single.total_cost is None:
                assert costs[i] is None
                # feasibility only grows as the limit loosens (monotone constraint)
                assert not seen_feasible, (model, "infeasible after feasible", front.values[i])
                continue
            seen_feasible = True
            assert _close(costs[i], single.total_cost), (model, front.values[i], costs[i], single.total_cost)
            assert costs[i] <= previous * (1 + 1e-9) + 1e-12, (model, front.values[i], costs[i], previous)
            previous = costs[i]


def _mean_shift_inside_worst_case(case) -> bool:
    """Exact enumeration: at every vertex of the tolerance box, the worst-case-feasible
    design also meets the mean-shift target.

    For tolerances t with W(t) = Σ n|a|t ≤ r (r = distance from nominal to the nearer
    limit), the worst mean sits at most δ = Σ n|a|m t from the nominal, so its distance to
    either limit is at least W − δ; the two-sided normal fallout is then at most
    2Φ(−(W − δ)/σ). ``g(t) = Σ n|a|(1 − m)t − z·σ(t)`` (z = Φ⁻¹(1 − p/2)) is concave and
    positively homogeneous, so g ≥ 0 on the box iff g ≥ 0 at its vertices.
    """
    req = case.requirements[0]
    a = np.array([req.chain[c.name] for c in case.contributors])
    n = case.counts
    f = case.sigma_factors
    m = case.mean_shifts
    z = stats.norm.isf(req.fallout_ppm * 1e-6 / 2.0)
    for corner in product(*[c.limits for c in case.contributors]):
        t = np.array(corner)
        sigma = math.sqrt(np.sum(n * (a * f * t) ** 2))
        if np.sum(n * np.abs(a) * (1 - m) * t) < z * sigma:
            return False
    return True


@_settings(6)
@given(case=invented_cases(mean_shift=True))
def test_model_order_rss_below_mean_shift_below_worst_case(case):
    values = _sweep_values(case, "upper")[1::2]  # 3 values: the conic mean-shift path is slower
    front = frontier(case, vary="upper", values=values)
    ordered = _mean_shift_inside_worst_case(case)
    note(f"worst case provably above mean shift: {ordered}")
    for i, value in enumerate(front.values):
        rss, shift, worst = (front.costs[m][i] for m in ("rss", "mean-shift", "worst-case"))
        if shift is not None:
            assert rss is not None and rss <= shift * (1 + 1e-9), (value, rss, shift)
        if ordered and worst is not None:
            assert shift is not None and shift <= worst * (1 + 1e-9), (value, shift, worst)


def test_model_order_on_a_case_where_it_is_provable():
    # 6 alike contributors, cp 1.33, small mean shifts: enumeration proves the order
    cs = [contributor(f"p{i}", nominal=5.0 + i, tolerance=0.02, limits=(0.01, 0.05), cp=1.33,
                      mean_shift=0.1, cost=CostCurve("reciprocal", a=0.2, b=0.004 * (1 + 0.2 * i)))
          for i in range(6)]
    req = chain_requirement("gap", {f"p{i}": (1 if i % 2 else -1) for i in range(6)},
                            lower=2.75, upper=3.25, fallout_ppm=2700)  # nominal response 3
    case = make_case(cs, [req], models=("worst-case", "rss", "mean-shift"))
    assert _mean_shift_inside_worst_case(case)
    front = frontier(case, vary="upper", values=[3.1, 3.15, 3.2, 3.25])
    assert front.status == "optimal", front.message
    for i in range(len(front.values)):
        rss, shift, worst = (front.costs[m][i] for m in ("rss", "mean-shift", "worst-case"))
        assert rss <= shift * (1 + 1e-9) and shift <= worst * (1 + 1e-9), (front.values[i], rss, shift, worst)
        assert front.savings("rss")[i] == pytest.approx(worst - rss)


@pytest.mark.parametrize("table", [False, True])
def test_mean_shift_points_of_several_requirements_equal_independent_allocations(table):
    # free mean shifts and two requirements: Newton on the mean-shift prices re-solved from
    # the last point's prices (formula costs), or the compiled conic problem re-solved with
    # new parameters (a cost table); either way every point costs what a fresh allocation does
    cost_c = (CostCurve("table", points_tolerance=(0.005, 0.02, 0.05, 0.1), points_cost=(2.0, 1.0, 0.6, 0.5))
              if table else CostCurve("exponential", a=0.1, b=1.0, c=40.0))
    cs = [contributor("a", nominal=30.0, tolerance=0.03, limits=(0.005, 0.1), mean_shift=0.2,
                      cost=CostCurve("reciprocal", a=1.0, b=0.02)),
          contributor("b", nominal=10.0, tolerance=0.02, limits=(0.005, 0.1), mean_shift=0.1,
                      cost=CostCurve("reciprocal-power", a=0.3, b=2e-4, k=1.5)),
          contributor("c", nominal=19.8, tolerance=0.02, limits=(0.005, 0.1), distribution="uniform",
                      cost=cost_c)]
    req = chain_requirement("gap", {"a": 1, "b": -1, "c": -1}, lower=0.05, upper=0.35, fallout_ppm=100)
    # a second, slack requirement: one alone is solved by the single-requirement Newton
    slack = chain_requirement("reach", {"a": 1}, upper=40.0)
    case = make_case(cs, [req, slack], models=("mean-shift",))
    front = frontier(case, requirement="gap", vary="upper", values=[0.25, 0.3, 0.4, 0.28])
    for value, cost in zip(front.values, front.costs["mean-shift"]):
        single = allocate(_with_limit(case, "gap", "upper", value), "mean-shift")
        assert single.success and _close(cost, single.total_cost), (value, cost, single.total_cost)


def test_sweeping_one_of_several_requirements_leaves_the_others_alone():
    # two requirements share a contributor: each point costs what a single allocation does
    cs = [contributor("a", nominal=30.0, tolerance=0.03, limits=(0.005, 0.1), cost=CostCurve("reciprocal", a=1.0, b=0.02)),
          contributor("b", nominal=10.0, tolerance=0.02, limits=(0.005, 0.1), cost=CostCurve("reciprocal", a=0.3, b=0.01)),
          contributor("c", nominal=19.8, tolerance=0.02, limits=(0.005, 0.1), cost=CostCurve("reciprocal", a=0.1, b=0.005))]
    first = chain_requirement("gap", {"a": 1, "b": -1, "c": -1}, lower=0.05, upper=0.35, fallout_ppm=100)
    second = chain_requirement("reach", {"b": 1, "c": 1}, upper=29.9, fallout_ppm=100)
    case = make_case(cs, [first, second], models=("rss",))
    front = frontier(case, requirement="reach", vary="upper", values=[29.86, 29.9, 30.0])
    for value, cost in zip(front.values, front.costs["rss"]):
        single = allocate(_with_limit(case, "reach", "upper", value), "rss")
        assert single.success and _close(cost, single.total_cost), (value, cost, single.total_cost)


def test_batched_dual_against_slsqp():
    """The batched closed-form dual against scipy's SLSQP on the same problem."""
    curves = [CostCurve("reciprocal", a=0.5, b=0.006), CostCurve("reciprocal-power", a=0.2, b=2e-4, k=1.7),
              CostCurve("exponential", a=0.1, b=2.0, c=30.0), CostCurve("reciprocal", a=0.0, b=0.01)]
    coeff = np.array([1.0, -2.0, 1.0, -1.0])
    cs = [contributor(f"x{i}", nominal=10.0, tolerance=0.02, limits=(0.002, 0.1), cost=c)
          for i, c in enumerate(curves)]
    req = chain_requirement("gap", dict(zip([c.name for c in cs], coeff)), lower=-10.5, upper=-9.5,
                            fallout_ppm=100)  # nominal response -10
    case = make_case(cs, [req], models=("rss",))
    sweep = LimitSweep(case, "rss", "gap", "upper")
    assert sweep.batch is not None
    values = [-9.95, -9.9, -9.8]
    points = sweep.sweep(values)
    f = 1.0 / 3.0
    for value, point in zip(values, points):
        sigma_max = _two_sided_sigma(-10.0, -10.5, value, 100e-6)

        def cost(t):
            return sum(c.value(x) for c, x in zip(curves, t))

        cons = {"type": "ineq", "fun": lambda t: sigma_max**2 - np.sum((coeff * f * t) ** 2)}
        res = optimize.minimize(cost, np.full(4, 0.01), method="SLSQP", bounds=[(0.002, 0.1)] * 4,
                                constraints=[cons], options={"ftol": 1e-14, "maxiter": 500})
        assert res.success
        assert point.status == "optimal"
        assert point.total_cost == pytest.approx(res.fun, rel=1e-6), (value, point.total_cost, res.fun)


# invented convex cost tables (slopes rise from piece to piece) and one formula
SWEEP_TABLES = (
    CostCurve("table", points_tolerance=(0.004, 0.01, 0.03, 0.08), points_cost=(2.0, 1.1, 0.6, 0.45)),
    CostCurve("table", points_tolerance=(0.005, 0.02, 0.05, 0.1), points_cost=(3.0, 1.5, 0.9, 0.8)),
    CostCurve("table", points_tolerance=(0.004, 0.008, 0.02, 0.06, 0.1),
              points_cost=(4.0, 2.6, 1.5, 0.9, 0.7)),
)


def _table_case(formula: bool):
    curves = SWEEP_TABLES + ((CostCurve("reciprocal", a=0.2, b=0.01),) if formula else ())
    limits = [(0.004, 0.08), (0.005, 0.1), (0.004, 0.1), (0.004, 0.1)]
    cs = [contributor(f"x{i}", nominal=10.0, tolerance=0.02, limits=limits[i], cost=c, count=1 + i % 2)
          for i, c in enumerate(curves)]
    coeff = [1.0, -1.5, 1.0, -0.5][: len(cs)]
    nominal = sum(a * c.count * c.nominal for a, c in zip(coeff, cs))
    req = chain_requirement("gap", dict(zip([c.name for c in cs], coeff)), lower=nominal - 0.5,
                            upper=nominal + 0.5, fallout_ppm=100)
    return make_case(cs, [req], models=("worst-case", "rss")), nominal


def _epigraph(case, t_count):
    """Table pieces as rows of ``s_j t_i − z_i ≤ s_j x_j − y_j`` over variables (t, z)."""
    rows, rhs = [], []
    for i, c in enumerate(case.contributors):
        x = np.array(c.cost.points_tolerance)
        y = np.array(c.cost.points_cost)
        for j, s in enumerate(np.diff(y) / np.diff(x)):
            row = np.zeros(2 * t_count)
            row[i], row[t_count + i] = s, -1.0
            rows.append(row)
            rhs.append(s * x[j] - y[j])
    return np.array(rows), np.array(rhs)


def _epigraph_linprog(case, room):
    """Worst case over the three tables (a = 1, −1.5, 1): the linear program in epigraph
    form, by ``scipy.optimize.linprog`` (HiGHS); scipy's result."""
    n = case.counts
    a = np.array([1.0, -1.5, 1.0])
    m = a.size
    pieces, piece_rhs = _epigraph(case, m)
    return optimize.linprog(
        np.concatenate([np.zeros(m), n]),
        A_ub=np.vstack([pieces, np.concatenate([n * np.abs(a), np.zeros(m)])]),
        b_ub=np.concatenate([piece_rhs, [room]]),
        bounds=[c.limits for c in case.contributors] + [(None, None)] * m,
        method="highs",
    )


def _epigraph_slsqp(case, spread_left):
    """Least cost of the three-table-plus-formula case by SLSQP on the epigraph form.

    ``spread_left(t)`` >= 0 is the requirement (t the four tolerances); the tables' costs
    are epigraph variables z_i over their pieces, the formula is costed directly. Returns
    scipy's result (``fun`` the least cost).
    """
    n = case.counts
    m = len(case.contributors)
    pieces, piece_rhs = _epigraph(case, m - 1)
    formula = case.contributors[-1].cost

    def cost(v):  # v = (100 t_0..100 t_3, z_0..z_2): tables through z, the formula directly
        return float(n[: m - 1] @ v[m:] + n[m - 1] * formula.value(v[m - 1] / 100.0))

    def tz(v):
        return np.concatenate([v[: m - 1] / 100.0, v[m:]])

    cons = [
        {"type": "ineq", "fun": lambda v: piece_rhs - pieces @ tz(v)},
        {"type": "ineq", "fun": lambda v: spread_left(v[:m] / 100.0)},
    ]
    tightest = np.array([c.limits[0] for c in case.contributors])
    start = np.concatenate([100.0 * tightest, [float(np.interp(x, c.cost.points_tolerance, c.cost.points_cost))
                                               for x, c in zip(tightest, case.contributors[: m - 1])]])
    return optimize.minimize(cost, start, method="SLSQP",
                             bounds=[(100.0 * lo, 100.0 * hi) for lo, hi in (c.limits for c in case.contributors)]
                             + [(0.0, 10.0)] * (m - 1),
                             constraints=cons, options={"ftol": 1e-12, "maxiter": 1000})


def test_sweep_over_cost_tables_worst_case_against_linprog():
    """Tables take the one-call sweep too; worst case is then a linear program (HiGHS)."""
    case, nominal = _table_case(formula=False)
    sweep = LimitSweep(case, "worst-case", "gap", "upper")
    assert sweep.batch is not None  # every point in one call of the exact dual
    rooms = [0.015, 0.03, 0.06, 0.1, 0.16, 0.25, 0.4, 0.6]  # the tightest spread is 0.023
    points = sweep.sweep([nominal + r for r in rooms])
    for value, point in zip(rooms, points):
        res = _epigraph_linprog(case, min(value, 0.5))  # the lower limit is 0.5 below the nominal
        if res.status == 2:
            assert point.status == "infeasible", (value, point)
            continue
        assert res.status == 0 and point.status == "optimal", (value, point, res.message)
        assert point.total_cost == pytest.approx(res.fun, rel=1e-9), (value, point.total_cost, res.fun)
    assert [p.status for p in points].count("infeasible") == 1


def test_warm_started_solves_over_cost_tables_worst_case_against_linprog():
    """One solve per limit, each from the last one's λ (as a discrete sweep's polish
    runs): the root often sits on a table's kink (the spread jumps there), which the
    bracket must close onto rather than bisect towards. Each point against the linear
    program in epigraph form (``scipy.optimize.linprog``, HiGHS), and against a cold
    solve of a fresh solver at the same limit."""
    from allocator.solve import prepare
    from allocator.solve.exact import ExactAllocation

    case, nominal = _table_case(formula=False)
    warm = ExactAllocation(prepare(case, "worst-case"))
    warm.start_at()
    assert warm.kinks.size > 0
    rooms = np.linspace(0.024, 0.3, 23)
    for room in rooms:
        overrides = {"gap": {"upper": nominal + float(room)}}
        got = warm.solve(overrides)
        cold = ExactAllocation(prepare(case, "worst-case")).solve(overrides)
        res = _epigraph_linprog(case, float(room))
        assert res.status == 0 and got.status == "optimal", (room, got.message, res.message)
        assert got.total_cost == pytest.approx(res.fun, rel=1e-9), (room, got.total_cost, res.fun)
        assert got.total_cost == pytest.approx(cold.total_cost, rel=1e-12), room
        assert got.requirements[0].shadow_upper == pytest.approx(cold.requirements[0].shadow_upper, rel=1e-9)


@pytest.mark.parametrize("offset", [0.0, 1e-9, -0.3, 2.5])
def test_aimed_solves_over_cost_tables_worst_case_against_linprog(offset):
    """In a sweep the branch and bound hands the polish its multiplier for the choice
    (ExactAllocation.aim): the root's bracket then grows from there in tiny steps. An aim
    on the root, a hair off it, or far on either side must bracket the same root: each
    point against the linear program (``scipy.optimize.linprog``, HiGHS) and a cold solve."""
    from allocator.solve import prepare
    from allocator.solve.exact import ExactAllocation

    case, nominal = _table_case(formula=False)
    warm = ExactAllocation(prepare(case, "worst-case"))
    warm.start_at()
    for room in np.linspace(0.024, 0.3, 9):
        overrides = {"gap": {"upper": nominal + float(room)}}
        cold = ExactAllocation(prepare(case, "worst-case")).solve(overrides)
        lam = -cold.requirements[0].shadow_upper  # worst case: the multiplier, −∂cost/∂U
        warm.aim(math.log(lam) + offset)
        got = warm.solve(overrides)
        res = _epigraph_linprog(case, float(room))
        assert res.status == 0 and got.status == "optimal", (room, got.message, res.message)
        assert got.total_cost == pytest.approx(res.fun, rel=1e-9), (room, got.total_cost, res.fun)
        assert got.total_cost == pytest.approx(cold.total_cost, rel=1e-12), room


def test_warm_started_solves_over_tables_and_a_formula_worst_case_against_slsqp():
    """Tables with a smooth formula under worst case: the spread jumps at the tables'
    kinks and moves continuously between them, so the root is sometimes a jump, sometimes
    strictly between kinks. One warm-started solve per limit against SLSQP on the
    epigraph form (Kraft 1988, through scipy.optimize.minimize) and against a cold solve."""
    from allocator.solve import prepare
    from allocator.solve.exact import ExactAllocation

    case, nominal = _table_case(formula=True)
    warm = ExactAllocation(prepare(case, "worst-case"))
    warm.start_at()
    n = case.counts
    a = np.array([1.0, -1.5, 1.0, -0.5])
    jumps = 0
    for room in np.linspace(0.03, 0.3, 19):
        overrides = {"gap": {"upper": nominal + float(room)}}
        got = warm.solve(overrides)
        cold = ExactAllocation(prepare(case, "worst-case")).solve(overrides)
        res = _epigraph_slsqp(case, lambda t, room=room: room - float(np.sum(n * np.abs(a) * t)))
        assert res.success, res.message
        assert got.status == "optimal", (room, got.message)
        assert got.total_cost == pytest.approx(res.fun, rel=1e-7), (room, got.total_cost, res.fun)
        assert got.total_cost == pytest.approx(cold.total_cost, rel=1e-12), room
        t = got.allocated_array()[:3]
        on_kink = [np.min(np.abs(np.array(c.cost.points_tolerance) - x)) < 1e-12
                   for x, c in zip(t, case.contributors[:3])]
        jumps += not all(on_kink)  # a table part strictly inside a piece: the root was a jump
    assert 0 < jumps < 19  # both kinds of root were met


def test_sweep_over_cost_tables_rss_against_slsqp():
    """Tables and a formula under rss: the one-call sweep against SLSQP on the epigraph form."""
    case, nominal = _table_case(formula=True)
    sweep = LimitSweep(case, "rss", "gap", "upper")
    assert sweep.batch is not None
    rooms = [0.02, 0.04, 0.08, 0.2]
    points = sweep.sweep([nominal + r for r in rooms])
    n, f = case.counts, case.sigma_factors
    a = np.array([1.0, -1.5, 1.0, -0.5])
    for value, point in zip(rooms, points):
        sigma_max = _two_sided_sigma(0.0, -0.5, value, 100e-6)
        res = _epigraph_slsqp(case, lambda t, s=sigma_max: 1.0 - np.sum(n * (a * f * t) ** 2) / s**2)
        assert res.success, res.message
        assert point.status == "optimal", (value, point)
        assert point.total_cost == pytest.approx(res.fun, rel=1e-7), (value, point.total_cost, res.fun)


def _two_sided_sigma(mean, lower, upper, p):
    """σ with normal fallout p outside [lower, upper] (scipy.stats + brentq)."""
    f = lambda s: stats.norm.cdf((lower - mean) / s) + stats.norm.sf((upper - mean) / s) - p  # noqa: E731
    return optimize.brentq(f, 1e-9, 10.0, xtol=1e-15, rtol=1e-15)


# --------------------------------------------------------------------------- results and settings


def _small_case(**kw):
    cs = [contributor("a", nominal=20.0, tolerance=0.05, limits=(0.01, 0.2), cost=CostCurve("reciprocal", a=1.0, b=0.02)),
          contributor("b", nominal=15.0, tolerance=0.05, limits=(0.01, 0.2), cost=CostCurve("reciprocal", a=0.5, b=0.01)),
          contributor("c", nominal=4.8, tolerance=0.02, limits=(0.005, 0.1), cost=CostCurve("reciprocal", a=0.2, b=0.005))]
    req = chain_requirement("gap", {"a": 1, "b": -1, "c": -1}, lower=0.05, upper=0.4, fallout_ppm=100)
    return make_case(cs, [req], models=("worst-case", "rss"), currency="EUR", **kw)


def test_result_frame_points_and_flat_worst_case_under_fallout():
    case = _small_case()
    front = frontier(case, vary="fallout_ppm", span=(1.0, 10000.0), points=5)
    frame = front.to_frame()
    assert list(frame.columns[:4]) == ["value", "model", "total_cost", "status"]
    assert len(frame) == 10 and set(frame["model"]) == {"worst-case", "rss"}
    assert np.allclose(front.values, np.geomspace(1.0, 10000.0, 5))
    assert front.flat_models == ("worst-case",)
    assert any("flat" in n for n in front.notes)
    worst = front.costs["worst-case"]
    assert all(c == worst[0] for c in worst)
    rows = frame[frame.model == "rss"]
    assert np.allclose(rows.saving_vs_worst_case, worst[0] - rows.total_cost)
    assert front.points[0].keys() == {"value", "model", "total_cost", "status"}
    # the current design: cost of the case's own tolerances, at its own target
    current = allocate(case, "rss")
    assert front.current["value"] == 100.0
    assert front.current["total_cost"] == pytest.approx(current.current_cost)
    assert front.current["optimal"]["rss"] == pytest.approx(current.total_cost)


def test_infeasible_values_are_flagged_not_solved():
    case = _small_case()
    front = frontier(case, vary="upper", values=[0.08, 0.3, 0.4])
    assert front.statuses["worst-case"][0] == "infeasible" and front.costs["worst-case"][0] is None
    assert front.messages["worst-case"][0]
    assert front.status == "partial" and front.success
    nothing = frontier(case, vary="upper", values=[0.06, 0.07])
    assert nothing.status == "infeasible" and not nothing.success


def test_a_span_of_one_infeasible_value_is_that_value():
    # the tightest worst case is 0.2 + (0.01 + 0.01 + 0.005) = 0.225 > 0.08: only 0.08 fails
    front = frontier(_small_case(), vary="upper", values=[0.08, 0.3, 0.4])
    assert front.status == "partial"
    assert "worst-case at 1 of 3 values (0.08)" in front.message, front.message
    assert ".." not in front.message


def test_solver_descriptions_are_words_not_class_names():
    # one contributor with a mean shift: the mean-shift model is solved without a conic
    # solver; each model's description must say in words what is done at each value
    cs = [contributor("a", nominal=20.0, tolerance=0.05, limits=(0.01, 0.2), mean_shift=0.2,
                      cost=CostCurve("reciprocal", a=1.0, b=0.02)),
          contributor("b", nominal=15.0, tolerance=0.05, limits=(0.01, 0.2), cost=CostCurve("reciprocal", a=0.5, b=0.01)),
          contributor("c", nominal=4.8, tolerance=0.02, limits=(0.005, 0.1), cost=CostCurve("reciprocal", a=0.2, b=0.005))]
    req = chain_requirement("gap", {"a": 1, "b": -1, "c": -1}, lower=0.05, upper=0.4, fallout_ppm=100)
    case = make_case(cs, [req], models=("worst-case", "rss", "mean-shift"))
    front = frontier(case, vary="upper", values=[0.3, 0.4])
    assert set(front.solvers) == {"worst-case", "rss", "mean-shift"}
    for model, text in front.solvers.items():
        assert text and not re.search(r"[a-z][A-Z]", text), (model, text)  # no CamelCase name
        assert "per point" not in text and "Exact" not in text, (model, text)


def test_defaults_come_from_the_frontier_table():
    case = _small_case(frontier=FrontierSettings(requirement="gap", vary="lower", range=(-0.2, 0.0), points=4))
    front = frontier(case)
    assert front.vary == "lower" and front.range_source == "case"
    assert np.allclose(front.values, np.linspace(-0.2, 0.0, 4))
    # another quantity: the table's range does not apply; an automatic one is chosen
    other = frontier(case, vary="upper", points=4)
    assert other.range_source == "automatic" and any("automatic" in n for n in other.notes)
    first = allocate(_with_limit(case, "gap", "upper", other.values[0]), "rss")
    assert first.success  # the automatic range starts where a model can meet the limit
    # ends at twice the current distance from the nominal (0.2) to the limit (0.4)
    assert other.values[-1] == pytest.approx(0.2 + 2 * 0.2, rel=1e-2)


@pytest.mark.parametrize(
    "kwargs, fragment",
    [
        ({"requirement": "gpa"}, "did you mean 'gap'"),
        ({"vary": "uper"}, "did you mean 'upper'"),
        ({"span": (0.3, 0.2)}, "increasing"),
        ({"points": 1}, "2 to 2000"),
        ({"points": 2001}, "2 to 2000"),
        ({"vary": "fallout_ppm", "span": (0.0, 10.0)}, "> 0"),
        ({"vary": "upper", "span": (0.0, 0.3)}, "above the lower limit"),
        ({"models": ("rs",)}, "unknown model 'rs' \\(did you mean 'rss'\\?\\)"),
    ],
)
def test_bad_arguments(kwargs, fragment):
    with pytest.raises(UsageError, match=fragment):
        frontier(_small_case(), **kwargs)


def test_span_is_keyword_only_and_range_its_deprecated_name():
    case = _small_case()
    front = frontier(case, vary="upper", span=(0.3, 0.4), points=3)
    assert list(front.values) == pytest.approx([0.3, 0.35, 0.4]) and front.range_source == "argument"
    with pytest.warns(DeprecationWarning, match="span"):
        old = frontier(case, vary="upper", range=(0.3, 0.4), points=3)
    assert old.costs == front.costs
    with pytest.warns(DeprecationWarning), pytest.raises(UsageError, match="not both"):
        frontier(case, vary="upper", span=(0.3, 0.4), range=(0.3, 0.4), points=3)
    with pytest.raises(TypeError):
        frontier(case, "gap", "upper")  # options are keyword-only
    with pytest.raises(TypeError, match="spam"):
        frontier(case, spam=1)


def test_frontier_is_frozen_and_shows_as_a_table():
    import dataclasses

    front = frontier(_small_case(), vary="upper", values=[0.3, 0.4])
    with pytest.raises(dataclasses.FrozenInstanceError):
        front.status = "failed"
    with pytest.raises(ValueError):  # read-only values
        front.values[0] = 1.0
    page = front._repr_html_()
    assert "<table" in page and "worst-case" in page and "rss saving" in page
    assert front.status in page and "gap" in page


@pytest.mark.parametrize(
    "kwargs, fragment",
    [
        ({"requirement": "gpa"}, "unknown requirement 'gpa' \\(did you mean 'gap'\\?\\)"),
        ({"models": ("rs",)}, "unknown model 'rs' \\(did you mean 'rss'\\?\\)"),
    ],
)
def test_fallout_economics_names_unknown_names_like_frontier(kwargs, fragment):
    with pytest.raises(ValueError, match=fragment) as err:  # a UsageError is a ValueError
        fallout_economics(_small_case(), scrap_cost=10.0, **kwargs)
    assert isinstance(err.value, UsageError)


def test_missing_limit_cannot_be_varied():
    case = _small_case()
    one_sided = replace(case, requirements=(replace(case.requirements[0], lower=None),))
    with pytest.raises(UsageError, match="no lower limit"):
        frontier(one_sided, vary="lower")


def test_progress_bar_does_not_change_the_answer():
    case = _small_case()
    a = frontier(case, vary="upper", values=[0.3, 0.4], progress=True)
    b = frontier(case, vary="upper", values=[0.3, 0.4])
    assert a.costs == b.costs


# --------------------------------------------------------------------------- economics


def test_economics_pure_functions():
    # hand calculation: 55 per scrapped assembly at 100 ppm is 0.0055 per assembly
    assert scrap_cost_per_assembly(100.0, 55.0) == pytest.approx(0.0055)
    assert cost_per_assembly(7.5, 100.0, 55.0) == pytest.approx(7.5055)
    assert annual_cost(2.0, 1000) == 2000.0 and annual_cost(2.0, None) is None
    # minimise_log on a function with a known minimiser: x + 100/x is least at x = 10
    x, value, scan = minimise_log(lambda x: x + 100.0 / x, np.geomspace(0.01, 1e4, 13))
    assert x == pytest.approx(10.0, rel=1e-6) and value == pytest.approx(20.0)
    # not finite below 3: the minimum sits on that edge
    x, _, _ = minimise_log(lambda x: x if x >= 3.0 else math.inf, np.geomspace(1.0, 100.0, 9))
    assert x == pytest.approx(3.0, rel=1e-9)


def _economics_case(scrap=40.0, volume=10000):
    """Reciprocal costs, normal cp 1, one upper limit, wide tolerance ranges (no clipping)."""
    b = [0.02, 0.05, 0.01]
    coeff = [1.0, -1.0, 2.0]
    cs = [contributor(f"x{i}", nominal=10.0, tolerance=0.01, limits=(1e-5, 10.0), cost=CostCurve("reciprocal", a=0.5, b=bi))
          for i, bi in enumerate(b)]
    req = chain_requirement("gap", {f"x{i}": c for i, c in enumerate(coeff)}, upper=20.1, fallout_ppm=100)
    return make_case(cs, [req], models=("rss",), currency="EUR",
                     economics=Economics(volume=volume, scrap_cost=scrap)), b, coeff


def test_economics_results_are_complete_and_frozen():
    import dataclasses

    econ = fallout_economics(_economics_case()[0])
    r = econ.result("rss")
    # complete when built: the optimum, the current target and the saving between them
    assert r.status == "optimal" and r.success
    assert r.saving_per_assembly == pytest.approx(r.current_total - r.total_cost, rel=1e-12)
    assert r.annual_saving == pytest.approx(r.saving_per_assembly * 10000, rel=1e-12)
    for result, name in ((r, "status"), (r, "total_cost"), (econ, "status"), (econ, "results")):
        with pytest.raises(dataclasses.FrozenInstanceError):
            setattr(result, name, None)
    assert econ.to_frame().index.name == "model" and "<table" in econ._repr_html_()
    d = econ.to_dict(curve=True)["models"][0]
    assert isinstance(d["curve_ppm"], list) and len(d["curve_ppm"]) == len(d["curve_manufacturing"])


def test_economic_optimum_against_closed_form_brute_force_and_stationarity():
    case, b, coeff = _economics_case()
    econ = fallout_economics(case)
    r = econ.result("rss")
    assert r.status == "optimal", r.message

    # closed form (Chase et al. 1990, reciprocal costs under rss): with σ_max = d / z(p),
    # M(p) = Σa + K^{3/2} z(p) / d, K = Σ (b_i |a_i| f)^{2/3}; dM/dp = −s·1e-6 gives
    # φ(z*) = C / s with C = K^{3/2} / d (p in ppm: dz/dp = −1e-6 / φ(z)).
    f = 1.0 / 3.0
    d = 20.1 - sum(coeff) * 10.0
    K = sum((bi * abs(ai) * f) ** (2.0 / 3.0) for bi, ai in zip(b, coeff))
    C = K**1.5 / d
    z_star = math.sqrt(-2.0 * math.log(C * math.sqrt(2 * math.pi) / 40.0))
    p_star = stats.norm.sf(z_star) * 1e6
    assert r.optimal_ppm == pytest.approx(p_star, rel=1e-4)
    manufacturing = 1.5 + C * stats.norm.isf(p_star * 1e-6)
    assert r.manufacturing_cost == pytest.approx(manufacturing, rel=1e-6)
    assert r.total_cost == pytest.approx(manufacturing + 40.0 * p_star * 1e-6, rel=1e-6)
    assert r.annual_total == pytest.approx(r.total_cost * 10000)
    # at the current target (100 ppm) for comparison
    assert r.current_manufacturing == pytest.approx(1.5 + C * stats.norm.isf(100e-6), rel=1e-6)
    assert r.saving_per_assembly > 0

    # brute force: independent allocations on a fine log grid
    grid = np.geomspace(p_star / 3, p_star * 3, 121)
    totals = [allocate(_with_limit(case, "gap", "fallout_ppm", p), "rss").total_cost + 40.0 * p * 1e-6 for p in grid]
    k = int(np.argmin(totals))
    step = math.log(grid[1] / grid[0])
    assert abs(math.log(r.optimal_ppm / grid[k])) <= step
    assert r.total_cost <= min(totals) * (1 + 1e-9)

    # stationarity, by finite differences of independent allocations
    h = 1e-3 * r.optimal_ppm
    up = allocate(_with_limit(case, "gap", "fallout_ppm", r.optimal_ppm + h), "rss").total_cost
    down = allocate(_with_limit(case, "gap", "fallout_ppm", r.optimal_ppm - h), "rss").total_cost
    slope = (up - down) / (2 * h)
    assert slope == pytest.approx(-40.0 * 1e-6, rel=1e-3)
    assert r.slope_numeric == pytest.approx(-40.0 * 1e-6, rel=1e-3)
    assert r.slope_shadow == pytest.approx(-40.0 * 1e-6, rel=1e-3)
    # the message says it in words, per 1000 ppm: the manufacturing saved and the scrap
    # added (40 · 1e-6 · 1000 = 0.04), with no derivative notation
    assert "dM/dp" not in r.message and "relative difference" not in r.message
    assert f"saves {-1000 * r.slope_numeric:.4g} of manufacturing cost" in r.message
    assert "adds 0.04 of scrap cost; the two balance" in r.message


def test_economics_needs_scrap_cost_and_a_statistical_model():
    case, _, _ = _economics_case()
    with pytest.raises(UsageError, match="scrap"):
        fallout_economics(replace(case, economics=Economics()))
    with pytest.raises(UsageError, match="statistical"):
        fallout_economics(case, models=("worst-case",))


def test_economics_optimum_on_the_tightest_edge_is_reported_as_boundary():
    # scrap so dear that the tightest achievable target is best
    case, _, _ = _economics_case(scrap=1e9)
    tight = [replace(c, limits=(0.03, 10.0)) for c in case.contributors]
    econ = fallout_economics(replace(case, contributors=tuple(tight)))
    r = econ.result("rss")
    assert r.status == "boundary" and "tightest" in r.message
    # the tightest target that those tolerances can meet: normal tail at d / σ(tightest)
    sigma = math.sqrt(sum((0.03 * a / 3.0) ** 2 for a in (1.0, -1.0, 2.0)))
    assert r.optimal_ppm == pytest.approx(stats.norm.sf(0.1 / sigma) * 1e6, rel=1e-4)


# --------------------------------------------------------------------------- plots


def test_plots_are_valid_png_and_svg_with_axis_labels():
    case, _, _ = _economics_case()
    front = frontier(case, vary="upper", values=[20.02, 20.05, 20.1])
    png = render_frontier_plot(front, "png")
    assert png.startswith(PNG_SIGNATURE)
    svg = render_frontier_plot(front, "svg").decode("utf-8")
    root = ET.fromstring(svg)
    assert root.tag.endswith("svg")
    assert "upper limit of gap [mm]" in svg and "least cost per assembly [EUR]" in svg
    econ_svg = render_economics_plot(fallout_economics(case), "svg").decode("utf-8")
    assert ET.fromstring(econ_svg).tag.endswith("svg")
    assert "fallout target of gap [ppm]" in econ_svg and "cost per assembly [EUR]" in econ_svg


# --------------------------------------------------------------------------- command line

CASE_TEXT = """# Invented test case.
title = "Invented bracket stack"
units = "mm"
currency = "EUR"

[[contributor]]
name = "base"
nominal = 20.0
tolerance = 0.05
limits = [0.01, 0.2]
cost = { curve = "reciprocal", a = 1.0, b = 0.02 }

[[contributor]]
name = "post"
nominal = 15.0
tolerance = 0.05
limits = [0.01, 0.2]
cost = { curve = "reciprocal", a = 0.5, b = 0.01 }

[[contributor]]
name = "cap"
nominal = 4.8
tolerance = 0.02
limits = [0.005, 0.1]
cost = { curve = "reciprocal", a = 0.2, b = 0.005 }

[[requirement]]
name = "gap"
chain = { base = 1, post = -1, cap = -1 }
lower = 0.05
upper = 0.4
fallout_ppm = 100

[allocation]
models = ["worst-case", "rss"]

[economics]
volume = 20000
scrap_cost = 30.0

[frontier]
requirement = "gap"
vary = "upper"
range = [0.2, 0.5]
points = 7
"""


@pytest.fixture()
def case_file(tmp_path):
    path = tmp_path / "bracket.toml"
    path.write_text(CASE_TEXT)
    return path


def _invoke(*args):
    return CliRunner().invoke(cli, ["frontier", *map(str, args)])


def test_cli_json_uses_frontier_defaults_and_adds_economics(case_file):
    import json

    result = _invoke(case_file, "--json")
    assert result.exit_code == 0, result.output
    doc = json.loads(result.output)
    assert {"value", "model", "total_cost"} <= set(doc["points"][0])
    assert len(doc["points"]) == 7 * 2
    values = sorted({p["value"] for p in doc["points"]})
    assert values[0] == pytest.approx(0.2) and values[-1] == pytest.approx(0.5)
    assert doc["range_source"] == "case" and doc["vary"] == "upper"
    assert doc["economics"]["models"][0]["model"] == "rss"
    assert doc["economics"]["models"][0]["optimal_ppm"] > 0
    # every point is the least cost an independent allocation finds
    from allocator.case import load_case

    case = load_case(case_file)
    for p in doc["points"][:6]:
        single = allocate(_with_limit(case, "gap", "upper", p["value"]), p["model"])
        assert p["status"] == single.status
        if single.total_cost is None:
            assert p["total_cost"] is None
        else:
            assert p["total_cost"] == pytest.approx(single.total_cost, rel=REL)


def test_cli_csv_and_human_table(case_file):
    result = _invoke(case_file, "--csv", "--points", "3")
    assert result.exit_code == 0, result.output
    lines = result.output.strip().splitlines()
    assert lines[0].startswith("value,model,total_cost,status,saving_vs_worst_case")
    assert len(lines) == 1 + 3 * 2
    human = _invoke(case_file, "--points", "3", "--range", "0.25", "0.45")
    assert human.exit_code == 0, human.output
    assert "from --range" in human.output and "rss saves" in human.output
    assert "fallout economics of gap" in human.output and "current design" in human.output


def test_cli_writes_plots(case_file, tmp_path):
    png, svg = tmp_path / "front.png", tmp_path / "econ.svg"
    result = _invoke(case_file, "--points", "4", "--plot", png, "--economics-plot", svg)
    assert result.exit_code == 0, result.output
    assert png.read_bytes().startswith(PNG_SIGNATURE)
    text = svg.read_text()
    assert ET.fromstring(text).tag.endswith("svg") and "fallout target of gap [ppm]" in text


@pytest.mark.parametrize(
    "args, fragment",
    [
        (["--requirement", "gpa"], "did you mean 'gap'"),
        (["--vary", "lower", "--range", "0.1", "0.0"], "increasing"),
        (["--points", "5000"], "2 to 2000"),
        (["--plot", "front.jpg"], ".png or .svg"),
        (["--json", "--csv"], "cannot be used together"),
    ],
)
def test_cli_bad_input_exits_2_with_one_line(case_file, tmp_path, args, fragment):
    result = _invoke(case_file, *args)
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and fragment in lines[0], result.output
    assert not (tmp_path / "front.jpg").exists()


def test_cli_refuses_to_overwrite_the_case(tmp_path):
    odd = tmp_path / "case.svg"  # a case file whose name looks like a plot
    odd.write_text(CASE_TEXT)
    result = _invoke(odd, "--points", "2", "--plot", odd)
    assert result.exit_code == 2 and "refusing to overwrite" in result.output
    assert odd.read_text() == CASE_TEXT


def test_cli_exit_1_when_no_value_can_be_met(case_file):
    result = _invoke(case_file, "--range", "0.06", "0.07", "--points", "2")
    assert result.exit_code == 1
    assert "infeasible" in result.output
    # the reason once, in the output; stderr only one short line
    assert "status: infeasible: no model meets the requirement" in result.stdout
    assert result.stderr == "error: frontier of gap: infeasible\n"


def test_cli_human_output_names_no_internals(case_file):
    result = _invoke(case_file, "--points", "3", "--range", "0.21", "0.5")
    assert result.exit_code == 0, result.output
    assert not re.search(r"\b[A-Z][a-z]+[A-Z]\w*", result.output), result.output  # no class names
    assert "per point" not in result.output and "dM/dp" not in result.output
    assert "(0.21)" in result.output and "0.21 .. 0.21" not in result.output


# --------------------------------------------------------------------------- long work: progress, files

# Invented: a bore made by one of two processes (continuous cost curves), a pin bought in
# classes (a choose table), a plate: every frontier point is a mixed-integer solve.
DISCRETE_CASE_TEXT = """
title = "Invented bracket with a bore made by one of two processes"
units = "mm"
currency = "EUR"

[[contributor]]
name = "bore"
nominal = 40.0
tolerance = 0.03

[[contributor.process]]
name = "turning"
limits = [0.02, 0.10]
cost = { curve = "reciprocal", a = 3.0, b = 0.05 }

[[contributor.process]]
name = "grinding"
limits = [0.004, 0.03]
cp = 1.33
cost = { curve = "reciprocal", a = 6.0, b = 0.02 }

[[contributor]]
name = "pin"
nominal = 25.0
tolerance = 0.02
cost = { curve = "table", between = "choose", tolerance = [0.005, 0.02, 0.05], cost = [2.0, 0.9, 0.4] }

[[contributor]]
name = "plate"
nominal = 12.7
tolerance = 0.03
limits = [0.01, 0.1]
mean_shift = 0.2
cost = { curve = "reciprocal", a = 0.8, b = 0.01 }

[[requirement]]
name = "gap"
chain = { bore = 1, pin = -1, plate = -1 }
lower = 2.2
upper = 2.4
fallout_ppm = 100

[allocation]
models = ["worst-case", "rss"]

[economics]
scrap_cost = 40.0

[frontier]
vary = "upper"
range = [2.34, 2.46]
points = 4
"""


@pytest.fixture()
def discrete_case_file(tmp_path):
    path = tmp_path / "bracket_processes.toml"
    path.write_text(DISCRETE_CASE_TEXT)
    return path


@pytest.mark.slow  # the fast loop keeps the pseudo-terminal check of allocate's bar
@pytest.mark.skipif(__import__("sys").platform == "win32", reason="needs a POSIX pseudo-terminal")
def test_cli_progress_on_a_terminal_and_nothing_in_the_json(discrete_case_file, tmp_path):
    # stderr on a pseudo-terminal: a bar per long task (points counted, time left), drawn
    # as soon as mixed-integer points start; stdout (a pipe) holds one JSON document only
    import json

    png = tmp_path / "front.png"
    code, out, terminal = run_on_a_terminal(
        ["frontier", discrete_case_file, "--json", "--plot", png], cwd=tmp_path)
    assert code == 0, terminal
    doc = json.loads(out)  # nothing but the document on stdout
    assert len(doc["points"]) == 4 * 2
    assert "frontier" in terminal and "/10" in terminal  # 4 points x 2 models + 2 current
    assert "fallout economics" in terminal and "allocation" in terminal
    assert "<" in terminal  # tqdm's "elapsed<remaining"
    # the file written is named on the terminal, not in the JSON
    assert f"wrote frontier plot {png}" in terminal and "wrote" not in out
    assert png.read_bytes().startswith(PNG_SIGNATURE)


def test_cli_no_progress_when_stderr_is_not_a_terminal(discrete_case_file, tmp_path):
    # CliRunner's stderr is not a terminal: no bar, no carriage returns, on either stream
    png = tmp_path / "front.png"
    result = CliRunner().invoke(cli, ["frontier", str(discrete_case_file), "--csv", "--plot", str(png)])
    assert result.exit_code == 0, result.output
    assert "\r" not in result.output and "point/s" not in result.output and "%|" not in result.output
    assert result.stdout.startswith("value,model,total_cost")
    assert "wrote" not in result.stdout  # machine output stays clean ...
    assert result.stderr.strip().splitlines() == [f"wrote frontier plot {png}"]  # ... the note is on stderr


def test_cli_names_the_plot_files_it_wrote(case_file, tmp_path):
    png, svg = tmp_path / "front.png", tmp_path / "econ.svg"
    result = _invoke(case_file, "--points", "3", "--plot", png, "--economics-plot", svg)
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert f"wrote frontier plot {png}" in lines and f"wrote economics plot {svg}" in lines
    assert png.exists() and svg.exists()
    as_json = _invoke(case_file, "--points", "3", "--json", "--economics-plot", svg)
    assert as_json.exit_code == 0
    assert "wrote" not in as_json.stdout and f"wrote economics plot {svg}" in as_json.stderr


# --------------------------------------------------------------------------- discrete frontiers


def _discrete_case(tmp_path):
    from allocator.case import load_case

    path = tmp_path / "bracket_processes.toml"
    path.write_text(DISCRETE_CASE_TEXT)
    return load_case(path)


@pytest.mark.parametrize(
    "model, vary, values",
    [
        ("worst-case", "upper", [2.3, 2.33, 2.36, 2.4, 2.46]),  # the first cannot be met
        ("rss", "upper", [2.3, 2.33, 2.36, 2.4, 2.46]),
        pytest.param("mean-shift", "upper", [2.3, 2.33, 2.36, 2.4, 2.46], marks=pytest.mark.slow),
        ("rss", "lower", [2.12, 2.2, 2.24, 2.27]),
        pytest.param("mean-shift", "fallout_ppm", [1.0, 30.0, 1000.0, 20000.0], marks=pytest.mark.slow),
    ],
)
def test_discrete_frontier_points_equal_independent_allocations(tmp_path, model, vary, values):
    # The sweep re-solves one discrete solver from point to point (previous choice as the
    # incumbent, coarse grid away from the previous optimum, mean-shift cuts carried over):
    # every point must still be what a fresh solver finds for that limit alone, to 1e-9,
    # with its lower bound proven to the same gap, and the curve cannot rise as the limit
    # loosens (Boyd & Vandenberghe 2004, §5.6.1).
    case = _discrete_case(tmp_path)
    front = frontier(case, vary=vary, values=values, models=(model,))
    assert front.solvers[model].startswith("mixed-integer")
    costs = front.costs[model]
    for value, cost, status in zip(front.values, costs, front.statuses[model]):
        single = allocate(case, model, overrides={"gap": {vary: float(value)}})
        assert status == single.status, (value, single.message)
        if single.total_cost is None:
            assert cost is None
        else:
            assert cost == pytest.approx(single.total_cost, rel=1e-9), value
            assert single.gap is not None and single.gap <= 1e-5
    met = [c for i in _loosening(front.values, vary) if (c := costs[i]) is not None]
    assert len(met) >= 3
    assert all(b <= a * (1 + 1e-9) for a, b in zip(met, met[1:]))
    if vary == "upper" and model == "worst-case":
        assert front.statuses[model][0] == "infeasible" and front.status == "partial"


def _choose_only_case():
    """Invented: four parts bought in classes (choose tables), one requirement."""
    tables = {
        "a": ([0.01, 0.02, 0.04], [3.0, 1.6, 0.9]),
        "b": ([0.005, 0.015, 0.03, 0.06], [4.0, 2.2, 1.1, 0.5]),
        "c": ([0.02, 0.05], [1.5, 0.6]),
        "d": ([0.01, 0.03, 0.08], [2.5, 1.0, 0.3]),
    }
    parts = [
        contributor(name, nominal=10.0, tolerance=points[-1], limits=(points[0], points[-1]),
                    cost=CostCurve("table", points_tolerance=tuple(points), points_cost=tuple(prices),
                                   between="choose"))
        for name, (points, prices) in tables.items()
    ]
    chain = {"a": 1.0, "b": -1.0, "c": 2.0, "d": -1.0}
    req = chain_requirement("gap", chain, lower=10.0 - 0.2, upper=10.0 + 0.2, fallout_ppm=100)
    return make_case(parts, [req], models=("worst-case", "rss")), tables, chain


@pytest.mark.parametrize("model", ["worst-case", "rss"])
def test_choose_table_frontier_against_exact_enumeration(model):
    # 3·4·2·3 = 72 combinations per point, all enumerated with numpy; the rss fallout of
    # each from scipy.stats.norm (normal parts, cp 1: σ = t/3)
    case, tables, chain = _choose_only_case()
    values = np.linspace(10.06, 10.3, 7)
    front = frontier(case, vary="upper", values=values, models=(model,))
    names = list(tables)
    combos = list(product(*(range(len(tables[n][0])) for n in names)))
    t = np.array([[tables[n][0][k] for n, k in zip(names, combo)] for combo in combos])
    price = np.array([sum(tables[n][1][k] for n, k in zip(names, combo)) for combo in combos])
    a = np.abs([chain[n] for n in names])
    for upper, cost in zip(values, front.costs[model]):
        if model == "worst-case":
            ok = (t @ a <= 0.2 + 1e-12) & (t @ a <= upper - 10.0 + 1e-12)
        else:
            sigma = np.sqrt(((t / 3.0 * a) ** 2).sum(axis=1))
            fallout = stats.norm.cdf(9.8, 10.0, sigma) + stats.norm.sf(upper, 10.0, sigma)
            ok = fallout <= 100e-6 * (1 + 1e-9)
        if not ok.any():
            assert cost is None
        else:
            assert cost == pytest.approx(price[ok].min(), rel=1e-9), upper
    assert sum(c is not None for c in front.costs[model]) >= 4


# --------------------------------------------------------------------------- sweeps sharing work


NINE_PART = Path(__file__).resolve().parents[1] / "benchmarks" / "nine_part_discrete.toml"


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
def test_nine_part_discrete_frontier_equals_independent_allocations(model):
    # The sweep shares work from point to point (the last point's multiplier starts each
    # bound, a process choice met again has its dual roots solved for the next points at
    # once): every point must still be what a fresh allocation finds at that limit alone,
    # to 1e-9 in cost, with the same processes and a proven gap within the 1e-5 target.
    from allocator.case import load_case

    case = load_case(NINE_PART)
    req = case.frontier.requirement or case.requirements[0].name
    front = frontier(case, models=(model,), points=13)
    assert front.statuses[model] == ["optimal"] * 13
    for value, cost in zip(front.values, front.costs[model]):
        single = allocate(case, model, overrides={req: {"upper": float(value)}})
        assert single.status == "optimal" and single.gap <= 1e-5, single.message
        assert cost == pytest.approx(single.total_cost, rel=1e-9), value
    # and the processes, from the kept allocation at the case's own limit and a re-solve
    sweep = LimitSweep(case, model, req, "upper")
    sweep.sweep(front.values)
    for value in front.values[::4]:
        alloc = sweep.solve(float(value))
        single = allocate(case, model, overrides={req: {"upper": float(value)}})
        assert dict(alloc.processes) == dict(single.processes), value
        assert alloc.gap <= 1e-5 and alloc.total_cost == pytest.approx(single.total_cost, rel=1e-9)


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
def test_nine_part_sweep_certificates_as_tight_as_fresh_allocations(model):
    # In a sweep a node's bound stops early once no multiplier can bring it within reach
    # of the incumbent (the node is split whatever the bound); such a bound may only
    # settle a node at the incumbent's cost or above, so every point's proven lower bound
    # stays as tight as a fresh allocation's (1e-9 here; fresh solves reach 1e-12) and
    # below its cost. 25 points, as benchmarks/bench_discrete_frontier.py sweeps them.
    from allocator.case import load_case

    case = load_case(NINE_PART)
    req = case.frontier.requirement or case.requirements[0].name
    sweep = LimitSweep(case, model, req, "upper")
    values = np.linspace(*case.frontier.range, 25)
    sweep.solver.plan([sweep.overrides(v) for v in values])
    try:
        for value in values:
            got = sweep.solver.solve(sweep.overrides(value))
            fresh = allocate(case, model, overrides={req: {"upper": float(value)}})
            assert got.status == fresh.status == "optimal", (value, got.message)
            assert got.total_cost == pytest.approx(fresh.total_cost, rel=1e-9), value
            assert got.gap <= max(fresh.gap, 1e-9), (value, got.gap, fresh.gap)
            assert got.lower_bound <= fresh.total_cost * (1 + 1e-12), value
    finally:
        sweep.solver.plan(())


def _two_process_case():
    return body_hub_plate_case(("worst-case", "rss"))


@pytest.mark.parametrize("model", ["worst-case", "rss"])
def test_solves_after_a_process_sweep_equal_a_fresh_solver_bit_for_bit(model):
    """A sweep shares warm starts and roots solved ahead between its points; once it ends,
    a solve on the same solver (the frontier's current design, the economics) must be the
    single allocation a fresh solver gives: same floats, not merely close."""
    case = _two_process_case()
    sweep = LimitSweep(case, model, "clearance", "upper")
    sweep.sweep(np.linspace(2.33, 2.45, 9))
    for value in (2.35, 2.4, 2.445):  # 2.35 is the case's own limit (the current design)
        after = sweep.solve(value)
        fresh = allocate(case, model, overrides={"clearance": {"upper": value}})
        assert after.total_cost == fresh.total_cost, value
        np.testing.assert_array_equal(after.allocated_array(), fresh.allocated_array())

@pytest.mark.parametrize("model", ["worst-case", "rss"])
def test_process_frontier_against_enumerated_process_combinations(model):
    # Reference: every process combination (itertools.product) solved as a continuous
    # problem by scipy.optimize (SLSQP, in log t), the least taken per point; the rss
    # fallout from scipy.stats.norm (normal parts: σ = t / (3 cp)).
    from allocator.model import Process

    case = _two_process_case()
    req = case.requirements[0]
    values = np.linspace(2.33, 2.45, 6)
    front = frontier(case, vary="upper", values=values, models=(model,))
    options = [c.processes if c.processes else [Process("", c.limits, c.cost)] for c in case.contributors]
    for upper, cost, status in zip(values, front.costs[model], front.statuses[model]):
        best = np.inf
        for combo in product(*options):
            lo = np.array([p.limits[0] for p in combo])
            hi = np.array([p.limits[1] for p in combo])
            f = np.array([1.0 / (3.0 * (p.cp or 1.0)) for p in combo])

            def margin(x, f=f, upper=upper):
                t = np.exp(x)
                if model == "worst-case":
                    room = min(2.3 - req.lower, upper - 2.3)
                    return np.array([1.0 - np.sum(t) / room])
                sigma = np.sqrt(np.sum((f * t) ** 2))
                out = stats.norm.cdf(req.lower, 2.3, sigma) + stats.norm.sf(upper, 2.3, sigma)
                return np.array([1.0 - out / (req.fallout_ppm * 1e-6)])

            if margin(np.log(lo))[0] < 0:
                continue
            res = optimize.minimize(
                lambda x, combo=combo: sum(float(unit_cost(p.cost, np.exp(xi))) for p, xi in zip(combo, x)),
                np.log(lo * 1.01), method="SLSQP", bounds=list(zip(np.log(lo), np.log(hi))),
                constraints=[{"type": "ineq", "fun": margin}], options={"ftol": 1e-14, "maxiter": 500})
            if res.success and margin(res.x)[0] >= -1e-9:
                best = min(best, res.fun)
        assert status == "optimal"
        assert cost == pytest.approx(best, rel=1e-6), upper
        single = allocate(case, model, overrides={"clearance": {"upper": float(upper)}})
        assert cost == pytest.approx(single.total_cost, rel=1e-9)


def test_batched_roots_of_a_sweep_equal_one_at_a_time():
    # ExactAllocation.prime solves the 1-D dual for many limits in one call; each solve
    # at those limits must give what a fresh solver gives (cost to 1e-12, re-checked).
    from allocator.solve import solver_for

    body, hub, plate = _two_process_case().contributors
    body = replace(body, processes=(), limits=(0.008, 0.03), cost=body.processes[1].cost)
    hub = replace(hub, processes=(), limits=(0.005, 0.08), cost=hub.processes[1].cost)
    case = replace(_two_process_case(), contributors=(body, hub, plate))
    plan = [{"clearance": {"upper": float(v)}} for v in np.linspace(2.33, 2.45, 7)]
    for model in ("worst-case", "rss"):
        primed = solver_for(case, model)
        assert hasattr(primed, "prime"), type(primed).__name__
        primed.prime(plan)
        for overrides in plan:
            one, fresh = primed.solve(overrides), solver_for(case, model).solve(overrides)
            assert one.status == fresh.status == "optimal"
            assert one.total_cost == pytest.approx(fresh.total_cost, rel=1e-12)
            np.testing.assert_allclose(one.allocated_array(), fresh.allocated_array(), rtol=1e-9)
        # with warm starts: after two solves, the brackets of the batched roots start on the
        # line through the roots met so far (log λ against log S), beyond them too
        warm = solver_for(case, model)
        warm.start_at()
        warm.solve(plan[3]), warm.solve(plan[4])
        warm.prime(plan[::-1])
        for overrides in plan:
            one, fresh = warm.solve(overrides), solver_for(case, model).solve(overrides)
            assert one.status == fresh.status == "optimal"
            assert one.total_cost == pytest.approx(fresh.total_cost, rel=1e-12)
        # a second problem (other curves) with one root of its own takes the first one's
        # line through its roots, moved onto that root
        other_case = replace(case, contributors=(replace(case.contributors[0], cost=hub.cost),
                                                 *case.contributors[1:]))
        other = solver_for(other_case, model)
        other.start_at(warm.hint, like=warm)
        other.solve(plan[2])
        other.prime(plan)
        for overrides in plan:
            one, fresh = other.solve(overrides), solver_for(other_case, model).solve(overrides)
            assert one.status == fresh.status == "optimal"
            assert one.total_cost == pytest.approx(fresh.total_cost, rel=1e-12)


def test_table_minimiser_takes_many_rows_at_once():
    # rows of a sweep at once must equal the table's own minimiser per element
    from allocator.costs.table import Table

    curve = CostCurve("table", points_tolerance=(0.01, 0.02, 0.05, 0.1), points_cost=(5.0, 3.0, 1.5, 1.0))
    fam = Table()
    s = np.array([[10.0, 150.0], [50.0, 250.0], [1.0, 400.0]])
    out = fam.linear_minimiser([curve, curve], s)
    assert out.shape == s.shape
    for idx in np.ndindex(*s.shape):
        assert out[idx] == fam.inverse_derivative_at(curve, -s[idx])


def test_table_quadratic_minimiser_rows_against_minimize_scalar():
    # the rss (and mean-shift) step C(t) + q t²/2 + shift·t over a table, many rows at once:
    # each element against scipy.optimize.minimize_scalar (bounded) on the interpolant, a
    # price of 0 against the table's own inverse slope
    from allocator.costs.table import Table

    curve = CostCurve("table", points_tolerance=(0.01, 0.02, 0.05, 0.1), points_cost=(5.0, 3.0, 1.5, 1.0))
    other = CostCurve("table", points_tolerance=(0.002, 0.004, 0.03), points_cost=(9.0, 4.0, 2.0))
    fam = Table()
    q = np.array([[1e3, 5e4], [2e4, 1e6], [1e5, 0.0], [3e2, 2e7]])
    shift = np.array([[0.0, 10.0], [5.0, 0.0], [0.0, 0.0], [20.0, 1.0]])
    for sh in (None, shift):
        out = fam.quadratic_minimiser([curve, other], q, None, None, sh)
        assert out.shape == q.shape
        for r, i in np.ndindex(*q.shape):
            c = (curve, other)[i]
            x = np.asarray(c.points_tolerance)
            extra = 0.0 if sh is None else sh[r, i]
            if q[r, i] == 0:
                assert out[r, i] == fam.inverse_derivative_at(c, -extra)
                continue
            res = optimize.minimize_scalar(
                lambda t: np.interp(t, x, c.points_cost) + 0.5 * q[r, i] * t * t + extra * t,
                bounds=(x[0], x[-1]), method="bounded", options={"xatol": 1e-12})
            assert out[r, i] == pytest.approx(res.x, abs=1e-8), (r, i, sh is None)
        # one row (a single solve) gives the same as that row of many
        np.testing.assert_array_equal(fam.quadratic_minimiser([curve, other], q[1], None, None,
                                                              None if sh is None else sh[1]), out[1])
