"""FORM, SORM and importance sampling (`verify --method importance`) against exact answers.

References used below: scipy.stats.norm and scipy.integrate.quad as independent numerical
libraries; the Irwin–Hall distribution of a sum of uniforms (Irwin, J. O. (1927). On the
frequency distribution of the means of samples from a population having any law of
frequency with finite moments. Biometrika 19, 225-239; Hall, P. (1927). The distribution
of means for samples of size N drawn from a population in which the variate takes values
between 0 and 1. Biometrika 19, 240-245), evaluated in exact rational arithmetic; the
binomial distribution for the coverage of the interval.
"""

from __future__ import annotations

import json
import math
from fractions import Fraction

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import integrate, optimize, stats

from allocator.cli.main import cli
from allocator.form import StandardSpace, response_evaluator
from allocator.importance import importance_estimate, verify_importance
from allocator.model import Requirement
from helpers import chain_requirement, contributor, make_case

# ----------------------------------------------------------------- exact references


def normal_chain():
    """Invented chain of normal parts with counts and cp: mean and σ by hand (σ_i = t/(3 cp))."""
    cs = [
        contributor("a", nominal=30.0, tolerance=0.06, cp=1.0),
        contributor("b", nominal=10.0, tolerance=0.03, cp=1.33, count=2),
        contributor("d", nominal=4.8, tolerance=0.04, cp=0.8),
    ]
    chain = {"a": 1.0, "b": -1.0, "d": 0.5}
    mean = 30.0 - 2 * 10.0 + 0.5 * 4.8
    sigma = math.sqrt((0.06 / 3) ** 2 + 2 * (0.03 / (3 * 1.33)) ** 2 + (0.5 * 0.04 / (3 * 0.8)) ** 2)
    return cs, chain, mean, sigma


def irwin_hall_sf(n: int, x: Fraction) -> float:
    """P(S > x) for S the sum of n independent U(0, 1) (Irwin 1927; Hall 1927), exactly.

    ``P(S ≤ x) = (1/n!) Σ_{k ≤ x} (−1)^k C(n, k) (x − k)^n``; the upper tail is taken by
    symmetry (``P(S > x) = P(S < n − x)``) so that no small number is a difference.
    """
    y = n - x
    total = sum((-1) ** k * math.comb(n, k) * (y - k) ** n for k in range(0, math.floor(y) + 1))
    return float(Fraction(total) / math.factorial(n))


BILINEAR = dict(mk=2.0, sk=0.1 / 3, md=10.0, sd=math.hypot(0.3 / 3, 0.2 / 3))


def bilinear_case(upper):
    """Invented spring preload y = k·(L0 − L): rate k [N/mm] times compression; all normal."""
    cs = [
        contributor("k", nominal=2.0, tolerance=0.1),
        contributor("L0", nominal=30.0, tolerance=0.3),
        contributor("L", nominal=20.0, tolerance=0.2),
    ]
    return make_case(cs, [Requirement(name="preload", expression="k * (L0 - L)", upper=upper)])


def bilinear_sf(u: float) -> float:
    """P(k·D > u) = ∫ f_k(k) P(D > u/k) dk with D = L0 − L normal (k > 0 over ±12σ_k), by quad."""
    p = BILINEAR

    def integrand(k):
        return stats.norm.pdf(k, p["mk"], p["sk"]) * stats.norm.sf((u / k - p["md"]) / p["sd"])

    lo, hi = p["mk"] - 12 * p["sk"], p["mk"] + 12 * p["sk"]
    return integrate.quad(integrand, lo, hi, epsabs=0.0, epsrel=1e-11, points=[p["mk"]], limit=200)[0]


def bilinear_limit(p: float) -> float:
    return optimize.brentq(lambda u: math.log(bilinear_sf(u)) - math.log(p), 20.05, 26.0, xtol=1e-13)


