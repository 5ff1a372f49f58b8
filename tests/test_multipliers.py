"""Newton on the Lagrange multipliers of several separable requirements
(allocator.solve.multipliers), against independent solvers on invented cases:

- the compiled conic problem (cvxpy/Clarabel, allocator.solve.continuous);
- scipy.optimize.minimize (SLSQP) on the tests' own constraint math (tests/helpers.py
  ``Reference``: worst case Σ n|a|t, normal fallout by scipy.stats);
- weak duality: the certified lower bound lies below the cost of every feasible point
  SLSQP finds.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import optimize, stats

from allocator.model import CostCurve, Requirement
from allocator.solve import allocate, prepare
from allocator.solve.continuous import CompiledAllocation
from allocator.solve.multipliers import MultiplierNewton, applicable
from helpers import Reference, build_case, slsqp_in_log_t, unit_cost_slope


def formula_case(seed: int, model: str, size: int = 24, count: int = 6):
    """A random invented case (tests/helpers.build_case) with tables swapped for reciprocal
    curves of about the same level (the multiplier path takes formula costs)."""
    built = build_case(np.random.default_rng(seed), "rss" if model == "mean-shift" else model, size, count, None)
    people = []
    for c in built.case.contributors:
        if c.cost is not None and c.cost.curve == "table":
            lo, hi = c.limits
            level = float(np.mean(c.cost.points_cost))
            c = replace(c, cost=CostCurve("reciprocal", a=0.0, b=level * math.sqrt(lo * hi)))
        people.append(c)
    return replace(built.case, contributors=tuple(people))


def slsqp_cost(case, model: str, starts: int = 3, seed: int = 0) -> float | None:
    """Least cost SLSQP finds at a point the tests' own check calls feasible (None: none)."""
    ref = Reference(case, model)
    free = ~ref.fixed

    def grad(t):  # d cost / d log t of the free parts
        return np.array([ref.n[i] * unit_cost_slope(ref.curves[i], t[i]) for i in np.flatnonzero(free)]) * t[free]

    abs_a = np.abs(ref.a)
    if model == "worst-case":
        room = ref.room()

        def margin(t):
            return 1.0 - (t * ref.n) @ abs_a.T / room

        def margin_jac(t):
            return -(abs_a * ref.n / room[:, None])[:, free] * t[free]
    else:
        # the largest σ each requirement allows (two-sided normal fallout, scipy.stats)
        sigma_max = []
        for r in range(len(ref.y0)):
            low, up = ref.lower[r], ref.upper[r]

            def excess(s, r=r, low=low, up=up):
                out = -ref.p[r]
                if low is not None:
                    out += stats.norm.cdf((low - ref.y0[r]) / s)
                if up is not None:
                    out += stats.norm.sf((up - ref.y0[r]) / s)
                return out

            near = min(abs(x - ref.y0[r]) for x in (low, up) if x is not None)
            sigma_max.append(optimize.brentq(excess, near * 1e-3, near, xtol=1e-16, rtol=1e-15))
        sigma_max = np.array(sigma_max)
        w = ref.a**2 * ref.f**2 * ref.n

        def margin(t):
            return 1.0 - np.sqrt(w @ t**2) / sigma_max

        def margin_jac(t):
            sigma = np.sqrt(w @ t**2)
            return -(w * t / (sigma * sigma_max)[:, None])[:, free] * t[free]

    rtol = 1e-9 if model == "worst-case" else 1e-6

    def accept(x, full):  # only points the tests' own check calls feasible
        return x if ref.feasible(full(x), rtol=rtol)[0] else None

    return slsqp_in_log_t(ref, margin, jac=grad, margin_jac=margin_jac, accept=accept, starts=starts, seed=seed)


CASES = [(seed, model) for seed in (7, 12) for model in ("worst-case", "rss", "mean-shift")]


@pytest.mark.parametrize("seed,model", CASES)
def test_multipliers_match_conic_and_slsqp(seed, model):
    case = formula_case(seed, model)
    problem = prepare(case, model)
    assert applicable(problem)
    result = MultiplierNewton(problem).solve()  # no fallback: this path must certify itself
    assert result.status == "optimal", result.message
    assert result.gap is not None and result.gap <= 1e-9
    t = result.allocated_array()
    ref = Reference(case, model)
    assert ref.within_limits(t)
    assert ref.feasible(t, rtol=1e-9 if model == "worst-case" else 1e-6)[0]
    assert result.total_cost == pytest.approx(float(ref.cost(t)[0]), rel=1e-12)
    conic = CompiledAllocation.from_problem(prepare(case, model)).solve()
    assert conic.success, conic.message
    assert result.total_cost == pytest.approx(conic.total_cost, rel=1e-7)
    found = slsqp_cost(case, model)
    assert found is not None
    bound = result.total_cost * (1.0 - result.gap)
    assert bound <= found * (1 + 1e-8)  # weak duality (SLSQP points meet the limits to 1e-9)
    assert found <= result.total_cost * (1 + 1e-4)  # and SLSQP gets close from its side


