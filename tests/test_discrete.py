"""Process selection, choose tables and rounding (allocator.solve.discrete).

Every expectation comes from outside the solver: exact enumeration (itertools / numpy),
the continuous solver run once per process combination, scipy.stats / scipy.optimize for
the normal tails, and the ISO 286-1 table in allocator.grades. All cases are invented.
"""

from __future__ import annotations

import itertools
import json
import sys
from dataclasses import replace

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import optimize, stats

from allocator import grades
from allocator.errors import CaseError, UsageError
from allocator.model import (
    AllocationSettings,
    Case,
    Contributor,
    CostCurve,
    Process,
    Requirement,
    sigma_factor,
)
from allocator.solve import allocate
from allocator.solve.discrete import DiscreteAllocation, needs_discrete
from helpers import body_hub_plate_case

CASES = __import__("pathlib").Path(__file__).resolve().parents[1] / "cases"


def _choose(points, prices):
    return CostCurve("table", points_tolerance=tuple(points), points_cost=tuple(prices), between="choose")


def _case(contributors, requirements, models=("worst-case",), rounding=None, units="mm"):
    return Case(title="invented test case", contributors=tuple(contributors),
                requirements=tuple(requirements), units=units,
                allocation=AllocationSettings(models=tuple(models), rounding=rounding))


def _process_case(mean_shift=0.0):
    return body_hub_plate_case(("worst-case", "rss", "mean-shift"), lower=2.2, upper=2.4,
                               mean_shift=mean_shift, plate="triangular")

def _with_processes(case, chosen):
    """The case with each contributor restricted to the named process."""
    out = []
    for c in case.contributors:
        if c.name not in chosen:
            out.append(c)
            continue
        p = next(p for p in c.processes if p.name == chosen[c.name])
        out.append(replace(c, processes=(), limits=p.limits, cost=p.cost,
                           cp=p.cp if p.cp is not None else c.cp))
    return replace(case, contributors=tuple(out))


# --------------------------------------------------------------------------- g concave


def _sigma_max_reference(mu, p, lower=-1.0, upper=1.0):
    """Largest σ with Φ((L−μ)/σ) + Φ((μ−U)/σ) = p, by brentq on scipy.stats.norm."""
    f = lambda s: stats.norm.cdf((lower - mu) / s) + stats.norm.sf((upper - mu) / s) - p  # noqa: E731
    near = min(mu - lower, upper - mu)
    return optimize.brentq(f, near / stats.norm.isf(p / 2) * 0.999, near / stats.norm.isf(p) * 1.001,
                           xtol=1e-15, rtol=1e-14)


@pytest.mark.parametrize("p", [1e-9, 1e-6, 1e-4, 2.7e-3, 0.05, 0.3, 0.49])
def test_sigma_limit_is_concave_in_the_mean(p):
    # The tangent cuts of the mean-shift MILP need g(δ) = min(σmax(ȳ−δ), σmax(ȳ+δ)) to be
    # concave; a minimum of concave functions is concave, so check σmax(μ) itself with an
    # independent root (scipy.stats.norm + brentq) on limits [−1, 1] (any limits scale to these).
    mu = np.linspace(-0.99, 0.99, 199)
    s = np.array([_sigma_max_reference(m, p) for m in mu])
    second = s[2:] - 2 * s[1:-1] + s[:-2]
    assert np.all(second <= 1e-12 * s.max())


# --------------------------------------------------------------------------- choose tables


def _choose_case(size, options, model, seed):
    rng = np.random.default_rng(seed)
    contributors = []
    for i in range(size):
        points = np.sort(rng.uniform(0.005, 0.06, options))
        prices = np.sort(rng.uniform(0.5, 5.0, options))[::-1]
        contributors.append(Contributor(name=f"x{i}", nominal=10.0, tolerance=float(points[-1]),
                                        limits=(points[0], points[-1]), cost=_choose(points, prices),
                                        cp=float(rng.choice([1.0, 1.33]))))
    coeffs = {c.name: float(rng.choice([1.0, -1.0, 2.0])) for c in contributors}
    a = np.abs(list(coeffs.values()))
    mid = np.array([np.median(c.cost.points_tolerance) for c in contributors])
    half = float(a @ mid) if model == "worst-case" else 4.0 * float(np.sqrt(np.sum((a * mid / 3) ** 2)))
    nominal = 10.0 * sum(coeffs.values())
    req = Requirement(name="gap", chain=coeffs, lower=nominal - half, upper=nominal + half, fallout_ppm=63)
    return _case(contributors, [req], models=(model,))


@pytest.mark.parametrize("model", ["worst-case", "rss"])
def test_seven_by_six_choose_tables_match_enumeration(model):
    # a smaller size of the benchmark's 30 x 6 case: 6^7 = 279936 combinations, all checked
    case = _choose_case(7, 6, model, seed=11)
    t = np.array([c.cost.points_tolerance for c in case.contributors])  # 7 x 6
    price = np.array([c.cost.points_cost for c in case.contributors])
    f = np.array([sigma_factor("normal", c.cp) for c in case.contributors])
    req = case.requirements[0]
    a = np.array([req.chain[c.name] for c in case.contributors])
    idx = np.array(list(itertools.product(range(6), repeat=7)))
    rows = np.arange(7)
    tt = t[rows, idx]
    cost = price[rows, idx].sum(axis=1)
    nominal = 10.0 * a.sum()
    if model == "worst-case":
        w = (np.abs(a) * tt).sum(axis=1)
        ok = (nominal - w >= req.lower) & (nominal + w <= req.upper)
    else:
        sigma = np.sqrt(((a * f * tt) ** 2).sum(axis=1))
        fallout = stats.norm.cdf(req.lower, nominal, sigma) + stats.norm.sf(req.upper, nominal, sigma)
        ok = fallout <= req.fallout_ppm * 1e-6
    assert ok.any() and not ok.all()
    result = DiscreteAllocation(case, model).solve()
    assert result.status == "optimal"
    assert result.gap == 0.0
    assert result.total_cost == pytest.approx(cost[ok].min(), rel=1e-9)


def _two_requirement_choose_case(model, seed):
    """Six parts with six listed options each under two chains: the mixed-integer program's case."""
    case = _choose_case(6, 6, model, seed=seed)
    (req,) = case.requirements
    names = list(req.chain)[:4]
    sub = {n: req.chain[n] for n in names}
    nominal = 10.0 * sum(sub.values())
    a = np.abs(list(sub.values()))
    mid = np.array([np.median(case.contributor(n).cost.points_tolerance) for n in names])
    half = 0.8 * (float(a @ mid) if model == "worst-case" else 4.0 * float(np.sqrt(np.sum((a * mid / 3) ** 2))))
    second = Requirement(name="inner", chain=sub, lower=nominal - half, upper=nominal + half, fallout_ppm=63)
    return _case(list(case.contributors), [req, second], models=(model,))


