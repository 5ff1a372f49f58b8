"""The `convolution` model: exact fallout of a linear chain, and allocation under it.

Every reference here is computed in this file, independently of allocator's convolution:

- Irwin–Hall: the sum S of n independent uniforms on [0, 1] has
  P(S ≤ x) = (1/n!) Σ_{k=0}^{⌊x⌋} (−1)^k C(n, k) (x − k)^n
  (Irwin, J. O. (1927). On the frequency distribution of the means of samples from a
  population having any law of frequency with finite moments. Biometrika 19, 225-239;
  Hall, P. (1927). The distribution of means for samples of size N drawn from a population
  in which the variate takes values between 0 and 1. Biometrika 19, 240-245), evaluated
  in exact rational arithmetic;
- a normal N(0, σ²) plus a uniform on ±c: P(Y > u) = [G(u + c) − G(u − c)] / (2c) with
  G(v) = v·Q(v/σ) − σ·φ(v/σ), Q the normal upper tail (integrate Q(v/σ) over the uniform
  density; dG/dv = Q(v/σ) by differentiation), with scipy.stats.norm;
- a normal plus a uniform plus a triangular: scipy.integrate.quad of the normal tail
  against the closed-form density of uniform + triangular (scipy.stats.triang);
- allocation: scipy.optimize SLSQP from several starts on that independent tail.
All demo cases are invented.
"""

from __future__ import annotations

import math
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import integrate, optimize, stats

from allocator.analysis import analyze
from allocator.errors import CaseError, UsageError
from allocator.model import Requirement
from allocator.solve import allocate
from helpers import chain_requirement, contributor, make_case, reciprocal, unit_cost

# --------------------------------------------------------------------------- references


def irwin_hall_sf(x: float, n: int) -> float:
    """P(S > x) for S the sum of n uniforms on [0, 1] (Irwin 1927; Hall 1927), exactly."""
    y = Fraction(n) - Fraction(x)  # P(S > x) = P(S < n − x) by symmetry: a short sum in the tail
    if y <= 0:
        return 0.0
    total = sum((-1) ** k * math.comb(n, k) * (y - k) ** n for k in range(0, min(int(y), n) + 1))
    return float(total / math.factorial(n))


def normal_sf(z: float) -> float:
    """Q(z) = P(N(0, 1) > z) = erfc(z/√2)/2."""
    return 0.5 * math.erfc(z / math.sqrt(2.0))


def normal_uniform_sf(u: float, sigma: float, c: float) -> float:
    """P(N(0, σ²) + U(−c, c) > u) in closed form."""
    def g(v):
        return v * normal_sf(v / sigma) - sigma * math.exp(-0.5 * (v / sigma) ** 2) / math.sqrt(2 * math.pi)

    return (g(u + c) - g(u - c)) / (2.0 * c)


def triangular_cdf(x: float, c: float) -> float:
    """CDF of the symmetric triangular distribution on ±c (checked against scipy.stats.triang
    in test_reference_triangular_cdf)."""
    if x <= -c:
        return 0.0
    if x >= c:
        return 1.0
    return (x + c) ** 2 / (2 * c * c) if x <= 0 else 1.0 - (c - x) ** 2 / (2 * c * c)


def normal_uniform_triangular_sf(u: float, sigma: float, c_u: float, c_t: float) -> float:
    """P(N(0, σ²) + U(±c_u) + T(±c_t) > u): the normal tail integrated (scipy quad) against
    the density of U + T, (F_T(b + c_u) − F_T(b − c_u)) / (2 c_u)."""
    if c_t == 0:
        return normal_uniform_sf(u, sigma, c_u)
    density = lambda b: (triangular_cdf(b + c_u, c_t) - triangular_cdf(b - c_u, c_t)) / (2.0 * c_u)  # noqa: E731
    reach = c_u + c_t
    breaks = sorted({-reach, -abs(c_u - c_t), 0.0, abs(c_u - c_t), reach})
    total = 0.0
    for a, b in zip(breaks[:-1], breaks[1:]):
        if b > a:
            total += integrate.quad(lambda x: density(x) * normal_sf((u - x) / sigma), a, b,
                                    epsabs=0.0, epsrel=1e-11, limit=200)[0]
    return total


