"""Least-cost allocation: checked against scipy.optimize (SLSQP) as an independent solver,
scipy.stats for every fallout, finite differences for shadow prices and derivatives, and
unit changes of the same invented case.

The cases are invented for these tests. The closed-form checks are in
tests/reference/test_lagrange.py.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize, special, stats

from allocator import stack
from allocator.errors import CaseError, UsageError
from allocator.model import Case, Contributor, CostCurve, Process, Requirement
from allocator.solve import allocate, allocate_all, prepare, solver_for
from allocator.solve.continuous import CompiledAllocation
from allocator.solve.problem import CurveSet, RequirementLimits, mean_shift_allowance, scaled_curve, sigma_limit_slopes

from helpers import chain_requirement, contributor, make_case

# --------------------------------------------------------------------------- invented cases

TABLE = CostCurve("table", points_tolerance=(0.004, 0.01, 0.03, 0.08), points_cost=(2.0, 1.1, 0.6, 0.45))


def _curves():
    return [
        CostCurve("reciprocal", a=0.8, b=0.004),
        CostCurve("reciprocal-power", a=0.4, b=0.0001, k=2.0),
        CostCurve("exponential", a=0.1, b=0.9, c=40.0),
        TABLE,
        CostCurve("reciprocal-power", a=1.5, b=0.002, k=1.5),
        CostCurve("reciprocal", a=0.05, b=0.002),
        CostCurve("exponential", a=0.2, b=1.5, c=25.0),
    ]


def multi_case(*, mean_shift=0.0, fixed=True, table=True) -> Case:
    """Seven contributors, three requirements sharing them (invented)."""
    curves = _curves()
    if not table:
        curves[3] = CostCurve("reciprocal", a=0.3, b=0.003)
    limits = [(0.005, 0.15), (0.003, 0.08), (0.01, 0.08), (0.004, 0.08), (0.005, 0.1), (0.004, 0.05), (0.01, 0.1)]
    counts = [1, 2, 1, 1, 1, 3, 1]
    dists = ["normal", "normal", "uniform", "normal", "triangular", "normal", "normal"]
    people = []
    for i in range(7):
        people.append(
            Contributor(
                name=f"c{i}", nominal=5.0 + i, tolerance=0.03, limits=limits[i], cost=curves[i],
                count=counts[i], distribution=dists[i], cp=1.2 if i == 4 else 1.0,
                mean_shift=mean_shift * (0.5 + 0.1 * i),
            )
        )
    people.append(Contributor(name="bought", nominal=3.0, tolerance=0.02, fixed=fixed,
                              limits=None if fixed else (0.005, 0.05),
                              cost=None if fixed else CostCurve("reciprocal", a=0.2, b=0.001)))
    chains = [
        {"c0": 1, "c1": -1, "c2": 1, "c3": -1, "bought": -1},
        {"c1": 1, "c4": -1, "c5": 1, "c6": 2.0},
        {"c0": 0.5, "c3": 1, "c5": -1, "c6": -1, "bought": 1},
    ]
    names = [c.name for c in people]
    nominal = {c.name: c.count * c.nominal for c in people}
    reqs = []
    for j, (chain, (lo_room, hi_room)) in enumerate(zip(chains, [(0.25, 0.35), (0.5, 0.3), (0.4, 0.4)])):
        y0 = sum(coef * nominal[n] for n, coef in chain.items())
        reqs.append(chain_requirement(f"r{j}", chain, lower=y0 - lo_room, upper=y0 + hi_room,
                                      fallout_ppm=[100.0, 500.0, 2700.0][j]))
    assert set(names) >= {n for r in chains for n in r}
    return make_case(people, reqs, models=("worst-case", "rss", "mean-shift"))


def _cost_of(curve, t):
    """Cost curves written out again here (independent of allocator.costs)."""
    if curve is None:
        return 0.0
    if curve.curve == "reciprocal":
        return curve.a + curve.b / t
    if curve.curve == "reciprocal-power":
        return curve.a + curve.b / t**curve.k
    if curve.curve == "exponential":
        return curve.a + curve.b * np.exp(-curve.c * t)
    return float(np.interp(t, curve.points_tolerance, curve.points_cost))


SIGMA_FACTOR = {"normal": None, "uniform": 1 / math.sqrt(3), "triangular": 1 / math.sqrt(6)}


def _arrays(case):
    """Independent arrays: counts, σ/t (normal: 1/(3 cp) by the ±3σ convention), sensitivities."""
    n = np.array([c.count for c in case.contributors], dtype=float)
    f = np.array([SIGMA_FACTOR[c.distribution] or 1 / (3 * c.cp) for c in case.contributors])
    m = np.array([c.mean_shift for c in case.contributors])
    a = np.zeros((len(case.requirements), len(n)))
    y0 = np.zeros(len(case.requirements))
    for j, r in enumerate(case.requirements):
        for name, coef in r.chain.items():
            i = case.index(name)
            a[j, i] = coef
            y0[j] += coef * case.contributors[i].count * case.contributors[i].nominal
    return n, f, m, a, y0


def _fallout(mean, sigma, lower, upper):
    """Normal fallout by scipy.stats (independent of allocator.stack)."""
    out = 0.0
    if lower is not None:
        out += stats.norm.cdf(lower, loc=mean, scale=sigma)
    if upper is not None:
        out += stats.norm.sf(upper, loc=mean, scale=sigma)
    return out


def _true_check(case, model, t):
    """Per requirement: the model's constraint margin (≥ 0 met), all in plain numpy/scipy."""
    n, f, m, a, y0 = _arrays(case)
    margins = []
    for j, r in enumerate(case.requirements):
        half = np.sum(n * np.abs(a[j]) * t)
        sigma = math.sqrt(np.sum(n * (a[j] * f * t) ** 2))
        if model == "worst-case":
            margin = min(
                math.inf if r.upper is None else r.upper - (y0[j] + half),
                math.inf if r.lower is None else (y0[j] - half) - r.lower,
            ) / max(half, 1e-300)
        else:
            delta = np.sum(n * np.abs(a[j]) * m * t) if model == "mean-shift" else 0.0
            worst = max(_fallout(y0[j] + s * delta, sigma, r.lower, r.upper) for s in (-1, 1))
            margin = (r.fallout_ppm * 1e-6 - worst) / (r.fallout_ppm * 1e-6)
        margins.append(margin)
    return np.array(margins)