def assert_estimate(check, exact_ppm, half_width=0.10):
    """The estimate is within 3 standard errors of the exact answer (a single run; the 95 %
    interval itself is checked by the coverage tests below) and the 95 % interval is at
    most ±half_width of the estimate."""
    assert abs(check.fallout_ppm - exact_ppm) <= 3 * check.std_error_ppm, (check.fallout_ppm, exact_ppm)
    assert check.ci_low_ppm <= check.fallout_ppm <= check.ci_high_ppm
    assert (check.ci_high_ppm - check.ci_low_ppm) / 2 <= half_width * check.fallout_ppm


# ----------------------------------------------------------------- FORM and SORM


@pytest.mark.parametrize("z_lower,z_upper", [(6.5, 6.0), (4.0, 7.5)])
def test_form_equals_the_exact_answer_for_a_linear_normal_limit(z_lower, z_upper):
    # a linear limit in normal variables: FORM is exact, Φ(−β) (Hasofer & Lind 1974);
    # reference: scipy.stats.norm
    cs, chain, mean, sigma = normal_chain()
    case = make_case(cs, [chain_requirement("gap", chain, lower=mean - z_lower * sigma, upper=mean + z_upper * sigma)])
    check = verify_importance(case, samples=2000, seed=1)["gap"]
    exact = (stats.norm.cdf(-z_lower) + stats.norm.sf(z_upper)) * 1e6
    assert check.form_ppm == pytest.approx(exact, rel=1e-6)
    assert check.sorm_ppm == pytest.approx(exact, rel=1e-6)  # no curvature
    assert check.beta_lower == pytest.approx(z_lower, rel=1e-7)
    assert check.beta_upper == pytest.approx(z_upper, rel=1e-7)


def test_sorm_corrects_form_for_a_curved_limit():
    # three uniforms near the corner of their cube: the limit surface in normal space is
    # curved away from the origin, so FORM overstates and SORM (Breitung 1984) comes
    # closer; exact answer: Irwin–Hall
    cs = [contributor(n, nominal=1.0, tolerance=1.0, distribution="uniform") for n in "xyz"]
    x = Fraction(29, 10)  # of the sum of three U(0, 1)
    case = make_case(cs, [chain_requirement("s", dict.fromkeys("xyz", 1.0), upper=3 + float(2 * x - 3))])
    check = verify_importance(case, samples=20_000, seed=2)["s"]
    exact = irwin_hall_sf(3, x) * 1e6
    assert abs(check.sorm_ppm / exact - 1) < abs(check.form_ppm / exact - 1)
    assert check.form_ppm > exact
    assert_estimate(check, exact)


# ----------------------------------------------------------------- importance sampling vs exact answers


@pytest.mark.parametrize("z", [4.753424, 5.997807])  # 1 ppm and 1e-3 ppm one-sided
def test_linear_normal_chain_matches_scipy_norm(z):
    cs, chain, mean, sigma = normal_chain()
    case = make_case(cs, [chain_requirement("gap", chain, upper=mean + z * sigma)])
    check = verify_importance(case, samples=20_000, seed=3)["gap"]
    exact = stats.norm.sf(z) * 1e6
    assert_estimate(check, exact)
    assert check.convolution_ppm == pytest.approx(exact, rel=1e-4)


@pytest.mark.parametrize("n,p", [(3, 1e-6), (3, 1e-9), (4, 1e-9)])
def test_irwin_hall_tail_of_uniform_sums(n, p):
    # n uniforms on ±1 (one contributor of count n): S = Σ x_i, and (S + n)/2 is Irwin–Hall
    case_at = lambda upper: make_case(  # noqa: E731
        [contributor("u", nominal=0.0, tolerance=1.0, distribution="uniform", count=n)],
        [chain_requirement("s", {"u": 1.0}, upper=upper)],
    )
    e = Fraction(math.factorial(n) * p) ** Fraction(1, n)  # P(IH > n − e) = e^n / n! for e ≤ 1
    x = n - Fraction(round(float(e), 12)).limit_denominator(10**12)
    exact = irwin_hall_sf(n, x) * 1e6
    check = verify_importance(case_at(float(2 * x - n)), samples=60_000, seed=4)["s"]
    assert_estimate(check, exact)


