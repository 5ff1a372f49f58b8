"""Least-cost allocation against the closed-form Lagrange-multiplier optimum.

Sources:
- K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund (1990), "Least cost
  tolerance allocation for mechanical assemblies with automated process selection",
  Manufacturing Review 3(1):49-59: Lagrange-multiplier allocation under a worst-case sum
  or an RSS constraint, reciprocal-power cost curves.
- M. F. Spotts (1973), "Allocation of tolerances to minimize cost of assembly", Journal of
  Engineering for Industry 95(3):762-764: the same with cost b/t² (k = 2).

Derivation used below (minimise Σ n_i b_i t_i^(−k), the constant a_i drops out):

worst case, Σ n_i |a_i| t_i = T:
    stationarity  k b_i t_i^(−k−1) = λ |a_i|   ⇒  t_i = (k b_i / (λ |a_i|))^(1/(k+1))
    constraint    λ^(1/(k+1)) = Σ n_i |a_i| (k b_i/|a_i|)^(1/(k+1)) / T

rss with σ_i = t_i/3 (normal, cp = 1), Σ n_i (a_i t_i / 3)² = σ²:
    stationarity  k b_i t_i^(−k−1) = 2 λ (a_i²/9) t_i  ⇒  t_i = (9 k b_i / (2 λ a_i²))^(1/(k+2))
    constraint    λ^(2/(k+2)) = Σ n_i (a_i²/9) (9 k b_i / (2 a_i²))^(2/(k+2)) / σ²

Bounds: a contributor whose closed-form value falls outside its limits is clipped there and
the closed form is re-solved for the rest with the constraint reduced by the clipped ones'
share (repeated until no value moves); with convex costs this is the KKT point.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from allocator.model import CostCurve
from allocator.solve import allocate
from allocator.solve.continuous import CompiledAllocation

from helpers import chain_requirement, contributor, make_case

RTOL = 1e-7


def _closed_form(b, a, n, k, total, lo, hi, rss):
    """Closed-form optimum with hand clipping; returns (t, λ)."""
    b, a, n, lo, hi = (np.asarray(v, dtype=float) for v in (b, a, n, lo, hi))
    clipped = np.full(b.size, np.nan)
    for _ in range(b.size + 1):
        free = np.isnan(clipped)
        if rss:
            w = a**2 / 9.0
            rest = total - np.sum((n * w * clipped**2)[~free])
            base = (9.0 * k * b / (2.0 * a**2)) ** (1.0 / (k + 2))  # t_i = base_i λ^(−1/(k+2))
            lam = (np.sum((n * w * base**2)[free]) / rest) ** ((k + 2) / 2.0)
            t = base * lam ** (-1.0 / (k + 2))
        else:
            rest = total - np.sum((n * np.abs(a) * clipped)[~free])
            base = (k * b / np.abs(a)) ** (1.0 / (k + 1))
            lam = (np.sum((n * np.abs(a) * base)[free]) / rest) ** (k + 1)
            t = base * lam ** (-1.0 / (k + 1))
        t = np.where(free, t, clipped)
        out = free & ((t < lo) | (t > hi))
        if not out.any():
            return t, lam
        clipped[out] = np.clip(t[out], lo[out], hi[out])
    raise AssertionError("clipping did not settle")


def _case(b, a, n, k, lo, hi, lower, upper, fallout_ppm=2700.0):
    curve = "reciprocal" if k == 1 else "reciprocal-power"
    people = [
        contributor(
            f"x{i}", nominal=10.0 + i, tolerance=0.02, limits=(lo[i], hi[i]), count=int(n[i]),
            cost=CostCurve(curve, a=0.3, b=b[i], k=float(k)),
        )
        for i in range(len(b))
    ]
    # nominal response: Σ a_i n_i x_i; put the limits around it
    y0 = sum(a[i] * n[i] * (10.0 + i) for i in range(len(b)))
    req = chain_requirement(
        "gap", {f"x{i}": a[i] for i in range(len(b))},
        lower=None if lower is None else y0 + lower,
        upper=None if upper is None else y0 + upper,
        fallout_ppm=fallout_ppm,
    )
    return make_case(people, [req])


B = np.array([0.004, 0.010, 0.0025, 0.006, 0.0008])
A = np.array([1.0, -1.0, 2.0, -0.5, 1.0])
N = np.array([1, 1, 1, 2, 1])
WIDE = (np.full(5, 1e-4), np.full(5, 10.0))


def _bounds(kind, k, total, rss):
    """Wide bounds, or bounds that cut x2 from below and x3 from above (both clip)."""
    lo, hi = WIDE
    if kind == "no-bounds":
        return lo, hi
    free, _ = _closed_form(B, A, N, k, total, lo, hi, rss)
    lo, hi = lo.copy(), hi.copy()
    lo[2], hi[3] = 1.3 * free[2], 0.7 * free[3]
    return lo, hi


def _both_paths(case, model):
    exact = allocate(case, model)
    conic = CompiledAllocation(case, model).solve()
    assert exact.solver == "lagrange-dual"
    assert not conic.solver.startswith("lagrange")  # the conic path, whichever solver tier answered
    assert exact.success and conic.success, (exact.message, conic.message)
    return exact, conic


@pytest.mark.parametrize("k", [1, 2, 1.5])
@pytest.mark.parametrize("bounds", ["no-bounds", "clipped"])
def test_worst_case_matches_closed_form(k, bounds):
    # Chase et al. (1990) worst-case Lagrange allocation; k = 2 is Spotts (1973)
    total = 0.30
    lo, hi = _bounds(bounds, k, total, rss=False)
    t_ref, lam = _closed_form(B, A, N, k, total, lo, hi, rss=False)
    if bounds == "clipped":  # the test really exercises clipping
        assert t_ref[2] == lo[2] and t_ref[3] == hi[3]
    case = _case(B, A, N, k, lo, hi, lower=None, upper=total)
    for result in _both_paths(case, "worst-case"):
        np.testing.assert_allclose(result.allocated_array(), t_ref, rtol=RTOL)
        cost_ref = float(np.sum(N * (0.3 + B * t_ref ** (-k))))
        assert result.total_cost == pytest.approx(cost_ref, rel=RTOL)
        # envelope theorem: d(cost)/d(upper) = −λ
        assert result.requirements[0].shadow_upper == pytest.approx(-lam, rel=1e-6)


@pytest.mark.parametrize("k", [1, 2, 1.5])
@pytest.mark.parametrize("bounds", ["no-bounds", "clipped"])
@pytest.mark.parametrize("sides", ["upper", "both"])
def test_rss_matches_closed_form(k, bounds, sides):
    # Chase et al. (1990) RSS Lagrange allocation; k = 2 is Spotts (1973)
    p = 100e-6
    d = 0.30
    if sides == "upper":
        sigma = d / stats.norm.isf(p)  # one-sided: P(y > ȳ + d) = p
        lower, upper = None, d
    else:
        sigma = d / stats.norm.isf(p / 2.0)  # symmetric two-sided: 2 Φ(−d/σ) = p
        lower, upper = -d, d
    lo, hi = _bounds(bounds, k, sigma**2, rss=True)
    t_ref, lam = _closed_form(B, A, N, k, sigma**2, lo, hi, rss=True)
    if bounds == "clipped":
        assert t_ref[2] == lo[2] and t_ref[3] == hi[3]
    case = _case(B, A, N, k, lo, hi, lower=lower, upper=upper, fallout_ppm=p * 1e6)
    for result in _both_paths(case, "rss"):
        np.testing.assert_allclose(result.allocated_array(), t_ref, rtol=RTOL)
        cost_ref = float(np.sum(N * (0.3 + B * t_ref ** (-k))))
        assert result.total_cost == pytest.approx(cost_ref, rel=RTOL)
        # the constraint is active: σ_y equals the closed-form σ
        assert result.requirements[0].sigma == pytest.approx(sigma, rel=RTOL)
        # d(cost)/d(σ²) = −λ; for the one-sided limit σ = (U − ȳ)/z, so d(cost)/dU = −2λσ/z
        if sides == "upper":
            expected = -2.0 * lam * sigma / stats.norm.isf(p)
            assert result.requirements[0].shadow_upper == pytest.approx(expected, rel=1e-6)


def test_loose_requirement_gives_loosest_tolerances():
    # with λ = 0 (constraint slack) every tolerance goes to its loosest limit: the cost
    # curves decrease (Chase et al. 1990)
    lo, hi = np.full(5, 1e-3), np.full(5, 0.01)
    case = _case(B, A, N, 1, lo, hi, lower=None, upper=10.0)
    for model in ("worst-case", "rss"):
        for result in _both_paths(case, model):
            np.testing.assert_allclose(result.allocated_array(), hi, rtol=RTOL)
            assert set(result.active) == {"loosest"}
            assert result.requirements[0].shadow_price == 0.0