def test_duplicate_and_slack_requirements_are_certified():
    # the same chain twice (a singular Hessian) and a requirement loose enough not to bind
    case = formula_case(7, "rss", size=12, count=3)
    reqs = list(case.requirements)
    twin = replace(reqs[0], name="twin")
    y0 = Reference(case, "rss").y0[1]
    loose = Requirement("loose", chain=reqs[1].chain, lower=y0 - 1e3, upper=y0 + 1e3, fallout_ppm=100)
    case = replace(case, requirements=tuple(reqs + [twin, loose]))
    for model in ("worst-case", "rss"):
        result = MultiplierNewton(prepare(case, model)).solve()
        assert result.status == "optimal", result.message
        assert result.gap <= 1e-9
        assert Reference(case, model).feasible(result.allocated_array(), rtol=1e-9 if model == "worst-case" else 1e-6)[0]
        conic = CompiledAllocation(case, model).solve()
        assert result.total_cost == pytest.approx(conic.total_cost, rel=1e-7)
        prices = {r.name: r.shadow_price for r in result.requirements}
        assert prices["loose"] == 0.0


def test_allocate_takes_it_and_reports_infeasible_honestly():
    case = formula_case(3, "rss")
    result = allocate(case, "rss")
    assert result.success and result.gap <= 1e-6
    # limits no tolerance can meet: infeasible, never a wrong 'optimal'
    req = case.requirements[0]
    y0 = Reference(case, "rss").y0[0]
    bad = replace(req, lower=y0 - 1e-9, upper=y0 + 1e-9)
    broken = replace(case, requirements=(bad,) + case.requirements[1:])
    out = allocate(broken, "rss")
    assert out.status == "infeasible"


def test_hessian_over_shared_parts_equals_the_dense_product():
    # the pair list (one bincount) against numpy's dense (coef·slope) wᵀ
    from allocator.solve.multipliers import _SharedParts

    rng = np.random.default_rng(4)
    k, n = 40, 200
    w = np.zeros((k, n))
    for r in range(k):
        w[r, rng.choice(n, 12, replace=False)] = rng.uniform(0.1, 2.0, 12)
    coef = w * rng.uniform(1.0, 3.0, n)
    shared = _SharedParts(w, coef)
    assert shared.sparse
    slope = rng.normal(size=n)
    np.testing.assert_allclose(shared.matrix(slope), (coef * slope) @ w.T, rtol=1e-12, atol=1e-12)


def chains_case(seed: int, model: str, parts: int = 60, count: int = 20, per_chain: int = 8):
    """An invented case of many short chains over shared parts (formula costs, two-sided
    limits leaving part of the loosest tolerances' spread; about one in ten loose)."""
    from allocator.model import AllocationSettings, Case, Contributor

    rng = np.random.default_rng(seed)
    lo = rng.uniform(0.002, 0.01, parts)
    hi = lo * rng.uniform(5, 30, parts)
    count_ = rng.choice([1, 1, 1, 2], parts)
    people = []
    for i in range(parts):
        kind = i % 3
        cost = (CostCurve("reciprocal", a=rng.uniform(0.1, 2), b=rng.uniform(1e-3, 1e-2)) if kind == 0 else
                CostCurve("reciprocal-power", a=rng.uniform(0.1, 2), b=rng.uniform(1e-5, 1e-3), k=1.5) if kind == 1
                else CostCurve("exponential", a=rng.uniform(0.1, 1), b=rng.uniform(0.5, 3), c=rng.uniform(10, 60)))
        people.append(Contributor(name=f"x{i}", nominal=float(rng.uniform(1, 50)), tolerance=float(lo[i]),
                                  limits=(float(lo[i]), float(hi[i])), cost=cost, count=int(count_[i])))
    reqs = []
    for r in range(count):
        members = np.sort(rng.choice(parts, size=per_chain, replace=False))
        a = rng.choice([-1.0, 1.0], per_chain) * rng.uniform(0.5, 2.0, per_chain)
        n, t = count_[members], hi[members]
        y0 = float(np.sum(a * n * np.array([people[i].nominal for i in members])))
        room = 0.4 * float(np.sum(n * np.abs(a) * t)) if model == "worst-case" else \
            2.2 * float(np.sqrt(np.sum(n * (a * t / 3.0) ** 2)))
        room *= 3.0 if rng.uniform() < 0.1 else 1.0
        reqs.append(Requirement(f"r{r}", chain={f"x{i}": float(c) for i, c in zip(members, a)},
                                lower=y0 - 1.3 * room, upper=y0 + room, fallout_ppm=100))
    return Case(title="invented chains", contributors=tuple(people), requirements=tuple(reqs),
                allocation=AllocationSettings(models=(model,)))


@pytest.mark.parametrize("seed,model", [(3, "rss"), (1, "worst-case"), (7, "rss")])
def test_newton_reaches_the_certificate_when_the_dual_no_longer_resolves_a_rise(seed, model):
    # near the maximum the rise of D falls below its round-off while the excess is still
    # 1e-8: the step must still be taken (it once stopped there, uncertified)
    case = chains_case(seed, model)
    result = MultiplierNewton(prepare(case, model)).solve()
    assert result.status == "optimal", result.message
    assert result.gap <= 1e-9
    assert Reference(case, model).feasible(result.allocated_array(), rtol=1e-9 if model == "worst-case" else 1e-6)[0]
    conic = CompiledAllocation(case, model).solve()
    assert result.total_cost == pytest.approx(conic.total_cost, rel=1e-7)