def _slope_of(curve, t):
    if curve is None:
        return 0.0
    if curve.curve == "reciprocal":
        return -curve.b / t**2
    if curve.curve == "reciprocal-power":
        return -curve.k * curve.b / t ** (curve.k + 1)
    if curve.curve == "exponential":
        return -curve.b * curve.c * np.exp(-curve.c * t)
    x, y = np.asarray(curve.points_tolerance), np.asarray(curve.points_cost)
    j = int(np.clip(np.searchsorted(x, t) - 1, 0, len(x) - 2))
    return (y[j + 1] - y[j]) / (x[j + 1] - x[j])


def _normal_tail_terms(mean, sigma, lower, upper):
    """Fallout and its derivatives in mean and σ (normal, scipy.special.ndtr)."""
    value = d_mean = d_sigma = 0.0
    if lower is not None:
        z = (lower - mean) / sigma
        pdf = math.exp(-0.5 * z * z) / math.sqrt(2 * math.pi)
        value += special.ndtr(z)
        d_mean -= pdf / sigma
        d_sigma -= pdf * z / sigma
    if upper is not None:
        z = (mean - upper) / sigma
        pdf = math.exp(-0.5 * z * z) / math.sqrt(2 * math.pi)
        value += special.ndtr(z)
        d_mean += pdf / sigma
        d_sigma -= pdf * z / sigma
    return value, d_mean, d_sigma


def slsqp_reference(case, model, *, starts=4, seed=1):
    """Best of several SLSQP runs (analytic gradients) on the true constraints.

    For mean shift the constraint is the fallout at the worse end of ȳ ± δ itself, not a
    tangent or any other linearisation.
    """
    n, f, m, a, y0 = _arrays(case)
    free = np.array([not c.fixed for c in case.contributors])
    held = np.array([c.tolerance for c in case.contributors])
    lo = np.array([c.limits[0] if not c.fixed else c.tolerance for c in case.contributors])
    hi = np.array([c.limits[1] if not c.fixed else c.tolerance for c in case.contributors])
    scale = np.sqrt(lo * hi)[free]
    curves = [c.cost for c in case.contributors]

    def full(x):
        t = held.copy()
        t[free] = x * scale
        return t

    def cost(x):
        t = full(x)
        return sum(n[i] * _cost_of(c, t[i]) for i, c in enumerate(curves))

    def cost_grad(x):
        t = full(x)
        return np.array([n[i] * _slope_of(curves[i], t[i]) for i in range(len(t))])[free] * scale

    cons = []
    for j, r in enumerate(case.requirements):
        if model == "worst-case":
            room = min(math.inf if r.upper is None else r.upper - y0[j],
                       math.inf if r.lower is None else y0[j] - r.lower)
            cons.append({
                "type": "ineq",
                "fun": lambda x, j=j, room=room: (room - np.sum(n * np.abs(a[j]) * full(x))) / room,
                "jac": lambda x, j=j, room=room: -(n * np.abs(a[j]))[free] * scale / room,
            })
            continue
        p = r.fallout_ppm * 1e-6

        def worst(x, j=j, r=r):
            t = full(x)
            sigma = math.sqrt(np.sum(n * (a[j] * f * t) ** 2))
            delta = np.sum(n * np.abs(a[j]) * m * t) if model == "mean-shift" else 0.0
            ends = [(_normal_tail_terms(y0[j] + s * delta, sigma, r.lower, r.upper), s) for s in (-1, 1)]
            (value, d_mean, d_sigma), side = max(ends, key=lambda e: e[0][0])
            grad = d_sigma * n * (a[j] * f) ** 2 * t / sigma
            if model == "mean-shift":
                grad = grad + d_mean * side * n * np.abs(a[j]) * m
            return value, grad

        cons.append({
            "type": "ineq",
            "fun": lambda x, p=p, worst=worst: math.log(p) - math.log(max(worst(x)[0], 1e-300)),
            "jac": lambda x, worst=worst: -(worst(x)[1] / max(worst(x)[0], 1e-300))[free] * scale,
        })
    rng = np.random.default_rng(seed)
    best = None
    for k in range(starts):
        x0 = np.exp(rng.uniform(np.log(lo[free]), np.log(hi[free]))) / scale if k else lo[free] / scale
        out = optimize.minimize(
            cost, x0, jac=cost_grad, method="SLSQP", bounds=list(zip(lo[free] / scale, hi[free] / scale)),
            constraints=cons, options={"ftol": 1e-15, "maxiter": 1000},
        )
        t = full(np.clip(out.x, lo[free] / scale, hi[free] / scale))
        if np.all(_true_check(case, model, t) >= -1e-9) and (best is None or cost(out.x) < best[0]):
            best = (cost(out.x), t)
    assert best is not None, "no SLSQP start converged to a feasible point"
    return best