def test_reference_triangular_cdf():
    tri = stats.triang(c=0.5, loc=-0.3, scale=0.6)
    for x in (-0.4, -0.29, -0.1, 0.0, 0.05, 0.25, 0.31):
        assert triangular_cdf(x, 0.3) == pytest.approx(float(tri.cdf(x)), rel=1e-12, abs=1e-15)
    assert normal_uniform_triangular_sf(0.05, 0.01, 0.02, 1e-9) == pytest.approx(
        normal_uniform_sf(0.05, 0.01, 0.02), rel=1e-6)


def fallout_ppm_reference(nominal, lower, upper, sigma, c_u, c_t=0.0, delta=0.0):
    """Fallout [ppm] with the mean at the worse end of nominal ± δ (both ends tried)."""
    worst = 0.0
    for mean in {nominal - delta, nominal + delta}:
        below = 0.0 if lower is None else normal_uniform_triangular_sf(mean - lower, sigma, c_u, c_t)
        above = 0.0 if upper is None else normal_uniform_triangular_sf(upper - mean, sigma, c_u, c_t)
        worst = max(worst, below + above)
    return 1e6 * worst


def sigma_normal(t, cp=1.0):
    return t / (3.0 * cp)


# --------------------------------------------------------------------------- invented cases


def uniform_sum_case(parts, upper, fallout_ppm=100.0):
    """One requirement y = Σ parts (invented): ``parts`` are (name, tolerance, distribution, count)."""
    contributors = [contributor(name, nominal=10.0, tolerance=t, distribution=kind, count=count)
                    for name, t, kind, count in parts]
    nominal = sum(10.0 * count for _, _, _, count in parts)
    req = chain_requirement("gap", {name: 1.0 for name, *_ in parts}, upper=nominal + upper,
                            fallout_ppm=fallout_ppm)
    return make_case(contributors, [req], models=("rss", "convolution")), nominal


def shim_case(target_ppm=100.0, shift=0.0, lower=9.85, upper=10.12, shifted="ring"):
    """Invented: a normal-made ground ring (cp 1.2), a uniform stamped shim and a second
    normal ring, stacked; the gap must stay in [lower, upper]. ``shift`` is the mean shift
    of the part named ``shifted``."""
    ring = contributor("ring", nominal=4.0, tolerance=0.03, cp=1.2,
                       mean_shift=shift if shifted == "ring" else 0.0, cost=reciprocal(0.2, 0.004))
    shim = contributor("shim", nominal=2.0, tolerance=0.03, distribution="uniform",
                       mean_shift=shift if shifted == "shim" else 0.0, cost=reciprocal(0.05, 0.003))
    collar = contributor("collar", nominal=4.0, tolerance=0.03, cost=reciprocal(0.1, 0.002))
    req = chain_requirement("gap", {"ring": 1.0, "shim": 1.0, "collar": 1.0}, lower=lower,
                            upper=upper, fallout_ppm=target_ppm)
    return make_case([ring, shim, collar], [req], models=("rss", "convolution"))


def shim_reference(case, t, delta=0.0):
    """Independent fallout [ppm] of shim_case at tolerances t = (ring, shim, collar)."""
    ring, shim, collar = t
    sigma = math.hypot(sigma_normal(ring, 1.2), sigma_normal(collar))
    req = case.requirements[0]
    return fallout_ppm_reference(10.0, req.lower, req.upper, sigma, shim, delta=delta)


# --------------------------------------------------------------------------- the exact fallout