def _enumerated_least_cost(case, model):
    """Least cost over every combination of listed options (itertools.product), scipy.stats fallout."""
    parts = case.contributors
    t = np.array([c.cost.points_tolerance for c in parts])
    price = np.array([c.cost.points_cost for c in parts])
    f = np.array([sigma_factor("normal", c.cp) for c in parts])
    idx = np.array(list(itertools.product(range(t.shape[1]), repeat=len(parts))))
    rows = np.arange(len(parts))
    tt = t[rows, idx]
    ok = np.ones(len(idx), dtype=bool)
    for req in case.requirements:
        a = np.array([req.chain.get(c.name, 0.0) for c in parts])
        nominal = 10.0 * a.sum()
        if model == "worst-case":
            w = (np.abs(a) * tt).sum(axis=1)
            ok &= (nominal - w >= req.lower) & (nominal + w <= req.upper)
        else:
            sigma = np.sqrt(((a * f * tt) ** 2).sum(axis=1))
            ok &= stats.norm.cdf(req.lower, nominal, sigma) + stats.norm.sf(req.upper, nominal, sigma) \
                <= req.fallout_ppm * 1e-6
    assert ok.any() and not ok.all()
    return price[rows, idx].sum(axis=1)[ok].min()


@pytest.mark.parametrize("backend", ["highspy", "scipy", "highspy-moved"])
@pytest.mark.parametrize("model", ["worst-case", "rss"])
def test_the_mixed_integer_program_matches_enumeration_through_every_highs_route(model, backend, monkeypatch):
    # two requirements go to the MILP; HiGHS through highspy (installed with cvxpy), through
    # scipy.optimize.milp without it, and through scipy when highspy's interface has moved
    from allocator.solve import discrete

    if backend == "scipy":
        monkeypatch.setitem(sys.modules, "highspy", None)  # import highspy now fails
    if backend == "highspy-moved":
        import types

        monkeypatch.setitem(sys.modules, "highspy", types.SimpleNamespace())
        monkeypatch.setattr(discrete, "_HIGHSPY_USABLE", [True])
    calls = []
    real = discrete._run_milp
    monkeypatch.setattr(discrete, "_run_milp", lambda *a, **k: calls.append(1) or real(*a, **k))
    case = _two_requirement_choose_case(model, seed=5)
    result = DiscreteAllocation(case, model).solve()
    assert calls, "the case was meant to exercise the mixed-integer program"
    assert result.status == "optimal"
    assert result.total_cost == pytest.approx(_enumerated_least_cost(case, model), rel=1e-9)
    if backend == "highspy-moved":
        assert discrete._HIGHSPY_USABLE == []


def test_choose_table_with_a_dominated_entry_matches_enumeration():
    # x0 lists 0.04 at 2.5, dearer than 0.02 at 2.0: accepted by the loader, never worth taking
    x0 = Contributor(name="x0", nominal=10.0, tolerance=0.02, limits=(0.01, 0.04),
                     cost=_choose([0.01, 0.02, 0.04], [4.0, 2.0, 2.5]))
    x1 = Contributor(name="x1", nominal=6.0, tolerance=0.03, limits=(0.01, 0.05),
                     cost=_choose([0.01, 0.03, 0.05], [3.0, 1.5, 1.0]))
    req = Requirement(name="gap", chain={"x0": 1.0, "x1": -1.0}, lower=3.93, upper=4.07)
    case = _case([x0, x1], [req])
    result = allocate(case, "worst-case")
    # exact enumeration of the 3 x 3 choices (worst case: t0 + t1 <= 0.07)
    best = min(
        (c0 + c1, t0, t1)
        for (t0, c0), (t1, c1) in itertools.product(
            zip(x0.cost.points_tolerance, x0.cost.points_cost), zip(x1.cost.points_tolerance, x1.cost.points_cost)
        )
        if t0 + t1 <= 0.07 + 1e-12
    )
    assert best == (3.0, 0.02, 0.05)
    assert result.success and result.total_cost == pytest.approx(best[0], rel=1e-12)
    assert result.tolerances["x0"] == 0.02


def test_dispatch_and_shadow_prices_of_a_discrete_choice():
    case = _choose_case(4, 3, "rss", seed=3)
    assert needs_discrete(case)
    result = allocate(case, "rss")
    assert result.solver not in ("lagrange-dual", "lagrange-newton", "clarabel")  # a mixed-integer solve
    assert result.success and result.gap == 0.0
    # a discrete optimum has no derivative with respect to a limit: not reported as 0
    assert all(r.shadow_price is None for r in result.requirements)


# --------------------------------------------------------------------------- processes


@pytest.mark.parametrize("limits", [(2.2, 2.4), (2.25, 2.35)])  # loose: turning; tight: boring
@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
def test_process_choice_within_gap_of_enumerating_processes(model, limits):
    case = _process_case(mean_shift=0.3 if model == "mean-shift" else 0.0)
    lower, upper = limits
    case = replace(case, requirements=(replace(case.requirements[0], lower=lower, upper=upper),))
    result = DiscreteAllocation(case, model, gap_target=1e-4).solve()
    assert result.status == "optimal", result.message
    # independent check: every process combination solved by the continuous solver
    best, best_choice = np.inf, None
    names = {c.name: [p.name for p in c.processes] for c in case.contributors if c.processes}
    for combo in itertools.product(*names.values()):
        chosen = dict(zip(names, combo))
        alloc = allocate(_with_processes(case, chosen), model)
        if alloc.success and alloc.total_cost < best:
            best, best_choice = alloc.total_cost, chosen
    assert result.gap is not None and result.gap < 1e-3
    assert result.lower_bound <= best * (1 + 1e-9)
    assert result.total_cost >= best * (1 - 1e-7)
    assert (result.total_cost - best) / result.total_cost <= result.gap + 1e-8
    assert {k: result.processes[k] for k in best_choice} == best_choice


def test_gap_with_sixty_grid_points_and_no_refinement():
    # the documented figure: one lower-bound MILP on the 60-point grid, no refinement
    import allocator.solve.discrete as discrete

    case = _process_case()
    old = discrete.MAX_REFINE
    discrete.MAX_REFINE = 0
    try:
        result = DiscreteAllocation(case, "rss", gap_target=0.0).solve()
    finally:
        discrete.MAX_REFINE = old
    assert result.success
    assert 0.0 <= result.gap < 1e-3


# rss stays in the fast loop; the two slower models run in the whole suite
@pytest.mark.parametrize("model", [pytest.param("worst-case", marks=pytest.mark.slow), "rss",
                                   pytest.param("mean-shift", marks=pytest.mark.slow)])
def test_one_solver_re_solved_in_any_order_matches_fresh_solvers_and_enumeration(model):
    # A sweep re-solves one object: it starts from the last choice (an incumbent that may
    # not even be feasible after a tightening), a grid coarse away from the last optimum
    # and carried-over cuts. Each answer must equal a fresh solver's (1e-9) and lie within
    # its certified gap of the best process combination found by enumerating every
    # combination with the continuous solver.
    case = _process_case(mean_shift=0.3 if model == "mean-shift" else 0.0)
    names = {c.name: [p.name for p in c.processes] for c in case.contributors if c.processes}
    solver = DiscreteAllocation(case, model)
    # loose, tight, loose again, tighter, impossible, back to loose
    for lower, upper in [(2.2, 2.4), (2.25, 2.35), (2.2, 2.4), (2.27, 2.33), (2.299, 2.301), (2.22, 2.38)]:
        overrides = {"clearance": {"lower": lower, "upper": upper}}
        reused = solver.solve(overrides)
        fresh = DiscreteAllocation(case, model).solve(overrides)
        assert reused.status == fresh.status, (lower, upper, reused.message)
        if fresh.status != "optimal":
            assert reused.total_cost is None
            continue
        assert reused.total_cost == pytest.approx(fresh.total_cost, rel=1e-9)
        assert reused.gap <= 1e-5
        limited = replace(case, requirements=(replace(case.requirements[0], lower=lower, upper=upper),))
        best = min(
            (a.total_cost for combo in itertools.product(*names.values())
             if (a := allocate(_with_processes(limited, dict(zip(names, combo))), model)).success),
            default=np.inf,
        )
        assert reused.lower_bound <= best * (1 + 1e-9)
        assert best * (1 - 1e-7) <= reused.total_cost <= best * (1 + reused.gap + 1e-8)