# --------------------------------------------------------------------------- independent solver


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
@pytest.mark.parametrize("table", [True, False], ids=["with-table", "formulas"])
def test_multi_requirement_matches_slsqp(model, table):
    # scipy.optimize.minimize(SLSQP) as an independent solver on the same invented case
    case = multi_case(mean_shift=0.2 if model == "mean-shift" else 0.0, table=table)
    result = allocate(case, model)
    assert result.success, result.message
    t = result.allocated_array()
    assert np.all(_true_check(case, model, t) >= -1e-9)
    lo = np.array([c.limits[0] if c.limits else c.tolerance for c in case.contributors])
    hi = np.array([c.limits[1] if c.limits else c.tolerance for c in case.contributors])
    assert np.all(t >= lo) and np.all(t <= hi)
    assert t[case.index("bought")] == 0.02  # fixed stays
    ref_cost, ref_t = slsqp_reference(case, model)
    assert result.total_cost <= ref_cost * (1 + 1e-7)
    # and it is not cheaper by cheating: the SLSQP optimum is nearly as good
    assert ref_cost <= result.total_cost * (1 + 1e-4)
    expected = sum(c.count * _cost_of(c.cost, t[i]) for i, c in enumerate(case.contributors))
    assert result.total_cost == pytest.approx(expected, rel=1e-12)
    if not table and model != "mean-shift":
        np.testing.assert_allclose(t, ref_t, rtol=1e-4)


def test_two_sided_mean_shift_is_exact_against_slsqp():
    # one requirement, two-sided, strong mean shifts: the worst mean moves between the limits'
    # sides as tolerances change; SLSQP sees the true worst-mean fallout, not tangents
    people = [
        contributor("p", nominal=20.0, limits=(0.005, 0.2), mean_shift=0.3, cost=CostCurve("reciprocal", a=1.0, b=0.01)),
        contributor("q", nominal=8.0, limits=(0.005, 0.2), mean_shift=0.1,
                    cost=CostCurve("reciprocal-power", a=0.5, b=0.0004, k=2.0)),
        contributor("r", nominal=11.9, limits=(0.005, 0.2), mean_shift=0.0, cost=CostCurve("exponential", a=0.2, b=3.0, c=30.0)),
        contributor("s", nominal=0.0, limits=(0.005, 0.2), mean_shift=0.25, count=2,
                    cost=CostCurve("reciprocal", a=0.1, b=0.002)),
    ]
    req = chain_requirement("gap", {"p": 1, "q": -1, "r": -1, "s": 1}, lower=0.02, upper=0.26, fallout_ppm=300)
    case = make_case(people, [req], models=("mean-shift",))
    ref_cost, ref_t = slsqp_reference(case, "mean-shift", starts=8)
    newton = allocate(case, "mean-shift")
    conic = CompiledAllocation(case, "mean-shift").solve()  # cutting planes
    # the two paths really ran (which conic solver or tier answered is not the point)
    assert newton.solver == "lagrange-newton" and not conic.solver.startswith("lagrange")
    for result in (newton, conic):
        assert result.success, result.message
        t = result.allocated_array()
        assert _true_check(case, "mean-shift", t)[0] >= 0
        assert result.total_cost <= ref_cost * (1 + 1e-7)
        np.testing.assert_allclose(t, ref_t, rtol=1e-3)
        # active: the worst-mean fallout equals the target (scipy.stats)
        n, f, m, a, y0 = _arrays(case)
        sigma = math.sqrt(np.sum(n * (a[0] * f * t) ** 2))
        delta = np.sum(n * np.abs(a[0]) * m * t)
        worst = max(_fallout(y0[0] + s * delta, sigma, 0.02, 0.26) for s in (-1, 1))
        assert worst * 1e6 == pytest.approx(300.0, rel=1e-6)
        assert result.gap is not None and result.gap <= 1e-6
    # two independent methods, one answer
    np.testing.assert_allclose(newton.allocated_array(), conic.allocated_array(), rtol=1e-7)


@pytest.mark.parametrize(
    "nominal, lower, upper, ppm",
    [(0.0, -1.0, 1.0, 2700.0), (0.3, -1.0, 1.0, 100.0), (-0.6, -1.0, 1.0, 10.0), (0.0, None, 1.0, 1000.0),
     (0.2, -0.5, 2.0, 5.0)],
)
def test_mean_shift_allowance_is_concave_and_its_slope_is_right(nominal, lower, upper, ppm):
    # the cutting planes are valid outer approximations only if g(δ) is concave: check it
    # numerically by second differences over its whole domain, and the analytic slope by
    # central differences
    lim = RequirementLimits(lower, upper, ppm)
    domain = min(math.inf if lower is None else nominal - lower, math.inf if upper is None else upper - nominal)
    deltas = np.linspace(0.0, domain * 0.999, 400)
    g = np.array([stack.mean_shift_sigma_limit(nominal, d, lim.fallout, lower, upper) for d in deltas])
    second = g[:-2] - 2 * g[1:-1] + g[2:]
    assert np.all(second <= 1e-12 * g.max())
    assert np.all(np.diff(g) <= 1e-15)  # decreasing
    for d in deltas[5:-5:40]:
        value, slope, _ = mean_shift_allowance(nominal, d, lim)
        h = 1e-6 * domain
        fd = (stack.mean_shift_sigma_limit(nominal, d + h, lim.fallout, lower, upper)
              - stack.mean_shift_sigma_limit(nominal, d - h, lim.fallout, lower, upper)) / (2 * h)
        assert value == pytest.approx(stack.mean_shift_sigma_limit(nominal, d, lim.fallout, lower, upper))
        assert slope == pytest.approx(fd, rel=1e-5, abs=1e-9)