def test_triangular_parts_with_counts_are_irwin_hall_too():
    # a triangular part on ±t is the sum of two uniforms on ±t/2; two instances: four
    cs = [contributor("tri", nominal=5.0, tolerance=0.5, distribution="triangular", count=2)]
    x = Fraction(39, 10)  # S, the sum of four U(0, 1), beyond 3.9
    upper = 10.0 + float((x - 2) / 2)  # S = Σ (u_i − ½)/2 over four U(0, 1)
    case = make_case(cs, [chain_requirement("s", {"tri": 1.0}, upper=upper)])
    check = verify_importance(case, samples=60_000, seed=5)["s"]
    assert_estimate(check, irwin_hall_sf(4, x) * 1e6)


def test_normal_plus_uniform_matches_quadrature():
    # P(N + U > u) = (1/2c) ∫_{−c}^{c} Φ((v − u)/σ) dv (scipy.integrate.quad of scipy.stats.norm)
    cs = [contributor("n", nominal=10.0, tolerance=0.03), contributor("w", nominal=2.0, tolerance=0.05,
                                                                       distribution="uniform")]
    sigma, c = 0.01, 0.05
    upper = 12.0 + 0.05 + 5.2 * sigma
    case = make_case(cs, [chain_requirement("s", {"n": 1.0, "w": 1.0}, upper=upper)])
    exact = integrate.quad(lambda v: stats.norm.sf((upper - 12.0 - v) / sigma) / (2 * c), -c, c,
                           epsabs=0, epsrel=1e-11)[0] * 1e6
    check = verify_importance(case, samples=40_000, seed=6)["s"]
    assert_estimate(check, exact)


@pytest.mark.parametrize("p", [1e-6, 1e-9])
def test_bilinear_response_matches_the_one_dimensional_integral(p):
    upper = bilinear_limit(p)
    check = verify_importance(bilinear_case(upper), samples=40_000, seed=7)["preload"]
    assert_estimate(check, p * 1e6)
    # the linearised normal model is off by far more than the sampled interval
    assert not (check.ci_low_ppm <= check.rss_ppm <= check.ci_high_ppm)


def test_one_million_samples_reach_ten_percent_at_one_ppb_of_a_ppm():
    # the goal of the method: 1e-3 ppm within ±10 % (95 % half-width) from at most 1e6
    # samples; the bilinear case needs far fewer (see benchmarks/bench_importance.py)
    upper = bilinear_limit(1e-9)
    check = verify_importance(bilinear_case(upper), samples=10_000, seed=8)["preload"]
    assert check.relative_half_width <= 0.10


def test_mean_shift_on_the_worse_side_as_the_monte_carlo_places_it():
    # mean shift: every mean moved by m·t toward the nearer limit (upper here); the
    # response stays normal with mean ȳ + Σ|a| m t count: scipy.stats.norm
    cs, chain, mean, sigma = normal_chain()
    cs = [c.__class__(**{**c.__dict__, "mean_shift": 0.25}) for c in cs]
    delta = 0.25 * (0.06 + 2 * 0.03 + 0.5 * 0.04)
    upper = mean + 5.5 * sigma
    case = make_case(cs, [chain_requirement("gap", chain, lower=mean - 8 * sigma, upper=upper)])
    check = verify_importance(case, samples=20_000, seed=9)["gap"]
    exact = (stats.norm.sf((upper - mean - delta) / sigma) + stats.norm.cdf((mean - 8 * sigma - mean - delta) / sigma)) * 1e6
    assert check.shift_side == 1
    assert check.form_ppm == pytest.approx(exact, rel=1e-6)
    assert_estimate(check, exact)
    centred = verify_importance(case, samples=20_000, seed=9, shift_means=False)["gap"]
    assert centred.form_ppm == pytest.approx((stats.norm.sf(5.5) + stats.norm.cdf(-8)) * 1e6, rel=1e-6)