def _mixed_case(seed, model):
    """Invented, seeded: processes on formula curves and on a convex interpolated table, a
    choose table and a plain part (mean shifts 0-0.3 for mean shift); one two-sided
    requirement."""
    rng = np.random.default_rng(seed)

    def formula(scale):
        kind = rng.integers(3)
        if kind == 0:
            return CostCurve("reciprocal", a=scale * rng.uniform(0.5, 2), b=scale * rng.uniform(0.01, 0.05))
        if kind == 1:
            return CostCurve("reciprocal-power", a=scale * rng.uniform(0.5, 2),
                             b=scale * rng.uniform(1e-4, 1e-3), k=float(rng.choice([1.2, 1.5])))
        return CostCurve("exponential", a=scale * rng.uniform(0.5, 2), b=scale * rng.uniform(2, 6),
                         c=rng.uniform(30, 80))

    f = rng.uniform(0.8, 1.2)
    table = CostCurve("table", points_tolerance=(0.01, 0.02, 0.04, 0.08),  # slopes rise: convex
                      points_cost=tuple(f * np.array([3.0, 1.8, 1.1, 0.8])))
    parts = [
        Contributor(name="bore", nominal=40.0, tolerance=0.03, processes=(
            Process("turning", (0.02, 0.1), formula(1.0)),
            Process("grinding", (0.004, 0.03), formula(2.5), cp=1.33))),
        Contributor(name="hub", nominal=25.0, tolerance=0.02, processes=(
            Process("bought", (0.01, 0.08), table),
            Process("machined", (0.005, 0.06), formula(1.5), cp=float(rng.choice([1.0, 1.2]))))),
        Contributor(name="pin", nominal=5.0, tolerance=0.02, limits=(0.005, 0.05),
                    cost=_choose([0.005, 0.02, 0.05], list(np.sort(rng.uniform(0.2, 3.0, 3))[::-1]))),
        Contributor(name="plate", nominal=12.7, tolerance=0.03, limits=(0.01, 0.1),
                    distribution=str(rng.choice(["normal", "uniform"])), cost=formula(0.5)),
    ]
    if model == "mean-shift":
        parts = [replace(c, mean_shift=float(rng.uniform(0.0, 0.3))) for c in parts]
    chain = {"bore": 1.0, "hub": -1.0, "pin": float(rng.choice([-1.0, 2.0])), "plate": -1.0}
    nominal = sum(chain[c.name] * c.nominal for c in parts)
    half = rng.uniform(0.06, 0.12) if model == "worst-case" else rng.uniform(0.03, 0.07)
    req = Requirement(name="gap", chain=chain, lower=nominal - half * rng.uniform(1.0, 1.5),
                      upper=nominal + half, fallout_ppm=float(rng.choice([100, 2700])))
    return _case(parts, [req], models=(model,))


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
def test_lower_bound_never_above_enumerated_optimum_with_tables_and_points(model, seed):
    # Whatever proves the bound (the Lagrangian dual for one requirement, the cell MILP),
    # it must lie at or below the optimum found by enumerating every process and listed
    # value, each combination solved by the continuous solver, and the answer must lie
    # within its certified gap of that optimum.
    case = _mixed_case(seed, model)
    result = DiscreteAllocation(case, model).solve()
    processes = {c.name: [p.name for p in c.processes] for c in case.contributors if c.processes}
    listed = list(case.contributor("pin").cost.points_tolerance)
    best = np.inf
    for combo in itertools.product(*processes.values()):
        for pin in listed:
            alloc = allocate(_with_processes(case, dict(zip(processes, combo))), model, fix={"pin": pin})
            if alloc.success:
                best = min(best, alloc.total_cost)
    if not np.isfinite(best):
        assert result.status == "infeasible"
        return
    assert result.status == "optimal", result.message
    assert result.gap <= 1e-5
    assert result.lower_bound <= best * (1 + 1e-9)
    assert best * (1 - 1e-7) <= result.total_cost <= best * (1 + result.gap + 1e-8)


def test_held_contributor_with_processes_still_chooses_its_process():
    # the same tolerance made by a cheap process (cp 1) or a dearer one (cp 2): only the
    # capable one meets the rss target, so the choice matters although t is held
    shaft = Contributor(
        name="shaft", nominal=20.0, tolerance=0.03, fixed=True,
        processes=(Process("lathe", (0.01, 0.05), CostCurve("reciprocal", a=1.0, b=0.01)),
                   Process("grinder", (0.005, 0.04), CostCurve("reciprocal", a=3.0, b=0.01), cp=2.0)),
    )
    sleeve = Contributor(name="sleeve", nominal=10.0, tolerance=0.02, limits=(0.005, 0.05),
                         cost=_choose([0.005, 0.02, 0.05], [4.0, 2.0, 1.0]))
    # σ_y with grinder and sleeve at 0.02: sqrt((0.03/6)² + (0.02/3)²) = 0.00833 [mm];
    # with the lathe: sqrt(0.01² + 0.00667²) = 0.0120 -> limits at 3.29 σ (1000 ppm) of 0.01
    req = Requirement(name="gap", chain={"shaft": 1, "sleeve": -1}, lower=9.967, upper=10.033,
                      fallout_ppm=1000)
    result = DiscreteAllocation(_case([shaft, sleeve], [req], models=("rss",)), "rss").solve()
    assert result.success, result.message
    assert result.processes["shaft"] == "grinder"
    assert result.tolerances["shaft"] == 0.03


# --------------------------------------------------------------------------- mean shift, δ fixed


def _sigma_factor_reference(distribution, cp):
    """σ / t written out: ±t = ±3·cp·σ (normal), σ² = t²/6 (symmetric triangle on ±t)."""
    return 1.0 / (3.0 * cp) if distribution == "normal" else 1.0 / np.sqrt(6.0)