@pytest.mark.parametrize("mean, lower, upper", [(0.1, -1.0, 1.0), (0.0, None, 2.0), (0.5, -0.2, None), (0.9, 0.0, 1.0)])
def test_sigma_limit_slopes_match_finite_differences(mean, lower, upper):
    p = 1e-3
    lim = RequirementLimits(lower, upper, p * 1e6)
    sigma = stack.sigma_limit(mean, p, lower, upper)
    slopes = sigma_limit_slopes(mean, sigma, lim)
    h = 1e-6
    fd_mean = (stack.sigma_limit(mean + h, p, lower, upper) - stack.sigma_limit(mean - h, p, lower, upper)) / (2 * h)
    assert slopes["mean"] == pytest.approx(fd_mean, rel=1e-5)
    fd_p = (stack.sigma_limit(mean, p * (1 + 1e-5), lower, upper)
            - stack.sigma_limit(mean, p * (1 - 1e-5), lower, upper)) / (2e-5 * p)
    assert slopes["fallout"] == pytest.approx(fd_p, rel=1e-5)
    if upper is not None:
        fd_u = (stack.sigma_limit(mean, p, lower, upper + h) - stack.sigma_limit(mean, p, lower, upper - h)) / (2 * h)
        assert slopes["upper"] == pytest.approx(fd_u, rel=1e-5, abs=1e-12)
    if lower is not None:
        fd_l = (stack.sigma_limit(mean, p, lower + h, upper) - stack.sigma_limit(mean, p, lower - h, upper)) / (2 * h)
        assert slopes["lower"] == pytest.approx(fd_l, rel=1e-5, abs=1e-12)


# --------------------------------------------------------------------------- model ordering


def test_statistical_costs_no_more_than_worst_case_and_mean_shift_in_between():
    case = multi_case(mean_shift=0.2, table=False)
    wc, rss, ms = allocate_all(case)
    assert [r.model for r in (wc, rss, ms)] == ["worst-case", "rss", "mean-shift"]
    assert all(r.success for r in (wc, rss, ms))
    assert rss.total_cost <= ms.total_cost <= wc.total_cost
    # with all mean shifts 0, mean shift is rss (Greenwood & Chase 1987)
    flat = multi_case(mean_shift=0.0, table=False)
    assert allocate(flat, "mean-shift").total_cost == pytest.approx(allocate(flat, "rss").total_cost, rel=1e-7)


def test_rss_fallout_equals_target_when_active():
    case = multi_case(table=False)
    result = allocate(case, "rss")
    n, f, m, a, y0 = _arrays(case)
    t = result.allocated_array()
    for j, (r, rec) in enumerate(zip(case.requirements, result.requirements)):
        sigma = math.sqrt(np.sum(n * (a[j] * f * t) ** 2))
        fallout = _fallout(y0[j], sigma, r.lower, r.upper) * 1e6  # scipy.stats
        assert rec.fallout_ppm == pytest.approx(fallout, rel=1e-9)
        assert fallout <= r.fallout_ppm * (1 + 1e-9)
        if rec.binding:
            assert fallout == pytest.approx(r.fallout_ppm, rel=1e-6)
    assert any(rec.binding for rec in result.requirements)


# --------------------------------------------------------------------------- infeasible


def _infeasible_case():
    people = [contributor("a", limits=(0.05, 0.2)), contributor("b", limits=(0.02, 0.2)),
              contributor("c", limits=(0.01, 0.2)), contributor("d", limits=(0.001, 0.2))]
    ok = chain_requirement("fine", {"a": 1, "d": -1}, lower=-1.0, upper=1.0)
    bad = chain_requirement("squeeze", {"a": 1, "b": 1, "c": -1, "d": 1}, lower=19.93, upper=20.05, fallout_ppm=100)
    return make_case(people, [ok, bad])


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
def test_infeasible_names_requirement_amount_and_contributors(model):
    result = allocate(_infeasible_case(), model)
    assert result.status == "infeasible" and not result.success
    assert result.total_cost is None and result.tolerances is None
    assert "squeeze" in result.message and "fine" not in result.message
    # shares of the worst case at the tightest tolerances: a 0.05, b 0.02, c 0.01, d 0.001
    assert "a " in result.message and "b " in result.message
    if model == "worst-case":
        # range [20 − 0.081, 20 + 0.081] misses upper 20.05 by 0.031 and lower 19.93 by 0.011
        assert "exceeds upper 20.05 by 0.031" in result.message
        assert "below lower 19.93 by 0.011" in result.message
    else:
        assert "ppm > target 100 ppm" in result.message
    assert json.loads(json.dumps(result.to_dict()))["status"] == "infeasible"