@pytest.mark.parametrize("n", [2, 3, 4, 6])
def test_exact_fallout_matches_irwin_hall(n):
    """n uniforms on ±0.1 (count n): y − ȳ = 0.2·(S − n/2), S Irwin–Hall(n)."""
    c = 0.1
    for z in (0.3, 0.6, 0.8, 0.9):  # the limit at z of the way to the end of the support
        upper = z * n * c
        case, nominal = uniform_sum_case([("plate", c, "uniform", n)], upper)
        got = analyze(case).requirements[0].convolution_ppm
        expected = 1e6 * irwin_hall_sf(n / 2 + upper / (2 * c), n)
        assert got == pytest.approx(expected, rel=1e-6, abs=1e-9), (n, z)


def test_triangular_is_two_uniforms_irwin_hall():
    """A triangular on ±0.2 is two uniforms on ±0.1: with two more it is Irwin–Hall(4)."""
    case, _ = uniform_sum_case([("tri", 0.2, "triangular", 1), ("a", 0.1, "uniform", 1),
                                ("b", 0.1, "uniform", 1)], upper=0.36)
    expected = 1e6 * irwin_hall_sf(2 + 0.36 / 0.2, 4)
    assert expected < 1e3  # far in the tail
    assert analyze(case).requirements[0].convolution_ppm == pytest.approx(expected, rel=1e-6)


@pytest.mark.parametrize("upper", [10.05, 10.08, 10.11])
def test_exact_fallout_matches_normal_plus_uniform(upper):
    case = shim_case(lower=None, upper=upper)
    t = (0.03, 0.03, 0.03)
    got = analyze(case).requirements[0].convolution_ppm
    assert got == pytest.approx(shim_reference(case, t), rel=1e-6)
    # and the rss figure beside it is the normal approximation, not the exact one
    assert analyze(case).requirements[0].rss_ppm != pytest.approx(got, rel=1e-2)


def test_inversion_recheck_matches_the_closed_forms():
    """The answer's second, grid-free evaluation (characteristic-function inversion)."""
    from allocator.convolve import inversion_sf

    # Irwin–Hall(4): four uniforms on ±0.1, P(D > u) = P(S > 2 + u/0.2)
    for u in (0.1, 0.3, 0.38):
        expected = irwin_hall_sf(2 + u / 0.2, 4)
        assert inversion_sf(u, [1.0], [4], [0.1], ["uniform"], [0.0]) == pytest.approx(expected, rel=1e-7)
    # normal (σ = 0.01) plus uniform on ±0.02, down to about 1e-9
    for u in (0.03, 0.06, 0.075):
        expected = normal_uniform_sf(u, 0.01, 0.02)
        got = inversion_sf(u, [1.0, 1.0], [1, 1], [0.03, 0.02], ["normal", "uniform"], [1 / 3, 0.0])
        assert got == pytest.approx(expected, rel=1e-6)


def test_analyze_json_and_table_show_the_exact_fallout(tmp_path):
    import json

    from allocator.cli.main import cli
    from helpers import case_text

    case = shim_case()
    path = tmp_path / "shim.toml"
    path.write_text(case_text(case))
    run = CliRunner().invoke(cli, ["analyze", str(path), "--json"])
    assert run.exit_code == 0, run.output
    entry = json.loads(run.output)["requirements"][0]
    assert entry["convolution_ppm"] == pytest.approx(shim_reference(case, (0.03, 0.03, 0.03)), rel=1e-6)
    table = CliRunner().invoke(cli, ["analyze", str(path)])
    assert "exact (convolution" in table.output


def test_analyze_gives_no_exact_fallout_for_an_expression():
    a = contributor("a", nominal=2.0)
    b = contributor("b", nominal=3.0)
    req = Requirement(name="product", expression="a * b", lower=5.5, upper=6.5)
    result = analyze(make_case([a, b], [req])).requirements[0]
    assert result.convolution_ppm is None and result.to_dict()["convolution_ppm"] is None


# --------------------------------------------------------------------------- allocation