def _enumerate(case, model):
    """Cheapest combination of options meeting every requirement, by itertools.product.

    Fallout with scipy.stats.norm at the worst end of the mean band ȳ ± δ,
    δ = Σ n|a|·mean_shift·t (δ = 0 under rss); returns (cost, {name: (process, t)}, second
    cheapest feasible cost).
    """
    options = []
    for c in case.contributors:
        rows = []
        for p in c.options():
            f = _sigma_factor_reference(c.distribution, p.cp if p.cp is not None else c.cp)
            if c.fixed:
                rows.append((p.name, c.tolerance, f, 0.0))
                continue
            for t, price in zip(p.cost.points_tolerance, p.cost.points_cost):
                rows.append((p.name, t, f, price))
        options.append(rows)
    n = np.array([c.count for c in case.contributors], dtype=float)
    m = np.array([c.mean_shift for c in case.contributors]) if model == "mean-shift" else 0.0
    found = []
    for combo in itertools.product(*options):
        t = np.array([o[1] for o in combo])
        f = np.array([o[2] for o in combo])
        ok = True
        for req in case.requirements:
            a = np.array([req.chain.get(c.name, 0.0) for c in case.contributors])
            nominal = sum(a_i * n_i * c.nominal for a_i, n_i, c in zip(a, n, case.contributors))
            sigma = np.sqrt(np.sum(n * (a * f * t) ** 2))
            delta = np.sum(n * np.abs(a) * m * t)
            fallout = max(stats.norm.cdf(req.lower, mu, sigma) + stats.norm.sf(req.upper, mu, sigma)
                          for mu in (nominal - delta, nominal + delta))
            ok &= fallout <= req.fallout_ppm * 1e-6
        if ok:
            found.append((float(n @ [o[3] for o in combo]), {c.name: o[:2] for c, o in zip(case.contributors, combo)}))
    found.sort(key=lambda x: x[0])
    return found[0][0], found[0][1], found[1][0]


def _shifted_case(mean_shifts=None, held_shift=None):
    """Invented: choose tables and a part made by one of two processes, no mean shifts
    unless given; with ``held_shift`` a second requirement over parts without a free
    mean-shift contributor (one held part with that mean shift)."""
    ms = mean_shifts or {}
    contributors = [
        Contributor(name="a", nominal=10.0, tolerance=0.02, limits=(0.01, 0.04), mean_shift=ms.get("a", 0.0),
                    cost=_choose([0.01, 0.02, 0.04], [3.0, 1.6, 1.0])),
        Contributor(name="b", nominal=4.0, tolerance=0.015, limits=(0.005, 0.03), distribution="triangular",
                    mean_shift=ms.get("b", 0.0), cost=_choose([0.005, 0.015, 0.03], [4.0, 2.0, 1.2])),
        Contributor(name="c", nominal=3.0, tolerance=0.02, processes=(
            Process("mill", (0.02, 0.05), _choose([0.02, 0.05], [1.5, 0.8]), cp=0.8),
            Process("grind", (0.005, 0.01), _choose([0.005, 0.01], [3.5, 2.5]), cp=1.67),
        )),
        Contributor(name="d", nominal=1.0, tolerance=0.03, limits=(0.01, 0.03), count=2, cp=1.33,
                    cost=_choose([0.01, 0.03], [1.0, 0.4])),
    ]
    # y = a − b + 2c − 2·d (d twice) = 10 − 4 + 6 − 2 = 10
    requirements = [Requirement(name="gap", chain={"a": 1, "b": -1, "c": 2, "d": -1},
                                lower=9.94, upper=10.06, fallout_ppm=100)]
    if held_shift is not None:
        contributors.append(Contributor(name="e", nominal=5.0, tolerance=0.01, fixed=True,
                                        mean_shift=held_shift))
        # y = c + e = 3 + 5 = 8; its only mean shift is the held part's
        requirements.append(Requirement(name="stack", chain={"c": 1, "e": 1},
                                        lower=7.9835, upper=8.0165, fallout_ppm=1000))
    return _case(contributors, requirements, models=("rss", "mean-shift"))


def test_mean_shift_without_mean_shifts_equals_rss_and_enumeration():
    # with every mean shift 0 the band ȳ ± δ is ȳ: mean shift is rss (CASE-FORMAT "The models")
    case = _shifted_case()
    expected, choice, runner_up = _enumerate(case, "rss")
    assert runner_up > expected * (1 + 1e-6)  # one optimum: the choices are comparable
    results = {model: DiscreteAllocation(case, model).solve() for model in ("rss", "mean-shift")}
    for model, result in results.items():
        assert result.status == "optimal", (model, result.message)
        assert result.total_cost == pytest.approx(expected, rel=1e-9)
        assert {k: (result.processes[k], result.tolerances[k]) for k in choice} == choice
    assert results["mean-shift"].total_cost == pytest.approx(results["rss"].total_cost, rel=1e-9)


@pytest.mark.parametrize("held_shift", [0.0, 0.5])
def test_mean_shift_with_one_requirement_without_free_mean_shifts(held_shift):
    # "gap" has mean-shift contributors; "stack" has none that is free (δ = 0, or the
    # held part's constant n|a|·m·t): each against enumeration of the true fallout
    case = _shifted_case({"a": 0.3, "b": 0.2}, held_shift=held_shift)
    expected, choice, _ = _enumerate(case, "mean-shift")
    result = DiscreteAllocation(case, "mean-shift").solve()
    assert result.status == "optimal", result.message
    assert result.total_cost == pytest.approx(expected, rel=1e-9)
    assert {k: (result.processes[k], result.tolerances[k]) for k in choice} == choice


@pytest.mark.parametrize("name", ["divider_output.toml", "pump_shim.toml"])
def test_demos_without_mean_shifts_allocate_under_mean_shift_as_under_rss(name):
    from allocator.case import load_case

    case = load_case(CASES / name)
    assert not case.mean_shifts.any()
    shifted = allocate(case, "mean-shift")
    plain = allocate(case, "rss")
    assert shifted.status == "optimal", shifted.message
    assert shifted.total_cost == pytest.approx(plain.total_cost, rel=1e-9)
    assert shifted.processes == plain.processes


# --------------------------------------------------------------------------- held at T


def _held_case(lower, upper, *, mean_shift=0.0, fixed_at=None, hub_cast=True):
    """Invented: a bore turned, bored or ground (turning listed first, cheapest at ±0.025
    but cp 1; boring dearer there but cp 2; grinding cannot make ±0.025), a hub cast or
    machined (``hub_cast=False``: machined only) and a plate. ``fixed_at``: the bore is
    ``fixed = true`` at that tolerance."""
    body = Contributor(
        name="body", nominal=40.0, tolerance=fixed_at or 0.03, fixed=fixed_at is not None,
        mean_shift=mean_shift,
        processes=(
            Process("turning", (0.02, 0.10), CostCurve("reciprocal", a=3.0, b=0.05)),
            Process("boring", (0.008, 0.03), CostCurve("reciprocal", a=4.5, b=0.02), cp=2.0),
            Process("grinding", (0.002, 0.01), CostCurve("reciprocal", a=9.0, b=0.02), cp=1.33),
        ),
    )
    hub = Contributor(
        name="hub", nominal=25.0, tolerance=0.05, mean_shift=mean_shift,
        processes=(
            Process("cast", (0.03, 0.12), CostCurve("reciprocal", a=0.8, b=0.04)),
            Process("machined", (0.005, 0.08), CostCurve("reciprocal", a=1.2, b=0.02), cp=1.33),
        )[0 if hub_cast else 1:],
    )
    plate = Contributor(name="plate", nominal=12.7, tolerance=0.03, limits=(0.01, 0.1),
                        distribution="triangular", mean_shift=mean_shift,
                        cost=CostCurve("reciprocal", a=0.8, b=0.01))
    req = Requirement(name="clearance", chain={"body": 1, "hub": -1, "plate": -1},
                      lower=lower, upper=upper, fallout_ppm=100)
    return _case([body, hub, plate], [req], models=("worst-case", "rss", "mean-shift"))