def test_infeasible_when_nominal_outside_limits():
    people = [contributor("a"), contributor("b")]
    req = chain_requirement("off", {"a": 1, "b": -1}, lower=0.5, upper=1.0)
    result = allocate(make_case(people, [req]), "rss")
    assert result.status == "infeasible" and "nominal 0 is not inside" in result.message


# --------------------------------------------------------------------------- units


def _scaled(case: Case, s: float) -> Case:
    """The same case in another length unit (× s): every length and cost curve converted."""
    def curve(c):
        if c is None:
            return None
        if c.curve == "reciprocal":
            return CostCurve("reciprocal", a=c.a, b=c.b * s)
        if c.curve == "reciprocal-power":
            return CostCurve("reciprocal-power", a=c.a, b=c.b * s**c.k, k=c.k)
        if c.curve == "exponential":
            return CostCurve("exponential", a=c.a, b=c.b, c=c.c / s)
        return CostCurve("table", points_tolerance=tuple(x * s for x in c.points_tolerance),
                         points_cost=c.points_cost)

    people = [
        Contributor(name=c.name, nominal=c.nominal * s, tolerance=c.tolerance * s,
                    limits=None if c.limits is None else (c.limits[0] * s, c.limits[1] * s),
                    cost=curve(c.cost), count=c.count, distribution=c.distribution, cp=c.cp,
                    mean_shift=c.mean_shift, fixed=c.fixed)
        for c in case.contributors
    ]
    reqs = [Requirement(name=r.name, chain=r.chain, lower=r.lower * s, upper=r.upper * s,
                        fallout_ppm=r.fallout_ppm) for r in case.requirements]
    return make_case(people, reqs, models=case.allocation.models)


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
@pytest.mark.parametrize("single", [True, False], ids=["exact-path", "conic-path"])
def test_mm_m_um_give_the_same_allocation(model, single):
    base = multi_case(mean_shift=0.2 if model == "mean-shift" else 0.0)
    if single:
        base = make_case(base.contributors, base.requirements[:1], models=base.allocation.models)
    ref = allocate(base, model)
    assert ref.success
    for s in (1e-3, 1e3):  # m and μm
        other = allocate(_scaled(base, s), model)
        assert other.success
        np.testing.assert_allclose(other.allocated_array() / s, ref.allocated_array(), rtol=1e-6)
        assert other.total_cost == pytest.approx(ref.total_cost, rel=1e-9)


# --------------------------------------------------------------------------- shadow prices


def _fd(case, model, req, key, value, h):
    up = allocate(case, model, overrides={req: {key: value + h}}).total_cost
    down = allocate(case, model, overrides={req: {key: value - h}}).total_cost
    return (up - down) / (2 * h)


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
@pytest.mark.parametrize("single", [True, False], ids=["exact-path", "conic-path"])
def test_shadow_prices_match_finite_differences_of_resolves(model, single):
    base = multi_case(mean_shift=0.2 if model == "mean-shift" else 0.0, table=False)
    if single:
        base = make_case(base.contributors, base.requirements[:1], models=base.allocation.models)
    result = allocate(base, model)
    tol = 2e-3 if model == "mean-shift" else 1e-4
    checked = 0
    for req, rec in zip(base.requirements, result.requirements):
        if not rec.binding:
            continue
        for key, price, value in (("upper", rec.shadow_upper, req.upper), ("lower", rec.shadow_lower, req.lower)):
            if abs(price) < 1e-3 * abs(rec.shadow_price):
                continue
            fd = _fd(base, model, req.name, key, value, 1e-5)
            assert price == pytest.approx(fd, rel=tol), (req.name, key)
            checked += 1
        if model != "worst-case":
            fd = _fd(base, model, req.name, "fallout_ppm", req.fallout_ppm, 1e-4 * req.fallout_ppm)
            assert rec.shadow_ppm == pytest.approx(fd, rel=tol)
    assert checked >= 1


# --------------------------------------------------------------------------- compiled problem


def test_compiled_problem_is_dpp_and_resolves_with_overrides():
    case = multi_case(table=False)
    for model in ("worst-case", "rss", "mean-shift"):
        compiled = CompiledAllocation(case, model)
        assert compiled.is_dpp
        first = compiled.solve()
        moved = compiled.solve({"r0": {"upper": case.requirements[0].upper + 0.05}})
        from dataclasses import replace

        looser = replace(case, requirements=(replace(case.requirements[0], upper=case.requirements[0].upper + 0.05),
                                             *case.requirements[1:]))
        fresh = allocate(looser, model)
        assert moved.total_cost == pytest.approx(fresh.total_cost, rel=1e-8)
        assert moved.total_cost <= first.total_cost
        again = compiled.solve()
        assert again.total_cost == pytest.approx(first.total_cost, rel=1e-9)


def test_exact_and_conic_paths_agree_on_tables_and_exponential():
    case = multi_case(table=True, mean_shift=0.2)
    for j in range(3):
        single = make_case(case.contributors, case.requirements[j:j + 1])
        for model in ("worst-case", "rss", "mean-shift"):
            exact = allocate(single, model)
            conic = CompiledAllocation(single, model).solve()
            assert exact.solver.startswith("lagrange-") and exact.success and conic.success
            assert exact.total_cost == pytest.approx(conic.total_cost, rel=1e-8)
            assert np.all(_true_check(single, model, exact.allocated_array()) >= -1e-9)


# --------------------------------------------------------------------------- holding, dispatch