def test_normal_only_convolution_equals_rss():
    """All parts normal: the exact fallout is the normal one, so the answers agree."""
    parts = [contributor("a", cp=1.0, cost=reciprocal(0.1, 0.01)),
             contributor("b", cp=1.33, count=2, cost=reciprocal(0.0, 0.02)),
             contributor("c", cp=0.9, cost=reciprocal(0.3, 0.005))]
    req = chain_requirement("gap", {"a": 1.0, "b": -0.5, "c": 2.0}, lower=19.7, upper=20.35, fallout_ppm=50)
    case = make_case(parts, [req], models=("rss", "convolution"))
    rss, exact = allocate(case, "rss"), allocate(case, "convolution")
    assert rss.status == exact.status == "optimal"
    assert exact.total_cost == pytest.approx(rss.total_cost, rel=1e-9)
    assert exact.requirements[0].fallout_ppm == pytest.approx(50.0, rel=1e-6)


def test_normal_only_with_mean_shift_equals_mean_shift_model():
    """All normal, with mean shifts: worse end of the band = the mean-shift model."""
    parts = [contributor("a", cp=1.0, mean_shift=0.2, cost=reciprocal(0.1, 0.01)),
             contributor("b", cp=1.33, cost=reciprocal(0.0, 0.02))]
    req = chain_requirement("gap", {"a": 1.0, "b": 1.0}, lower=19.8, upper=20.15, fallout_ppm=100)
    case = make_case(parts, [req], models=("mean-shift", "convolution"))
    shifted, exact = allocate(case, "mean-shift"), allocate(case, "convolution")
    assert shifted.status == exact.status == "optimal"
    assert exact.total_cost == pytest.approx(shifted.total_cost, rel=1e-7)


def test_uniform_parts_cost_less_than_rss_at_the_exact_target():
    case = shim_case(target_ppm=100.0)
    rss, exact = allocate(case, "rss"), allocate(case, "convolution")
    assert rss.status == exact.status == "optimal"
    assert exact.total_cost < rss.total_cost * (1 - 1e-3)
    t = exact.allocated_array()
    assert shim_reference(case, t) == pytest.approx(100.0, rel=1e-6)
    # the rss answer's true fallout is well below its target: what the exact model spends
    assert shim_reference(case, rss.allocated_array()) < 90.0
    assert exact.requirements[0].fallout_ppm == pytest.approx(100.0, rel=1e-6)
    assert "not proven globally optimal" in exact.message
    assert "characteristic-function inversion" in exact.message


@pytest.mark.parametrize("shifted", ["ring", "shim"])
def test_mean_shift_puts_the_mean_at_the_worse_end(shifted):
    case = shim_case(target_ppm=100.0, shift=0.25, shifted=shifted)
    exact = allocate(case, "convolution")
    assert exact.status == "optimal", exact.message
    t = exact.allocated_array()
    delta = 0.25 * t[0 if shifted == "ring" else 1]  # δ = Σ n|a| m t
    assert exact.requirements[0].mean_shift == pytest.approx(delta, rel=1e-12)
    assert shim_reference(case, t, delta=delta) == pytest.approx(100.0, rel=1e-6)
    assert shim_reference(case, t, delta=0.0) < 80.0  # centred it would have been far inside
    assert exact.requirements[0].fallout_ppm == pytest.approx(100.0, rel=1e-6)
    # and cheaper than the mean-shift model's normal answer at the same target
    assert exact.total_cost < allocate(case, "mean-shift").total_cost


SHIFTS = {"arm": 0.15, "plate": 0.1}  # mean shifts of the shifted variant


