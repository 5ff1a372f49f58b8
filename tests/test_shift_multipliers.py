"""Newton on the prices of several mean-shift requirements (allocator.solve.shift_multipliers),
against independent solvers on invented cases:

- the compiled conic problem (cvxpy/Clarabel with cutting planes, allocator.solve.continuous);
- scipy.optimize.minimize (SLSQP) on the tests' own constraint math (tests/helpers.py
  ``Reference``: normal fallout by scipy.stats with the mean at either end of ȳ ± δ);
- weak duality: the certified lower bound lies below the cost of every feasible point
  SLSQP finds.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import optimize, special

from allocator.model import CostCurve, Requirement
from allocator.solve import allocate, prepare
from allocator.solve.continuous import CompiledAllocation
from allocator.solve.shift_multipliers import ShiftMultiplierNewton, _Pairs, applicable
from helpers import Reference, build_case, slsqp_in_log_t

MODEL = "mean-shift"


def shift_case(seed: int, size: int = 14, count: int = 4, sides: str | None = None):
    """A random invented mean-shift case (tests/helpers.build_case) with tables swapped for
    reciprocal curves of about the same level (this path takes formula costs); ``sides``
    'upper' keeps an upper limit only on every requirement."""
    built = build_case(np.random.default_rng(seed), MODEL, size, count, None)
    people = []
    for k, c in enumerate(built.case.contributors):
        if c.cost is not None and c.cost.curve == "table":
            lo, hi = c.limits
            level = float(np.mean(c.cost.points_cost))
            c = replace(c, cost=CostCurve("reciprocal", a=0.0, b=level * math.sqrt(lo * hi)))
        if not c.fixed and k % 3 == 0:
            c = replace(c, mean_shift=0.3)  # enough free mean shifts to matter
        people.append(c)
    case = replace(built.case, contributors=tuple(people))
    if sides == "upper":
        ref = Reference(case, MODEL)
        reqs = []
        for r, req in enumerate(case.requirements):
            room = min(abs(x - ref.y0[r]) for x in (req.lower, req.upper) if x is not None)
            reqs.append(replace(req, lower=None, upper=float(ref.y0[r] + room)))
        case = replace(case, requirements=tuple(reqs))
    return case


def allowed_sigma(mean: float, p: float, lower, upper) -> float:
    """Largest σ with normal fallout ``p`` at this mean (scipy.special.ndtr, brentq)."""
    def excess(s):
        out = -p
        if lower is not None:
            out += special.ndtr((lower - mean) / s)
        if upper is not None:
            out += special.ndtr((mean - upper) / s)
        return out

    near = min(abs(x - mean) for x in (lower, upper) if x is not None)
    if (lower is not None and mean <= lower) or (upper is not None and mean >= upper):
        return 0.0
    return optimize.brentq(excess, near * 1e-3, near, xtol=1e-300, rtol=1e-15)


def slsqp_cost(case, starts: int = 3, seed: int = 0):
    """Least cost SLSQP finds, made exactly feasible by the tests' own check (None: none).

    Constraint per requirement: ``1 − σ / σ_allowed ≥ 0``, ``σ_allowed`` the smaller of the
    largest σ meeting the fallout with the mean at either end of ȳ ± δ (the two-sided
    normal fallout is unimodal in the mean), by scipy; finite-difference Jacobians,
    variables ``log t``.
    """
    ref = Reference(case, MODEL)
    lo = np.log(ref.lo[~ref.fixed])

    def margin(t):
        _, sigma, delta = ref.spreads(t)
        out = []
        for r in range(len(ref.y0)):
            allowed = min(allowed_sigma(ref.y0[r] + sign * delta[0, r], ref.p[r], ref.lower[r], ref.upper[r])
                          for sign in (-1.0, 1.0))
            out.append(1.0 - sigma[0, r] / allowed if allowed > 0 else -1.0)
        return np.array(out)

    def accept(x, full):
        # SLSQP ends up to ~1e-5 outside a limit: shrink the free tolerances (bisection on
        # a common factor, the tests' own check) until every requirement is met exactly
        if not ref.feasible(full(np.maximum(lo, x - 1e-3)))[0]:
            return None
        good, bad = 1e-3, 0.0
        if ref.feasible(full(x))[0]:
            good = 0.0
        for _ in range(60):
            mid = 0.5 * (good + bad)
            if ref.feasible(full(np.maximum(lo, x - mid)))[0]:
                good = mid
            else:
                bad = mid
        return np.maximum(lo, x - good)

    return slsqp_in_log_t(ref, margin, accept=accept, starts=starts, seed=seed)


@pytest.mark.parametrize("seed,sides,size,count", [
    (3, None, 14, 4), (8, None, 14, 4), (21, None, 14, 4), (5, "upper", 14, 4), (13, "upper", 14, 4),
    # one requirement binds with nearly all its parts on their tightest limits, the others
    # end slack: Newton on every candidate at once stalls, the growing set settles
    (16, "upper", 16, 5), (33, None, 16, 5),
])
def test_shift_multipliers_match_conic_and_slsqp(seed, sides, size, count):
    case = shift_case(seed, size=size, count=count, sides=sides)
    problem = prepare(case, MODEL)
    assert applicable(problem)
    result = ShiftMultiplierNewton(problem).solve()  # no fallback: this path must certify itself
    assert result.status == "optimal", result.message
    assert result.gap is not None and result.gap <= 1e-9
    t = result.allocated_array()
    ref = Reference(case, MODEL)
    assert ref.within_limits(t)
    assert ref.feasible(t, rtol=1e-6)[0]
    assert result.total_cost == pytest.approx(float(ref.cost(t)[0]), rel=1e-12)
    conic = CompiledAllocation.from_problem(prepare(case, MODEL)).solve()
    assert conic.success, conic.message
    assert result.total_cost == pytest.approx(conic.total_cost, rel=1e-7)
    found = slsqp_cost(case)
    assert found is not None
    bound = result.total_cost * (1.0 - result.gap)
    assert bound <= found * (1 + 1e-12)  # weak duality (the SLSQP point meets every limit)
    assert found <= result.total_cost * (1 + 1e-4)  # and SLSQP gets close from its side


def test_slack_and_duplicate_requirements_are_certified():
    # the same chain twice (a singular Jacobian) and a requirement loose enough not to bind
    case = shift_case(8)
    reqs = list(case.requirements)
    y0 = Reference(case, MODEL).y0[1]
    loose = Requirement("loose", chain=reqs[1].chain, lower=y0 - 1e3, upper=y0 + 1e3, fallout_ppm=100)
    case = replace(case, requirements=tuple(reqs + [replace(reqs[0], name="twin"), loose]))
    result = ShiftMultiplierNewton(prepare(case, MODEL)).solve()
    assert result.status == "optimal", result.message
    assert result.gap <= 1e-9
    assert Reference(case, MODEL).feasible(result.allocated_array(), rtol=1e-6)[0]
    conic = CompiledAllocation(case, MODEL).solve()
    assert result.total_cost == pytest.approx(conic.total_cost, rel=1e-7)
    assert {r.name: r.shadow_price for r in result.requirements}["loose"] == 0.0


def test_allocate_matches_conic_and_reports_infeasible_honestly():
    case = shift_case(21)
    result = allocate(case, MODEL)
    assert result.success and result.gap <= 1e-6
    conic = CompiledAllocation(case, MODEL).solve()
    assert result.total_cost == pytest.approx(conic.total_cost, rel=1e-7)
    # limits no tolerance can meet: infeasible, never a wrong 'optimal'
    req = case.requirements[0]
    y0 = Reference(case, MODEL).y0[0]
    broken = replace(case, requirements=(replace(req, lower=y0 - 1e-9, upper=y0 + 1e-9),) + case.requirements[1:])
    assert allocate(broken, MODEL).status == "infeasible"


def test_jacobian_sums_over_shared_parts_equal_the_dense_products():
    rng = np.random.default_rng(4)
    k, n = 40, 200
    w, v = np.zeros((k, n)), np.zeros((k, n))
    for r in range(k):
        cols = rng.choice(n, 12, replace=False)
        w[r, cols] = rng.uniform(0.1, 2.0, 12)
        v[r, cols[:8]] = rng.uniform(0.0, 1.0, 8)  # some parts without a mean shift
    count = rng.integers(1, 4, n).astype(float)
    pairs = _Pairs(w, v, count)
    assert pairs.sparse
    s1, s2, s3 = rng.normal(size=(3, n))
    dense = [(w * count * s1) @ w.T, (w * count * s2) @ v.T, (v * count * s2) @ w.T, (v * count * s3) @ v.T]
    for got, want in zip(pairs.products(s1, s2, s3), dense):
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12)


def test_re_solves_with_other_limits_match_the_conic_path():
    # one solver re-solved with other limits (as a sweep does, each solve starting from the
    # last one's prices), in an order that jumps: every point against the conic path
    case = shift_case(8)
    problem = prepare(case, MODEL)
    solver = ShiftMultiplierNewton(problem)
    conic = CompiledAllocation.from_problem(problem)
    ref = Reference(case, MODEL)
    name = case.requirements[0].name
    room = ref.room()[0]
    req = case.requirements[0]
    for scale in (1.0, 0.7, 1.4, 0.75, 2.5, 0.9):
        change = {k: ref.y0[0] + sign * room * scale for k, sign, x in (("lower", -1, req.lower), ("upper", 1, req.upper))
                  if x is not None}
        overrides = {name: change}
        result = solver.solve(overrides)
        expected = conic.solve(overrides)
        assert expected.success, expected.message
        assert result.status == "optimal", result.message
        assert result.gap <= 1e-9
        assert result.total_cost == pytest.approx(expected.total_cost, rel=1e-7)
        moved = replace(case, requirements=(replace(req, **change),) + case.requirements[1:])
        assert Reference(moved, MODEL).feasible(result.allocated_array(), rtol=1e-6)[0]