def test_fix_holds_tolerance_and_costs_at_least_the_free_optimum():
    case = multi_case(table=False)
    free = allocate(case, "rss")
    held = allocate(case, "rss", fix={"c0": 0.01})
    assert held.success
    assert held.tolerances["c0"] == 0.01 and held.active["c0"] == "fixed"
    assert held.held == {"c0": 0.01}
    assert held.total_cost >= free.total_cost
    assert held.cost_delta(free) == pytest.approx(held.total_cost - free.total_cost)


def test_bad_fix_and_model_are_usage_errors():
    case = multi_case()
    with pytest.raises(UsageError, match="did you mean 'c0'"):
        allocate(case, "rss", fix={"c00": 0.01})
    with pytest.raises(UsageError, match="must be > 0"):
        allocate(case, "rss", fix={"c0": 0.0})
    with pytest.raises(UsageError, match=r"fix: c3: tolerance 0\.5 is outside its limits \[0\.004, 0\.08\]"):
        allocate(case, "rss", fix={"c3": 0.5})
    with pytest.raises(UsageError, match="unknown model"):
        allocate(case, "rms")
    with pytest.raises(UsageError, match="unknown requirement"):
        allocate(case, "rss", overrides={"rx": {"upper": 1.0}})


@pytest.mark.parametrize("case_file", ["gearbox_end_play.toml", "gear_hub_end_play.toml", "pump_shim.toml"])
def test_unknown_model_says_the_same_on_every_solver_path(case_file):
    # gear_hub and pump_shim round their tolerances (the discrete solver's path)
    from pathlib import Path

    from allocator.case import load_case

    case = load_case(Path(__file__).resolve().parent.parent / "cases" / case_file)
    with pytest.raises(UsageError, match="unknown model 'rs' \\(did you mean 'rss'\\?\\)"):
        allocate(case, "rs")
    assert issubclass(UsageError, ValueError)


def test_discrete_contributor_is_refused_by_the_continuous_problem_with_a_clear_message():
    # the continuous problem refuses a contributor that needs a choice of process, clearly;
    # allocate() hands that case to the discrete solver
    proc = (Process("turning", (0.02, 0.1), CostCurve("reciprocal", a=3.0, b=0.05)),
            Process("grinding", (0.002, 0.01), CostCurve("reciprocal", a=9.0, b=0.02)))
    people = [Contributor(name="body", nominal=40.0, tolerance=0.03, processes=proc), contributor("x")]
    case = make_case(people, [chain_requirement("gap", {"body": 1, "x": -1}, lower=29.8, upper=30.2)])
    with pytest.raises(UsageError, match="body.*discrete"):
        prepare(case, "rss")
    assert allocate(case, "rss").success
    # held, it is no longer a choice
    assert allocate(case, "rss", fix={"body": 0.03}).success


def test_non_convex_table_is_a_case_error_naming_the_contributor():
    bumpy = CostCurve("table", points_tolerance=(0.01, 0.02, 0.05), points_cost=(5.0, 4.5, 2.0))
    people = [contributor("a", limits=(0.01, 0.05), cost=bumpy), contributor("b")]
    case = make_case(people, [chain_requirement("gap", {"a": 1, "b": -1}, lower=-0.2, upper=0.2)])
    with pytest.raises(CaseError, match=r"contributor\[1\] \(a\)\.cost.*'a'.*not convex"):
        allocate(case, "worst-case")


def test_everything_held_is_just_checked():
    people = [contributor("a", fixed=True), contributor("b", fixed=True)]
    case = make_case(people, [chain_requirement("gap", {"a": 1, "b": -1}, lower=-0.2, upper=0.2)])
    for model in ("worst-case", "rss"):
        result = allocate(case, model)
        assert result.success and list(result.tolerances) == [0.05, 0.05]


# --------------------------------------------------------------------------- building blocks


def test_vectorised_curves_match_allocator_costs_and_scaling_is_exact():
    from allocator import costs

    curves = _curves() + [None]
    t = np.array([0.02, 0.01, 0.03, 0.02, 0.05, 0.004, 0.07, 0.1])
    cs = CurveSet(curves)
    for i, c in enumerate(curves):
        expected = 0.0 if c is None else costs.cost_value(c, t[i])
        slope = 0.0 if c is None else costs.cost_derivative(c, t[i])
        assert cs.value(t)[i] == pytest.approx(expected, rel=1e-14)
        assert cs.derivative(t)[i] == pytest.approx(slope, rel=1e-14)
        if c is not None:
            scaled = scaled_curve(c, 0.01, 7.0)
            assert costs.cost_value(scaled, t[i] / 0.01) == pytest.approx(expected / 7.0, rel=1e-13)


def test_result_object_frames_dict_and_repr():
    case = multi_case(table=False)
    result = allocate(case, "rss")
    frame = result.to_frame()
    assert list(frame.index) == list(case.names)
    assert {"current", "allocated", "bound", "unit_cost_current", "unit_cost_allocated", "count"} <= set(frame.columns)
    req = result.requirements_frame()
    assert list(req.index) == ["r0", "r1", "r2"]
    assert frame.index.name == "contributor" and req.index.name == "requirement"
    page = result._repr_html_()
    assert "<table" in page and "Allocation rss: optimal" in page and "c0" in page
    doc = json.loads(json.dumps(result.to_dict()))
    assert {"model", "status", "total_cost", "tolerances"} <= set(doc)
    assert doc["tolerances"]["c0"] == pytest.approx(result.tolerances["c0"])
    assert result.savings == pytest.approx(result.current_cost - result.total_cost)
    assert "rss" in repr(result) and "optimal" in repr(result)
    assert result.unit_cost["c1"] == pytest.approx(_cost_of(case.contributors[1].cost, result.tolerances["c1"]))