def _two_requirement_case(shifted=False):
    """Invented: a bracket stack with normal, uniform and triangular parts and two gaps
    (``shifted``: the arm and the plate with the mean shifts of SHIFTS)."""
    m = SHIFTS if shifted else {}
    parts = [
        contributor("arm", cp=1.0, mean_shift=m.get("arm", 0.0), cost=reciprocal(0.1, 0.02)),
        contributor("plate", distribution="uniform", mean_shift=m.get("plate", 0.0),
                    cost=reciprocal(0.2, 0.01)),
        contributor("spring_seat", distribution="triangular", cost=reciprocal(0.05, 0.015)),
        contributor("pin", cp=1.33, count=2, cost=reciprocal(0.0, 0.008)),
    ]
    reqs = [
        chain_requirement("reach", {"arm": 1.0, "plate": 1.0, "spring_seat": -1.0}, lower=9.8,
                          upper=10.22, fallout_ppm=100),
        chain_requirement("seat", {"plate": 1.0, "pin": 1.0}, lower=29.82, upper=30.2, fallout_ppm=1000),
    ]
    return make_case(parts, reqs, models=("rss", "convolution"))


def _two_requirement_fallout(t, shifted=False):
    arm, plate, seat, pin = t
    m = SHIFTS if shifted else {}
    band_reach = m.get("arm", 0.0) * arm + m.get("plate", 0.0) * plate  # δ = Σ n|a| m t
    band_seat = m.get("plate", 0.0) * plate
    reach = fallout_ppm_reference(10.0, 9.8, 10.22, sigma_normal(arm), plate, seat, delta=band_reach)
    seat_ppm = fallout_ppm_reference(30.0, 29.82, 30.2, math.sqrt(2) * sigma_normal(pin, 1.33), plate,
                                     delta=band_seat)
    return np.array([reach, seat_ppm])


@pytest.mark.parametrize("shifted", [False, True])
def test_allocation_matches_an_independent_multistart_optimiser(shifted):
    case = _two_requirement_case(shifted)
    targets = np.array([100.0, 1000.0])
    lo, hi = np.log(0.005), np.log(0.2)
    counts = np.array([c.count for c in case.contributors], dtype=float)

    def cost(x):
        t = np.exp(x)
        return float(sum(n * unit_cost(c.cost, ti) for n, c, ti in zip(counts, case.contributors, t)))

    def margins(x):
        return np.log(targets) - np.log(_two_requirement_fallout(np.exp(x), shifted))

    def margin_jacobian(x, h=1e-5):  # central differences: quad noise stays far below h
        rows = []
        for i in range(x.size):
            e = np.zeros(x.size)
            e[i] = h
            rows.append((margins(x + e) - margins(x - e)) / (2 * h))
        return np.array(rows).T

    rng = np.random.default_rng(20261202)
    best = None
    for start in [np.full(4, np.log(0.03)), *rng.uniform(np.log(0.01), np.log(0.08), size=(2, 4))]:
        fit = optimize.minimize(cost, start, method="SLSQP", bounds=[(lo, hi)] * 4,
                                constraints=[{"type": "ineq", "fun": margins, "jac": margin_jacobian}],
                                options={"ftol": 1e-13, "maxiter": 200})
        if np.all(margins(fit.x) >= -1e-7) and (best is None or fit.fun < best.fun):
            best = fit
    assert best is not None

    ours = allocate(case, "convolution")
    assert ours.status == "optimal"
    t = ours.allocated_array()
    assert np.all(_two_requirement_fallout(t, shifted) <= targets * (1 + 1e-6))
    assert ours.total_cost == pytest.approx(best.fun, rel=1e-6)
    # both requirements bind at the optimum: each exactly at its target
    assert _two_requirement_fallout(t, shifted) == pytest.approx(targets, rel=1e-5)


EXPRESSION_CASE = """# invented: a product of two dimensions
title = "invented expression case"
units = "mm"

[[contributor]]
name = "a"
nominal = 2.0
tolerance = 0.05
limits = [0.005, 0.2]
cost = { curve = "reciprocal", a = 0.0, b = 0.01 }

[[contributor]]
name = "b"
nominal = 3.0
tolerance = 0.05
limits = [0.005, 0.2]
cost = { curve = "reciprocal", a = 0.0, b = 0.01 }

[[requirement]]
name = "product"
expression = "a * b"
lower = 5.5
upper = 6.5
"""