def test_undefined_responses_count_as_failures():
    # sqrt(a − b) < 0.2 ⇔ a − b < 0.04, undefined (NaN) when a − b < 0: all failures, so the
    # fallout is P(a − b < 0.04) with a − b normal (scipy.stats.norm)
    cs = [contributor("a", nominal=10.0, tolerance=0.3), contributor("b", nominal=9.0, tolerance=0.3)]
    case = make_case(cs, [Requirement(name="root", expression="sqrt(a - b)", lower=0.2)])
    check = verify_importance(case, samples=20_000, seed=10)["root"]
    exact = stats.norm.cdf((0.04 - 1.0) / math.hypot(0.1, 0.1)) * 1e6
    assert_estimate(check, exact)
    assert check.undefined_ppm > 0


def test_an_evaluator_with_a_closed_mask_plugs_in():
    # an evaluator returning (y, closed): assemblies that do not close are failures. Here
    # y = a with the upper limit at 5.5σ, and the assemblies with a beyond 5.2σ do not
    # close, so the fallout is P(z > 5.2) (scipy.stats.norm), not P(z > 5.5)
    cs = [contributor("a", nominal=10.0, tolerance=0.03), contributor("b", nominal=4.0, tolerance=0.06)]
    case = make_case(cs, [chain_requirement("gap", {"a": 1.0}, upper=10.0 + 5.5 * 0.01)])

    def evaluate(values):
        return values[:, 0], values[:, 0] < 10.0 + 5.2 * 0.01

    check = verify_importance(case, samples=20_000, seed=11, evaluators={"gap": evaluate})["gap"]
    assert_estimate(check, stats.norm.sf(5.2) * 1e6)
    assert check.undefined_ppm > 0


def test_an_unreachable_limit_has_zero_fallout_and_a_plain_monte_carlo_bound():
    # two uniforms on ±1: the sum never passes ±2; the upper bound with no failure drawn
    # is the Clopper–Pearson bound of plain sampling, 1 − 0.025^(1/N)
    cs = [contributor(n, nominal=1.0, tolerance=1.0, distribution="uniform") for n in "xy"]
    case = make_case(cs, [chain_requirement("s", {"x": 1, "y": 1}, lower=-0.5, upper=4.5)])
    check = verify_importance(case, samples=10_000, seed=12)["s"]
    assert check.fallout_ppm == 0 and check.form_ppm == 0 and check.hits == 0
    assert check.beta_upper == math.inf
    assert check.ci_high_ppm == pytest.approx((1 - 0.025 ** (1 / 10_000)) * 1e6, rel=1e-9)


def test_standard_space_maps_through_the_inverse_cdf():
    # u → x = F⁻¹(Φ(u)) (scipy.stats uniform and triang ppf); its derivative is
    # φ(u)/f(x) (inverse function rule, scipy.stats pdfs); the second derivative is
    # checked against central differences of the first
    space = StandardSpace(["normal", "uniform", "triangular"], [1, 1, 1], [0.3, 0.5, 0.4], [1 / 3, 0, 0], [0, 0, 0])
    u = np.array([[-2.5, 1.7, -3.1], [0.4, -6.0, 7.5], [1.2, 0.3, 0.8]])
    x = space.deviations(u)
    p = stats.norm.cdf(u)
    uniform, triangular = stats.uniform(loc=-0.5, scale=1.0), stats.triang(c=0.5, loc=-0.4, scale=0.8)
    assert np.allclose(x[:, 0], 0.1 * u[:, 0], rtol=1e-14)
    assert np.allclose(x[:, 1], uniform.ppf(p[:, 1]), rtol=1e-12, atol=1e-15)
    assert np.allclose(x[:, 2], triangular.ppf(p[:, 2]), rtol=1e-9, atol=1e-15)
    d1, d2 = space.derivatives(u)
    phi = stats.norm.pdf(u)
    assert np.allclose(d1[:, 0], 0.1, rtol=1e-14)
    assert np.allclose(d1[:, 1], phi[:, 1] / uniform.pdf(x[:, 1]), rtol=1e-12)
    assert np.allclose(d1[:, 2], phi[:, 2] / triangular.pdf(x[:, 2]), rtol=1e-6)
    h = 1e-5
    fd2 = (space.derivatives(u + h)[0] - space.derivatives(u - h)[0]) / (2 * h)
    assert np.allclose(d2, fd2, rtol=1e-5, atol=1e-12)