def _sigma_over_t(c, process):
    """σ/t from the contract: normal t/(3·cp), uniform t/√3, triangular t/√6."""
    if c.distribution == "uniform":
        return 1 / np.sqrt(3)
    if c.distribution == "triangular":
        return 1 / np.sqrt(6)
    cp = process.cp if process is not None and process.cp is not None else c.cp
    return 1 / (3 * cp)


def _lagrange_reciprocal(n, w, power, a, b, lo, hi, budget):
    """min Σ n (a + b/t) s.t. Σ n w t^power ≤ budget, lo ≤ t ≤ hi.

    Closed form per multiplier λ (Chase, Greenwood, Loosli & Hauglund 1990, Least cost
    tolerance allocation for mechanical assemblies with automated process selection):
    n b / t² = λ n w power t^(power−1) gives t = (b / (λ w power))^(1/(power+1)), clipped to
    the limits; λ by brentq on the budget.
    """
    cost = lambda t: float(np.sum(n * (a + b / t)))  # noqa: E731
    if budget <= 0 or np.sum(n * w * lo**power) > budget * (1 + 1e-12):
        return np.inf
    if np.sum(n * w * hi**power) <= budget:
        return cost(hi)
    t_of = lambda L: np.clip((b / (np.exp(L) * w * power)) ** (1 / (power + 1)), lo, hi)  # noqa: E731
    L = optimize.brentq(lambda L: np.sum(n * w * t_of(L) ** power) - budget, -200, 200, xtol=1e-14)
    return cost(t_of(L))


def _continuous_reference(model, free, held, nominal, lower, upper, p):
    """Least cost of the free (reciprocal) parts with the held ones as constants.

    Worst case and rss by the closed-form Lagrange optimum above (σ_max of the two-sided
    normal fallout by brentq on scipy.stats.norm); mean shift by scipy.optimize.minimize
    (SLSQP, several starts) on the true constraint: the fallout at the worse end of ȳ ± δ.
    """
    col = lambda rows, k: np.array([r[k] for r in rows], dtype=float)  # noqa: E731
    n, a, f, m = (col(free, k) for k in ("n", "a", "f", "m"))
    ca, cb, lo, hi = (col(free, k) for k in ("ca", "cb", "lo", "hi"))
    hn, ha, hf, hm, ht = (col(held, k) for k in ("n", "a", "f", "m", "t"))
    held_cost = float(np.sum(hn * col(held, "cost")))
    if model == "worst-case":
        room = min(nominal - lower, upper - nominal) - float(np.sum(hn * np.abs(ha) * ht))
        return held_cost + _lagrange_reciprocal(n, np.abs(a), 1, ca, cb, lo, hi, room)
    if model == "rss":
        sigma = _sigma_max_reference(nominal, p, lower, upper)
        budget = sigma**2 - float(np.sum(hn * (ha * hf * ht) ** 2))
        return held_cost + _lagrange_reciprocal(n, (a * f) ** 2, 2, ca, cb, lo, hi, budget)

    def worst(t):
        sigma = np.sqrt(np.sum(n * (a * f * t) ** 2) + np.sum(hn * (ha * hf * ht) ** 2))
        delta = np.sum(n * np.abs(a) * m * t) + np.sum(hn * np.abs(ha) * hm * ht)
        return max(stats.norm.cdf(lower, mu, sigma) + stats.norm.sf(upper, mu, sigma)
                   for mu in (nominal - delta, nominal + delta))

    cost = lambda x: float(np.sum(n * (ca + cb / np.exp(x))))  # noqa: E731
    rule = {"type": "ineq", "fun": lambda x: np.log(p) - np.log(max(worst(np.exp(x)), 1e-300))}
    rng = np.random.default_rng(0)
    best = np.inf
    for x0 in [np.log(lo)] + [rng.uniform(np.log(lo), np.log(hi)) for _ in range(5)]:
        out = optimize.minimize(cost, x0, method="SLSQP", bounds=list(zip(np.log(lo), np.log(hi))),
                                constraints=[rule], options={"ftol": 1e-14, "maxiter": 500})
        x = np.clip(out.x, np.log(lo), np.log(hi))
        if worst(np.exp(x)) <= p * (1 + 1e-7):
            best = min(best, cost(x))
    return held_cost + best


def _enumerate_processes(case, model, held_at):
    """Cheapest combination over every process of every free and held contributor
    (itertools.product), the tolerances of each combination solved independently.

    A held contributor at ``T`` with a process whose range does not hold ``T`` is not a
    combination. Returns (least cost, {contributor: process}).
    """
    req = case.requirements[0]
    nominal = sum(k * case.contributor(name).count * case.contributor(name).nominal
                  for name, k in req.chain.items())
    best = (np.inf, None)
    for combo in itertools.product(*[c.processes or (None,) for c in case.contributors]):
        free, held = [], []
        for c, p in zip(case.contributors, combo):
            limits, curve = (p.limits, p.cost) if p is not None else (c.limits, c.cost)
            row = dict(n=c.count, a=req.chain.get(c.name, 0.0), f=_sigma_over_t(c, p), m=c.mean_shift)
            if c.name in held_at:
                t = held_at[c.name]
                if not limits[0] <= t <= limits[1]:
                    break
                held.append(dict(row, t=t, cost=curve.a + curve.b / t))
            else:
                assert curve.curve == "reciprocal"
                free.append(dict(row, ca=curve.a, cb=curve.b, lo=limits[0], hi=limits[1]))
        else:
            cost = _continuous_reference(model, free, held, nominal, req.lower, req.upper,
                                         req.fallout_ppm * 1e-6)
            if cost < best[0]:
                best = (cost, {c.name: p.name for c, p in zip(case.contributors, combo) if p})
    return best


@pytest.mark.parametrize("hold, hub_cast", [("fix", False), ("fixed", False), ("fix", True)],
                         ids=["fix", "fixed", "fix-hub-cast-or-machined"])
@pytest.mark.parametrize("model, limits, held", [
    ("worst-case", (2.2, 2.4), 0.025),  # turning or boring make ±0.025: cp plays no part
    ("worst-case", (2.2, 2.4), 0.015),  # only boring makes ±0.015 (turning is listed first)
    ("rss", (2.27, 2.33), 0.025),  # boring's cp 2 pays for its higher price
    ("mean-shift", (2.25, 2.35), 0.025),
])
def test_held_contributor_with_several_processes_matches_enumeration(model, limits, held, hold, hub_cast):
    # holding a tolerance does not choose the process: every process whose range holds it
    # can make it, at its own cost and cp (regression: with no other choice in the case,
    # the held bore was priced and its σ taken from the first process listed)
    shift = 0.3 if model == "mean-shift" else 0.0
    if hold == "fix":
        case = _held_case(*limits, mean_shift=shift, hub_cast=hub_cast)
        result = allocate(case, model, fix={"body": held})
    else:
        case = _held_case(*limits, mean_shift=shift, fixed_at=held, hub_cast=hub_cast)
        result = allocate(case, model)
    best, processes = _enumerate_processes(case, model, {"body": held})
    assert result.status == "optimal", result.message
    assert result.tolerances["body"] == held
    assert {k: result.processes[k] for k in processes} == processes
    gap = result.gap or 0.0
    assert result.total_cost == pytest.approx(best, rel=gap + 1e-8)
    assert result.total_cost >= best * (1 - 1e-8)