def test_expression_requirement_is_refused_in_one_line(tmp_path):
    from allocator.case import load_case
    from allocator.cli.main import cli

    path = tmp_path / "product.toml"
    path.write_text(EXPRESSION_CASE)
    with pytest.raises(CaseError, match="convolution needs a linear chain; use rss or mean-shift, then verify"):
        allocate(load_case(path), "convolution")
    out = tmp_path / "out.json"
    run = CliRunner().invoke(cli, ["allocate", str(path), "--model", "convolution"])
    assert run.exit_code == 2
    lines = run.output.strip().splitlines()
    assert len(lines) == 1 and "product.toml" in lines[0] and "requirement[1] (product).expression" in lines[0]
    assert "convolution needs a linear chain; use rss or mean-shift, then verify" in lines[0]
    assert not out.exists()


def test_process_choice_is_refused_clearly():
    from allocator.model import Process

    shaft = contributor("shaft", processes=(
        Process("lathe", (0.01, 0.05), reciprocal(1.0, 0.01)),
        Process("grinder", (0.005, 0.02), reciprocal(3.0, 0.01))))
    other = contributor("other")
    case = make_case([shaft, other], [chain_requirement("gap", {"shaft": 1, "other": 1}, upper=20.1)])
    with pytest.raises(UsageError, match="continuous tolerances"):
        allocate(case, "convolution")


def test_infeasible_target_is_reported_not_optimal():
    case = shim_case(target_ppm=1e-3, lower=9.99, upper=10.01)
    result = allocate(case, "convolution")
    assert result.status == "infeasible" and "gap" in result.message


# --------------------------------------------------------------------------- frontier and report


def test_frontier_points_are_the_allocations():
    from allocator.sweep import frontier

    case = shim_case()
    front = frontier(case, vary="fallout_ppm", values=[10.0, 100.0], models=("rss", "convolution"))
    assert front.status == "optimal"
    for value, cost in zip(front.values, front.costs["convolution"]):
        single = allocate(case, "convolution", overrides={"gap": {"fallout_ppm": value}})
        assert cost == pytest.approx(single.total_cost, rel=1e-9)
        t = single.allocated_array()
        assert shim_reference(case, t) == pytest.approx(value, rel=1e-6)


def test_report_shows_convolution_beside_rss():
    from allocator.report import build_report

    report = build_report(shim_case(), ("rss", "convolution"), samples=20_000, include_frontier=False)
    html = report.to_html()
    assert report.allocations["convolution"].status == "optimal"
    assert "exact&nbsp;convolution" in html and "RSS" in html
    cost = report.allocations["convolution"].total_cost
    assert f"{cost:.4g}"[:5] in html


def test_shadow_prices_match_finite_differences_of_the_least_cost():
    """Envelope theorem: d(least cost)/d(target) and d/d(upper) from the multiplier equal
    central differences of the least cost itself."""
    case = shim_case(target_ppm=100.0)
    base = allocate(case, "convolution")
    r = base.requirements[0]

    def cost(**change):
        return allocate(case, "convolution", overrides={"gap": change}).total_cost

    d_ppm = (cost(fallout_ppm=101.0) - cost(fallout_ppm=99.0)) / 2.0
    assert r.shadow_ppm == pytest.approx(d_ppm, rel=2e-3)
    d_upper = (cost(upper=10.1201) - cost(upper=10.1199)) / 2e-4
    assert r.shadow_upper == pytest.approx(d_upper, rel=2e-3)
    assert r.shadow_ppm < 0 and r.shadow_upper < 0 < r.shadow_lower