def test_importance_estimate_is_unbiased_without_any_aim():
    # with no centre every sample comes from the true distribution: plain Monte Carlo,
    # the estimate is the share of failures
    space = StandardSpace(["normal"], [1], [0.3], [1 / 3], [0.0])
    est = importance_estimate(space, lambda v: v[:, 0], None, 0.2, {}, samples=50_000, seed=13)
    assert est.probability * est.samples == est.hits
    assert est.ci_low <= stats.norm.sf(2.0) <= est.ci_high


def test_same_seed_same_numbers():
    upper = bilinear_limit(1e-6)
    a = verify_importance(bilinear_case(upper), samples=5000, seed=14)["preload"]
    b = verify_importance(bilinear_case(upper), samples=5000, seed=14)["preload"]
    c = verify_importance(bilinear_case(upper), samples=5000, seed=15)["preload"]
    assert a.fallout_ppm == b.fallout_ppm and a.ci_high_ppm == b.ci_high_ppm
    assert c.fallout_ppm != a.fallout_ppm


# ----------------------------------------------------------------- coverage of the interval


def coverage(case, name, exact_ppm, seeds, samples):
    inside = 0
    for seed in range(seeds):
        check = verify_importance(case, samples=samples, seed=1000 + seed)[name]
        inside += check.ci_low_ppm <= exact_ppm <= check.ci_high_ppm
    return inside


def assert_coverage(inside, seeds):
    # about 95 %: inside the central 99.9 % range of Binomial(seeds, 0.95)
    low, high = stats.binom.interval(0.999, seeds, 0.95)
    assert low <= inside <= high, (inside, seeds)


def test_interval_coverage_bilinear():
    upper = bilinear_limit(1e-9)
    assert_coverage(coverage(bilinear_case(upper), "preload", 1e-3, 200, 1000), 200)


def test_interval_coverage_linear_normal_two_sided():
    cs, chain, mean, sigma = normal_chain()
    case = make_case(cs, [chain_requirement("gap", chain, lower=mean - 6.2 * sigma, upper=mean + 5.8 * sigma)])
    exact = (stats.norm.cdf(-6.2) + stats.norm.sf(5.8)) * 1e6
    assert_coverage(coverage(case, "gap", exact, 200, 1000), 200)


@pytest.mark.slow
def test_interval_coverage_irwin_hall():
    cs = [contributor("u", nominal=0.0, tolerance=1.0, distribution="uniform", count=3)]
    x = Fraction(2997, 1000)
    case = make_case(cs, [chain_requirement("s", {"u": 1.0}, upper=float(2 * x - 3))])
    assert_coverage(coverage(case, "s", irwin_hall_sf(3, x) * 1e6, 300, 3000), 300)


# ----------------------------------------------------------------- library and command line


def test_response_evaluator_is_the_expression_and_the_chain():
    upper = bilinear_limit(1e-6)
    case = bilinear_case(upper)
    values = np.array([[2.0, 30.0, 20.0], [2.1, 29.0, 20.5]])
    assert np.allclose(response_evaluator(case, case.requirements[0])(values), [20.0, 2.1 * 8.5])


def test_result_tables_and_plot(tmp_path):
    from allocator.simulate import plot_verification

    cs, chain, mean, sigma = normal_chain()
    case = make_case(cs, [chain_requirement("gap", chain, lower=mean - 6 * sigma, upper=mean + 6 * sigma)])
    result = verify_importance(case, samples=5000, seed=16)
    frame = result.to_frame()
    assert list(frame.index) == ["gap"] and {"form_ppm", "sorm_ppm", "fallout_ppm"} <= set(frame.columns)
    assert "<table" in result._repr_html_()
    check = result["gap"]
    # the weighted density integrates to the probability inside its range (unbiased weights)
    area = float(np.sum(check.histogram_density * np.diff(check.histogram_edges)))
    assert area == pytest.approx(1.0, abs=0.02)
    exact_area = float(np.sum(check.exact_density * np.diff(check.histogram_edges)))
    assert exact_area == pytest.approx(1.0, abs=1e-6)
    assert plot_verification(result, tmp_path / "i.png").read_bytes().startswith(b"\x89PNG")