def test_frontier_with_a_fixed_part_several_processes_make_matches_enumeration():
    # the frontier holds the case's fixed parts like allocate does: the process of the
    # fixed bore (±0.025: turning or boring) is still chosen at every point
    from allocator.sweep import frontier

    case = _held_case(2.27, 2.33, fixed_at=0.025, hub_cast=False)
    values = [2.335, 2.36]
    sweep = frontier(case, requirement="clearance", vary="upper", values=values, models=["rss"])
    costs = [row["total_cost"] for row in sweep.rows()]
    for value, cost in zip(values, costs):
        moved = replace(case, requirements=(replace(case.requirements[0], upper=value),))
        best, _ = _enumerate_processes(moved, "rss", {"body": 0.025})
        assert cost == pytest.approx(best, rel=1e-6)


def test_held_bore_costs_what_its_process_charges():
    # the pump-clearance demo case held at ±0.015: only fine boring [0.008, 0.03] makes
    # it (turning [0.02, 0.1] is listed first); the unrounded optimum is the least cost of
    # all tolerances, so rounding can only cost (regression: it was priced by turning,
    # called optimal and reported a negative cost of rounding)
    from allocator.case import load_case

    case = load_case(CASES / "pump_shim.toml")
    plain = replace(case, allocation=replace(case.allocation, rounding=None))
    boring = case.contributor("body_depth").processes[1]
    assert boring.name == "fine boring"
    for model in ("worst-case", "rss"):
        rounded = allocate(case, model, fix={"body_depth": 0.015})
        unrounded = allocate(plain, model, fix={"body_depth": 0.015})
        assert rounded.success and unrounded.success
        for result in (rounded, unrounded):
            assert result.processes["body_depth"] == "fine boring"
            # Sutherland & Roth (1975) reciprocal-power curve a + b/t^k at t = 0.015
            assert result.unit_cost["body_depth"] == pytest.approx(
                boring.cost.a + boring.cost.b / 0.015**boring.cost.k, rel=1e-12)
        assert unrounded.total_cost <= rounded.total_cost * (1 + 1e-9)
        assert rounded.unrounded_cost == pytest.approx(unrounded.total_cost, rel=1e-7)
        assert rounded.rounding_cost >= -1e-9 * rounded.total_cost


def test_fixed_part_no_process_makes_is_taken_as_it_is():
    # contract: a fixed contributor needs neither limits nor cost (it then adds no cost);
    # limits and costs that do not reach its tolerance are not extrapolated
    part = Contributor(name="part", nominal=10.0, tolerance=0.05, fixed=True, processes=(
        Process("lathe", (0.01, 0.02), CostCurve("reciprocal", a=1.0, b=0.01)),
        Process("grinder", (0.002, 0.01), CostCurve("reciprocal", a=3.0, b=0.01), cp=2.0)))
    free = Contributor(name="free", nominal=5.0, tolerance=0.05, limits=(0.005, 0.2),
                       cost=CostCurve("reciprocal", a=0.2, b=0.002))
    req = Requirement(name="r", chain={"part": 1, "free": 1}, lower=14.85, upper=15.15, fallout_ppm=100)
    case = _case([part, free], [req], models=("worst-case", "rss"))
    # worst case: the free part takes the rest of ±0.15, cost 0.2 + 0.002/0.1
    wc = allocate(case, "worst-case")
    assert wc.success and wc.total_cost == pytest.approx(0.2 + 0.002 / 0.1, rel=1e-9)
    # rss with the part's own cp 1 (σ = 0.05/3): σ_free² = σ_max² − (0.05/3)²
    s_free = np.sqrt(_sigma_max_reference(15.0, 1e-4, 14.85, 15.15) ** 2 - (0.05 / 3) ** 2)
    rss = allocate(case, "rss")
    assert rss.success and rss.total_cost == pytest.approx(0.2 + 0.002 / (3 * s_free), rel=1e-7)
    # the same when rounding sends the case to the discrete solver (0.1 is a multiple)
    rounded = allocate(replace(case, allocation=AllocationSettings(models=("worst-case",), rounding=0.01)),
                       "worst-case")
    assert rounded.success and rounded.total_cost == pytest.approx(0.2 + 0.002 / 0.1, rel=1e-9)


def test_fix_on_a_choose_table_must_be_a_listed_tolerance():
    sleeve = Contributor(name="sleeve", nominal=10.0, tolerance=0.02, limits=(0.005, 0.05),
                         cost=_choose([0.005, 0.02, 0.05], [4.0, 2.0, 1.0]))
    other = Contributor(name="other", nominal=5.0, tolerance=0.05, limits=(0.005, 0.2),
                        cost=CostCurve("reciprocal", a=0.2, b=0.002))
    req = Requirement(name="r", chain={"sleeve": 1, "other": -1}, lower=4.85, upper=5.15)
    case = _case([sleeve, other], [req])
    with pytest.raises(UsageError, match=r"fix: sleeve: tolerance 0\.03 is not one of the listed "
                                         r"tolerances \(0\.005, 0\.02, 0\.05\)"):
        allocate(case, "worst-case", fix={"sleeve": 0.03})
    # a listed one is held at its listed price: 2.0 + the other part at the rest of ±0.15
    result = allocate(case, "worst-case", fix={"sleeve": 0.02})
    assert result.success and result.total_cost == pytest.approx(2.0 + 0.2 + 0.002 / 0.13, rel=1e-9)


# --------------------------------------------------------------------------- rounding


_SHIFTED_ONE_REQUIREMENT = """
from allocator.model import AllocationSettings, Case, Contributor, CostCurve, Requirement
parts = [Contributor(name=f"p{i}", nominal=10.0 + i, tolerance=0.05, limits=(0.004, 0.2),
                     mean_shift=0.2, cost=CostCurve("reciprocal-power", a=0.5 + 0.1 * i,
                                                    b=1e-4 * (i + 1), k=1.5))
         for i in range(4)]
req = Requirement(name="gap", chain={"p0": 1, "p1": 1, "p2": -1, "p3": -1},
                  lower=-4.15, upper=-3.85, fallout_ppm=500.0)
case = Case(title="invented test case", contributors=tuple(parts), requirements=(req,),
            units="mm", allocation=AllocationSettings(models=("mean-shift",), rounding=0.001))
"""