def test_solver_for_picks_the_exact_dual_for_one_requirement():
    case = multi_case()
    single = make_case(case.contributors, case.requirements[:1])
    assert type(solver_for(single, "rss")).__name__ == "ExactAllocation"
    assert type(solver_for(case, "rss")).__name__ == "CompiledAllocation"
    assert type(solver_for(multi_case(mean_shift=0.2), "mean-shift")).__name__ == "CompiledAllocation"
    shifted = multi_case(mean_shift=0.2)
    one = make_case(shifted.contributors, shifted.requirements[:1])
    assert type(solver_for(one, "mean-shift")).__name__ == "MeanShiftExact"
    assert prepare(case, "rss").free.sum() == 7


def test_each_kind_of_case_gets_the_documented_method_and_its_guarantee(tmp_path):
    # the dispatch rule of docs/allocation.md ("Solvers"), as guarantees: one requirement
    # without a choice is solved with a certified gap (dual bound) and no conic solver --
    # cvxpy is never imported -- under every model (the 1-D dual, or Newton on the KKT
    # conditions under mean shift); several requirements go to the conic problem; every
    # optimum matches scipy.optimize (SLSQP) as an independent solver
    import subprocess
    import sys

    from helpers import case_text

    plain = multi_case(table=False)
    shifted = multi_case(mean_shift=0.2, table=False)
    kinds = [
        (make_case(plain.contributors, plain.requirements[:1]), "worst-case"),
        (make_case(plain.contributors, plain.requirements[:1]), "rss"),
        (make_case(shifted.contributors, shifted.requirements[:1], models=("mean-shift",)), "mean-shift"),
    ]
    paths = []
    for k, (case, model) in enumerate(kinds):
        paths.append(str(tmp_path / f"kind{k}.toml"))
        (tmp_path / f"kind{k}.toml").write_text(case_text(case))
    code = (
        "import json, sys\n"
        "from allocator.case import load_case\n"
        "from allocator.solve import allocate\n"
        "rows = [allocate(load_case(p), m) for p, m in json.loads(sys.argv[1])]\n"
        "print(json.dumps([[r.status, r.gap, r.total_cost] for r in rows] + ['cvxpy' in sys.modules]))\n"
    )
    pairs = [[p, model] for p, (_, model) in zip(paths, kinds)]
    done = subprocess.run([sys.executable, "-c", code, json.dumps(pairs)], cwd=Path(__file__).resolve().parents[1],
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    *rows, conic = json.loads(done.stdout)
    assert conic is False
    for (case, model), (status, gap, cost) in zip(kinds, rows):
        assert status == "optimal" and gap is not None and gap <= 1e-8, model
        best, _ = slsqp_reference(case, model)
        assert cost <= best * (1 + 1e-7), model
    several = allocate(shifted, "mean-shift")
    assert several.success and several.gap is not None and several.gap <= 1e-6
    assert several.total_cost <= slsqp_reference(shifted, "mean-shift")[0] * (1 + 1e-7)


def test_an_allocation_is_read_only_once_built():
    # results complete at birth (docs/allocation.md): nothing is set on them afterwards
    from dataclasses import FrozenInstanceError

    result = allocate(multi_case(table=False), "rss")
    for name, value in [("status", "failed"), ("message", ""), ("total_cost", 0.0),
                        ("lower_bound", 1.0), ("unrounded", None), ("grades", {})]:
        with pytest.raises(FrozenInstanceError):
            setattr(result, name, value)
    with pytest.raises(FrozenInstanceError):
        del result.processes
    with pytest.raises(TypeError):
        result.processes["c0"] = "other"
    with pytest.raises(TypeError):
        result.held["c0"] = 0.1
    with pytest.raises(AttributeError):
        result.requirements.append(None)
    copy = result.allocated_array()
    copy[:] = 0.0
    assert result.allocated_array()[0] > 0.0
    # the views are copies: changing one leaves the allocation as it was
    view = result.tolerances
    view.iloc[0] = 0.0
    assert result.tolerances.iloc[0] > 0.0
    assert json.loads(json.dumps(result.to_dict()))["held"] == {}


def test_requirement_leaving_exactly_the_tightest_tolerances_is_solved():
    # room ±0.03 = held 0.015 + tightest 0.005 + 0.01: the only feasible point is at the
    # tightest limits (up to the round-off of 40 − 25 − 12.7); λ of the dual is unbounded
    # (regression: exp(log λ) overflowed instead of returning the tightest tolerances)
    people = [
        Contributor(name="body", nominal=40.0, tolerance=0.015, fixed=True),
        contributor("hub", nominal=25.0, limits=(0.005, 0.08), cost=CostCurve("reciprocal", a=1.2, b=0.02)),
        contributor("plate", nominal=12.7, limits=(0.01, 0.1), cost=CostCurve("reciprocal", a=0.8, b=0.01)),
    ]
    case = make_case(people, [chain_requirement("gap", {"body": 1, "hub": -1, "plate": -1}, lower=2.27, upper=2.33)])
    result = allocate(case, "worst-case")
    assert result.status == "optimal", result.message
    assert result.tolerances["hub"] == pytest.approx(0.005, rel=1e-9)
    assert result.tolerances["plate"] == pytest.approx(0.01, rel=1e-9)
    assert result.total_cost == pytest.approx(1.2 + 0.02 / 0.005 + 0.8 + 0.01 / 0.01, rel=1e-9)


def test_mean_shift_newton_re_solves_match_the_conic_path():
    # one requirement under mean shift, one solver re-solved with other upper limits (as a
    # frontier does, each solve starting from the last one's prices), in an order that
    # jumps: every point against the compiled conic problem (cvxpy/Clarabel)
    from dataclasses import replace

    from allocator.solve.exact import MeanShiftExact
    from helpers import Reference

    shifted = multi_case(mean_shift=0.2, table=False)
    case = make_case(shifted.contributors, shifted.requirements[:1], models=("mean-shift",))
    problem = prepare(case, "mean-shift")
    solver, conic = MeanShiftExact(problem), CompiledAllocation.from_problem(problem)
    req = case.requirements[0]
    ref = Reference(case, "mean-shift")
    for scale in (1.0, 0.8, 1.3, 0.85, 2.0, 0.95):
        upper = ref.y0[0] + (req.upper - ref.y0[0]) * scale
        overrides = {req.name: {"upper": upper}}
        result, expected = solver.solve(overrides), conic.solve(overrides)
        assert expected.success, expected.message
        assert result.status == "optimal", result.message
        assert result.gap <= 1e-8
        assert result.total_cost == pytest.approx(expected.total_cost, rel=1e-7)
        moved = make_case(case.contributors, (replace(req, upper=upper),), models=("mean-shift",))
        assert Reference(moved, "mean-shift").feasible(result.allocated_array(), rtol=1e-6)[0]


@pytest.mark.parametrize("mean, lower, upper, ppm", [(0.1, -1.0, 1.0, 1000.0), (0.0, None, 2.0, 100.0),
                                                     (0.5, -0.2, None, 10.0), (0.6, 0.0, 1.0, 2700.0),
                                                     (0.0, -1.0, 1.0, 100.0)])
def test_sigma_limit_curvature_against_scipy(mean, lower, upper, ppm):
    # σ_max(μ) from scipy alone (brentq on scipy.stats.norm's two tails), its second
    # derivative by a five-point difference with Richardson's step halving, against the
    # closed form the mean-shift Newton uses (allowance_with_curvature)
    from allocator.solve.problem import sigma_limit_curvature

    p = ppm * 1e-6

    def sigma_max(mu):
        tails = lambda s: ((stats.norm.cdf(lower, mu, s) if lower is not None else 0.0)  # noqa: E731
                           + (stats.norm.sf(upper, mu, s) if upper is not None else 0.0) - p)
        return optimize.brentq(tails, 1e-6, 10.0, xtol=1e-15, rtol=4 * np.finfo(float).eps)

    def second(h):
        f = [sigma_max(mean + k * h) for k in (-2, -1, 0, 1, 2)]
        return (-f[0] + 16 * f[1] - 30 * f[2] + 16 * f[3] - f[4]) / (12 * h * h)

    reference = (16 * second(5e-4) - second(1e-3)) / 15
    lim = RequirementLimits(lower, upper, ppm)
    got = sigma_limit_curvature(mean, stack.sigma_limit(mean, p, lower, upper), lim)
    if lower is None or upper is None:  # one limit: σ_max = distance / z is linear in μ
        assert abs(got) <= 1e-9 and abs(reference) <= 1e-6
    else:
        assert abs(reference) > 1e-3  # a curvature worth checking
        assert got == pytest.approx(reference, rel=1e-4)
    assert sigma_limit_curvature(mean, 0.0, lim) is None


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
def test_compiled_re_solves_with_other_limits_equal_fresh_compiles(model):
    # A compiled (conic) allocation re-solved with other limits starts with the solver
    # settings that gave its last verified optimum; every re-solve must still be what a
    # freshly compiled problem gives at those limits (cost to 1e-9, both verified).
    rng = np.random.default_rng(8)
    parts = [contributor(f"p{i}", tolerance=0.05, mean_shift=0.1 if i % 2 else 0.0,
                         cost=CostCurve("reciprocal", a=float(rng.uniform(0.5, 2)), b=float(rng.uniform(0.01, 0.05))))
             for i in range(8)]
    chains = [{f"p{i}": float(rng.choice([-1.0, 1.0])) for i in range(8) if (i + k) % 3} for k in range(3)]
    nominals = [sum(10.0 * a for a in chain.values()) for chain in chains]  # every nominal is 10
    reqs = [chain_requirement(f"r{k}", chain, lower=y - 0.25, upper=y + 0.25, fallout_ppm=100.0)
            for k, (chain, y) in enumerate(zip(chains, nominals))]
    case = make_case(parts, reqs, models=(model,))
    compiled = CompiledAllocation(case, model)
    for upper_room in (0.25, 0.2, 0.3, 0.22):
        overrides = {r.name: {"upper": y + upper_room} for r, y in zip(reqs, nominals)}
        again = compiled.solve(overrides)
        fresh = CompiledAllocation(case, model).solve(overrides)
        assert again.status == fresh.status == "optimal", (again.message, fresh.message)
        assert again.total_cost == pytest.approx(fresh.total_cost, rel=1e-9)