CASE_TOML = """\
# Invented case for tests.
title = "Invented spring preload"

[[contributor]]
name = "k"
nominal = 2.0
tolerance = 0.1
limits = [0.01, 0.2]
cost = { curve = "reciprocal", a = 1.0, b = 0.01 }

[[contributor]]
name = "L0"
nominal = 30.0
tolerance = 0.3
limits = [0.01, 0.5]
cost = { curve = "reciprocal", a = 1.0, b = 0.01 }

[[contributor]]
name = "L"
nominal = 20.0
tolerance = 0.2
limits = [0.01, 0.5]
distribution = "triangular"
cost = { curve = "reciprocal", a = 1.0, b = 0.01 }

[[requirement]]
name = "preload"
expression = "k * (L0 - L)"
lower = 18.0
upper = 22.5
fallout_ppm = 0.01
"""


def test_cli_method_importance_json_keys_and_table(tmp_path):
    path = tmp_path / "spring.toml"
    path.write_text(CASE_TOML)
    out = CliRunner().invoke(cli, ["verify", str(path), "--method", "importance", "--samples", "2e4",
                                   "--seed", "3", "--json", "--plot", str(tmp_path / "p.svg")])
    assert out.exit_code in (0, 1), out.output
    doc = json.loads(out.stdout)
    assert doc["method"] == "importance"
    (req,) = doc["requirements"]
    for key in ("name", "samples", "fallout_ppm", "ci_low_ppm", "ci_high_ppm", "method", "form_ppm", "sorm_ppm"):
        assert key in req
    assert req["samples"] == 20_000 and req["method"] == "importance"
    assert req["ci_low_ppm"] <= req["fallout_ppm"] <= req["ci_high_ppm"]
    assert (tmp_path / "p.svg").read_bytes().lstrip().startswith(b"<")
    table = CliRunner().invoke(cli, ["verify", str(path), "--method", "importance", "--samples", "2e4", "--seed", "3"])
    assert "FORM ppm" in table.output and "SORM ppm" in table.output
    assert "assume stable, capable processes" in table.output
    plain = CliRunner().invoke(cli, ["verify", str(path), "--samples", "2e4", "--seed", "3", "--json"])
    assert json.loads(plain.stdout)["method"] == "monte-carlo"


def test_cli_unknown_method_is_a_usage_error(tmp_path):
    path = tmp_path / "spring.toml"
    path.write_text(CASE_TOML)
    out = CliRunner().invoke(cli, ["verify", str(path), "--method", "magic"])
    assert out.exit_code == 2


def test_sorm_is_left_out_with_a_reason_when_the_hessian_would_be_too_wide(monkeypatch):
    # the x-space Hessian of an expression grows with the square of the contributors it
    # moves with; past the cap SORM is left out (with a note) and the sampling still holds
    import allocator.form as form

    monkeypatch.setattr(form, "MAX_HESSIAN_PARTS", 2)
    upper = bilinear_limit(1e-6)
    check = verify_importance(bilinear_case(upper), samples=20_000, seed=17)["preload"]
    assert check.sorm_ppm is None and "SORM left out" in check.form_note
    assert_estimate(check, 1.0)


def test_cli_importance_with_a_scheduler_is_one_usage_line(tmp_path):
    # --scheduler ships Monte Carlo blocks to a cluster; importance sampling runs here
    path = tmp_path / "spring.toml"
    path.write_text(CASE_TOML)
    out = CliRunner().invoke(cli, ["verify", str(path), "--method", "importance", "--scheduler", "tcp://127.0.0.1:1",
                                   "--plot", str(tmp_path / "p.svg")])
    assert out.exit_code == 2
    assert len(out.stderr.strip().splitlines()) == 1 and "--scheduler" in out.stderr
    assert not (tmp_path / "p.svg").exists()