@pytest.mark.slow
def test_unrounded_optimum_beside_a_rounded_one_is_the_one_allocate_gives():
    # one rule picks the solver on every path (docs/allocation.md, "Solvers"): the
    # unrounded optimum reported beside a rounded allocation is allocate()'s answer for the
    # case without rounding, to round-off, and the polish and that unrounded optimum of one
    # mean-shift requirement need no conic solver: cvxpy is never imported (regression:
    # both took the conic solver, skipping the Newton method allocate() uses)
    import subprocess
    import sys

    code = _SHIFTED_ONE_REQUIREMENT + (
        "import sys\n"
        "from allocator.solve import allocate\n"
        "r = allocate(case, 'mean-shift')\n"
        "print(r.status, repr(r.total_cost), repr(r.unrounded_cost), 'cvxpy' in sys.modules)\n"
    )
    done = subprocess.run([sys.executable, "-c", code], cwd=CASES.parent, capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    status, total, unrounded_cost, conic = done.stdout.split()
    assert (status, conic) == ("optimal", "False")
    namespace = {}
    exec(_SHIFTED_ONE_REQUIREMENT, namespace)
    case = namespace["case"]
    plain = replace(case, allocation=replace(case.allocation, rounding=None))
    unrounded = allocate(plain, "mean-shift")
    assert unrounded.success and unrounded.gap <= 1e-8  # a certified optimum (dual bound)
    assert float(unrounded_cost) == pytest.approx(unrounded.total_cost, rel=1e-12, abs=0.0)
    # rounded tolerances are feasible choices of the same problem: never cheaper
    assert float(total) >= unrounded.total_cost * (1 - 1e-9)


def test_iso286_rounding_gives_standard_grades_and_costs_at_least_the_unrounded():
    sizes = {"flange": 12.0, "spacer": 25.0, "bearing": 19.0, "shoulder": 60.0}
    contributors = [
        Contributor(name=n, nominal=s, tolerance=0.05, limits=(0.004, 0.2),
                    cost=CostCurve("reciprocal", a=0.5, b=0.003))
        for n, s in sizes.items()
    ]
    req = Requirement(name="play", chain={"shoulder": 1, "flange": -1, "spacer": -1, "bearing": -1},
                      lower=3.9, upper=4.1, fallout_ppm=100)
    case = _case(contributors, [req], models=("worst-case", "rss"), rounding="iso286")
    for model in ("worst-case", "rss"):
        result = allocate(case, model)
        assert result.success, result.message
        for name, t in result.tolerances.items():
            # ISO 286-1 Table 1 (as typed in allocator.grades): t = IT/2
            grade = result.grades[name]
            assert t == pytest.approx(grades.it_tolerance_um(grade, sizes[name]) / 2000.0, rel=1e-12)
        assert result.total_cost >= result.unrounded_cost * (1 - 1e-9)
        assert result.rounding_cost == pytest.approx(result.total_cost - result.unrounded_cost)


def test_iso286_rounding_reads_the_size_in_the_contributors_own_units():
    # a 1.0 in sleeve in a mm case: its ISO 286 size is 25.4 mm (>18-30 mm row), not 1 mm
    sleeve = Contributor(name="sleeve", nominal=1.0, tolerance=0.002, limits=(0.0001, 0.004),
                         cost=CostCurve("reciprocal", a=0.5, b=0.0001), units="in")
    shaft = Contributor(name="shaft", nominal=25.0, tolerance=0.05, limits=(0.004, 0.2),
                        cost=CostCurve("reciprocal", a=0.5, b=0.003))
    req = Requirement(name="fit", expression="25.4 * sleeve - shaft", lower=0.3, upper=0.5)
    case = _case([sleeve, shaft], [req], rounding="iso286")
    result = allocate(case, "worst-case")
    assert result.success, result.message
    grade = result.grades["sleeve"]
    # ISO 286-1 Table 1 (as typed in allocator.grades, checked in tests/reference): t = IT/2
    it_inches = grades.it_tolerance_um(grade, 25.4) / 1000.0 / 25.4
    assert result.tolerances["sleeve"] == pytest.approx(it_inches / 2.0, rel=1e-9)
    assert result.tolerances["shaft"] == pytest.approx(grades.it_tolerance_um(result.grades["shaft"], 25.0) / 2000.0)


def test_iso286_rounding_refuses_a_contributor_labelled_in_a_non_length_unit():
    rate = Contributor(name="spring_rate", nominal=20.0, tolerance=1.0, limits=(0.2, 2.0),
                       cost=CostCurve("reciprocal", a=0.5, b=0.4), units="N/mm")
    req = Requirement(name="load", expression="spring_rate * 2.0", lower=34.0, upper=46.0)
    with pytest.raises(CaseError) as err:
        allocate(_case([rate], [req], rounding="iso286"), "worst-case")
    assert "contributor 'spring_rate': unknown length unit 'N/mm'" in str(err.value)


def test_rounding_with_no_value_inside_the_limits_names_the_contributor():
    c = Contributor(name="pin", nominal=5.0, tolerance=0.005, limits=(0.002, 0.008),
                    cost=CostCurve("reciprocal", a=0.1, b=0.001))
    req = Requirement(name="r", chain={"pin": 1}, upper=5.05)
    case = _case([c], [req], rounding=0.01)
    with pytest.raises(CaseError) as err:
        allocate(case, "worst-case")
    assert "contributor 'pin': no multiple of 0.01 within limits [0.002, 0.008]" in str(err.value)


def test_fixed_contributors_keep_their_tolerance_under_rounding():
    free = Contributor(name="free", nominal=10.0, tolerance=0.05, limits=(0.005, 0.1),
                       cost=CostCurve("reciprocal", a=0.2, b=0.002))
    held = Contributor(name="held", nominal=10.0, tolerance=0.0123, fixed=True)
    other = Contributor(name="other", nominal=5.0, tolerance=0.05, limits=(0.005, 0.1),
                        cost=CostCurve("reciprocal", a=0.2, b=0.004))
    req = Requirement(name="r", chain={"free": 1, "held": 1, "other": -1}, lower=14.93, upper=15.07)
    case = _case([free, held, other], [req], rounding=0.005)
    result = allocate(case, "worst-case", fix={"other": 0.0217})
    assert result.success
    assert result.tolerances["held"] == 0.0123
    assert result.tolerances["other"] == 0.0217
    assert result.tolerances["free"] == pytest.approx(0.035)  # 0.07 − 0.0123 − 0.0217 = 0.036 → 0.035


# --------------------------------------------------------------------------- infeasible


def test_infeasible_at_the_tightest_rounded_values_is_diagnosed():
    # continuous tightest 0.002 would meet ±0.006, but the tightest multiple of 0.005 is 0.005
    a = Contributor(name="a", nominal=1.0, tolerance=0.01, limits=(0.002, 0.03),
                    cost=CostCurve("reciprocal", a=0.1, b=0.001))
    b = Contributor(name="b", nominal=1.0, tolerance=0.01, limits=(0.002, 0.03),
                    cost=CostCurve("reciprocal", a=0.1, b=0.001))
    req = Requirement(name="r", chain={"a": 1, "b": 1}, lower=1.994, upper=2.006)
    case = _case([a, b], [req], rounding=0.005)
    assert allocate(replace(case, allocation=AllocationSettings(models=("worst-case",))),
                    "worst-case").success
    result = allocate(case, "worst-case")
    assert result.status == "infeasible"
    assert "requirement 'r'" in result.message and "tightest" in result.message


def test_milp_infeasible_although_each_tightest_option_alone_would_pass():
    # one part, two processes: grinding has the smaller σ (cp 2), turning the smaller mean
    # shift band; their best parts together (σ 0.00333, δ 0.005) would meet the one-sided
    # target but neither process does:
    # z = Φ⁻¹(1 − 1e-4) = 3.719; δ + zσ: grinding 0.01 + 0.0124, turning 0.005 + 0.0248
    part = Contributor(
        name="part", nominal=0.0, tolerance=0.02, mean_shift=0.5,
        processes=(Process("grinding", (0.02, 0.02), _choose([0.02, 0.03], [5.0, 4.0]), cp=2.0),
                   Process("turning", (0.01, 0.01), _choose([0.01, 0.03], [1.0, 0.5]), cp=0.5)),
    )
    req = Requirement(name="r", chain={"part": 1}, upper=0.018, fallout_ppm=100)
    case = _case([part], [req], models=("mean-shift",))
    result = allocate(case, "mean-shift")
    assert result.status == "infeasible"
    assert "HiGHS" in result.message


def test_mean_shift_target_of_half_or_more_is_refused():
    case = _choose_case(3, 2, "rss", seed=1)
    with pytest.raises(UsageError):
        DiscreteAllocation(case, "mean-shift").solve({"gap": {"fallout_ppm": 600000}})


# --------------------------------------------------------------------------- command line


def test_cli_shows_processes_and_rounding(tmp_path):
    from allocator.cli.main import cli

    runner = CliRunner()
    out = runner.invoke(cli, ["allocate", str(CASES / "pump_shim.toml"), "--model", "rss"])
    assert out.exit_code == 0, out.output
    assert "process" in out.output
    assert any(p in out.output for p in ("turning", "fine boring", "grinding"))
    assert "more than the unrounded optimum" in out.output
    out = runner.invoke(cli, ["allocate", str(CASES / "pump_shim.toml"), "--model", "rss", "--json"])
    assert out.exit_code == 0
    doc = json.loads(out.output)["results"][0]
    rows = {r["contributor"]: r for r in doc["contributors"]}
    assert rows["body_depth"]["process"] in ("turning", "fine boring", "grinding")
    assert doc["rounding"] == "multiples of 0.001"
    assert doc["rounding_cost"] == pytest.approx(doc["total_cost"] - doc["unrounded_cost"])
    for t in doc["tolerances"].values():
        assert abs(t / 0.001 - round(t / 0.001)) < 1e-9


def test_cli_exit_1_when_no_combination_meets_the_requirement(tmp_path):
    from allocator.cli.main import cli

    text = (CASES / "pump_shim.toml").read_text().replace("lower = 0.20", "lower = 0.297").replace(
        "upper = 0.40", "upper = 0.303")
    path = tmp_path / "tight.toml"
    path.write_text(text)
    (tmp_path / "shim_costs.csv").write_text((CASES / "shim_costs.csv").read_text())
    out = CliRunner().invoke(cli, ["allocate", str(path), "--model", "worst-case"])
    assert out.exit_code == 1
    assert "infeasible" in out.output


def test_mean_shift_polish_started_from_another_choice_prices_matches_a_fresh_solve():
    # The discrete solver starts the Newton of a new process choice's polish from the
    # latest polish's prices; the answer must be the fresh solver's (cost to 1e-9) and meet
    # the requirement by scipy.stats (the mean anywhere in y0 ± δ, normal parts σ = t/3).
    from allocator.solve import solver_for

    chain = {"a": 1.0, "b": -1.0, "c": 1.0}
    curves = {"a": CostCurve("reciprocal", a=1.0, b=0.05), "b": CostCurve("reciprocal", a=2.0, b=0.02),
              "c": CostCurve("exponential", a=0.5, b=3.0, c=40.0)}
    parts = [Contributor(name=n, nominal=10.0, tolerance=0.05, limits=(0.005, 0.2), cost=curves[n],
                         mean_shift=0.2) for n in chain]
    req = Requirement(name="gap", chain=chain, lower=10.0 - 0.12, upper=10.0 + 0.12, fallout_ppm=100)
    case = Case(title="invented", contributors=tuple(parts), requirements=(req,),
                allocation=AllocationSettings(models=("mean-shift",)))
    other = replace(case, contributors=tuple(replace(c, cost=CostCurve("reciprocal", a=3.0, b=0.01))
                                             for c in parts))
    donor = solver_for(other, "mean-shift")
    donor.solve()
    assert donor.prices is not None
    seeded, fresh = solver_for(case, "mean-shift"), solver_for(case, "mean-shift")
    seeded.start_from(donor.prices)
    for upper in (10.12, 10.1, 10.15):
        overrides = {"gap": {"upper": upper}}
        one, ref = seeded.solve(overrides), fresh.solve(overrides)
        assert one.status == ref.status == "optimal"
        assert one.total_cost == pytest.approx(ref.total_cost, rel=1e-9)
        t = one.allocated_array()
        sigma, delta = float(np.sqrt(np.sum((t / 3.0) ** 2))), 0.2 * float(np.sum(t))
        fallout = max(stats.norm.cdf(req.lower, 10.0 + s * delta, sigma)
                      + stats.norm.sf(upper, 10.0 + s * delta, sigma) for s in (-1.0, 1.0))
        assert fallout <= 100e-6 * (1 + 1e-6)


def test_mean_shift_solver_reused_along_a_sweep_matches_fresh_solves():
    # One solver through many limits (as a sweep's polisher): after two solves its Newton
    # starts on the line through the last two solves' prices. Each answer, in any order of
    # limits and over a fallout target too, must be a fresh solver's (cost to 1e-9) and
    # meet the requirement by scipy.stats (normal parts σ = t/3, the mean anywhere in y0 ± δ).
    from allocator.solve import solver_for

    chain = {"a": 1.0, "b": -1.0, "c": 1.0}
    curves = {"a": CostCurve("reciprocal", a=1.0, b=0.05), "b": CostCurve("reciprocal", a=2.0, b=0.02),
              "c": CostCurve("exponential", a=0.5, b=3.0, c=40.0)}
    parts = [Contributor(name=n, nominal=10.0, tolerance=0.05, limits=(0.005, 0.2), cost=curves[n],
                         mean_shift=(0.2, 0.0, 0.1)[i]) for i, n in enumerate(chain)]
    req = Requirement(name="gap", chain=chain, lower=10.0 - 0.12, upper=10.0 + 0.12, fallout_ppm=100)
    case = Case(title="invented", contributors=tuple(parts), requirements=(req,),
                allocation=AllocationSettings(models=("mean-shift",)))
    reused = solver_for(case, "mean-shift")
    sequence = [{"upper": u} for u in (10.10, 10.11, 10.12, 10.14, 10.13, 10.105, 10.2)]
    sequence += [{"fallout_ppm": p} for p in (10.0, 30.0, 100.0, 1000.0, 3.0)]
    for change in sequence:
        overrides = {"gap": change}
        one, ref = reused.solve(overrides), solver_for(case, "mean-shift").solve(overrides)
        assert one.status == ref.status == "optimal", (change, one.message)
        assert one.total_cost == pytest.approx(ref.total_cost, rel=1e-9), change
        t = one.allocated_array()
        upper = change.get("upper", req.upper)
        target = change.get("fallout_ppm", req.fallout_ppm) * 1e-6
        sigma = float(np.sqrt(np.sum((t / 3.0) ** 2)))
        delta = float(np.sum(np.array([0.2, 0.0, 0.1]) * t))
        fallout = max(stats.norm.cdf(req.lower, 10.0 + s * delta, sigma)
                      + stats.norm.sf(upper, 10.0 + s * delta, sigma) for s in (-1.0, 1.0))
        assert fallout <= target * (1 + 1e-6), change