@pytest.mark.parametrize("spoil", ["failed", "tighter"])
def test_a_spoilt_sub_solver_never_gives_an_unverified_optimal(spoil):
    """The rss sub-problems answer 'failed', or 'optimal' at a point 10 % tighter than their
    optimum: the result is the verified optimum or 'failed', never a wrong 'optimal'."""
    from allocator.solve.convolution import convolution_solver
    from allocator.solve.dispatch import continuous_solver

    case = shim_case(target_ppm=100.0)
    honest = allocate(case, "convolution")

    class Spoilt:
        def __init__(self, problem):
            self.real = continuous_solver(problem)
            self.problem = problem

        def solve(self, overrides=None):
            good = self.real.solve(overrides)
            limits = self.problem.limits(overrides)
            if spoil == "failed":
                return self.problem.result(None, limits, status="failed", message="spoilt", solver="x")
            return self.problem.result(0.9 * good.allocated_array(), limits, status="optimal",
                                       message="spoilt", solver="x")

    result = convolution_solver(case, None, Spoilt).solve()
    if result.status == "optimal":
        assert result.total_cost == pytest.approx(honest.total_cost, rel=1e-6)
        assert shim_reference(case, result.allocated_array()) <= 100.0 * (1 + 1e-6)
    else:
        assert result.status == "failed" and result.message.startswith("no verified optimum")
        if result.allocated_array() is not None:
            assert "the tolerances shown meet every requirement" in result.message
            assert shim_reference(case, result.allocated_array()) <= 100.0 * (1 + 1e-6)


def test_uniform_sums_are_exact_far_in_the_tail():
    """A few uniform or triangular parts and no normal part: summed exactly, so tails far
    below the grid's resolution (about 1/2**18) are right: Irwin–Hall(3) at 1e-12."""
    from allocator.convolve import uniform_sum_sf

    u = 0.3 - 0.2 * (6e-12) ** (1 / 3)  # P(S > 3 − x) = x³/6 = 1e-12
    assert uniform_sum_sf(u, [0.1] * 3) == pytest.approx(1e-12, rel=1e-9)
    case, nominal = uniform_sum_case([("plate", 0.1, "uniform", 3)], u, fallout_ppm=1e-6)
    assert analyze(case).requirements[0].convolution_ppm == pytest.approx(1e-6, rel=1e-9)
    # two different widths: a trapezoid, P(U1 + U2 > u) = (c1 + c2 − u)² / (8 c1 c2) near the top
    assert uniform_sum_sf(0.29, [0.1, 0.2]) == pytest.approx(0.01**2 / (8 * 0.1 * 0.2), rel=1e-12)


def test_single_uniform_part_with_mean_shift_at_a_tiny_target():
    """One uniform part (y = 2x, x on ±t, mean shift 0.2 t): the fallout is linear in the
    distance past the support, (2t + δ − d)/(4t) per side, and the target is 0.03 ppm."""
    part = contributor("x", nominal=10.0, tolerance=0.03, distribution="uniform", mean_shift=0.2,
                       cost=reciprocal(0.1, 0.01))
    req = chain_requirement("y", {"x": 2.0}, lower=19.94, upper=20.07, fallout_ppm=0.03)
    case = make_case([part], [req], models=("convolution",))
    result = allocate(case, "convolution")
    assert result.status == "optimal", result.message
    (t,) = result.allocated_array()
    c, delta = 2 * t, 2 * 0.2 * t
    worse = max((c + delta - 0.07) / (2 * c), (c + delta - 0.06) / (2 * c), 0.0)
    assert 1e6 * worse == pytest.approx(0.03, rel=1e-6)


def test_the_table_says_the_answer_is_a_kkt_point_not_a_proven_global_optimum():
    # the exact feasible set need not be convex: the person reading the table is told so
    from allocator.cli.main import cli

    demo = str(Path(__file__).resolve().parents[1] / "cases" / "gearbox_end_play.toml")
    out = CliRunner().invoke(cli, ["allocate", demo, "--model", "convolution"])
    assert out.exit_code == 0, out.output
    head, note = out.stdout.splitlines()[2:4]
    assert head.startswith("model convolution: optimal")
    assert "KKT point" in note and "not proven globally optimal" in note
