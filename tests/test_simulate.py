"""Monte Carlo verification and exact convolution, checked against independent references.

References used below: scipy.stats (norm, triang, chi2, lognorm, binomtest, kstest) and
scipy.integrate.quad as independent numerical libraries; closed forms named at each check.
"""

from __future__ import annotations

import json
import math
import tracemalloc

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import integrate, special, stats

from allocator import stack
from allocator.cli.main import cli
from allocator.convolve import linear_sum_distribution
from allocator.errors import CaseError, UsageError
from allocator.model import Requirement
from allocator.simulate import (
    clopper_pearson,
    plot_verification,
    render_verification_plot,
    sample_responses,
    verify,
)
from helpers import GAP_HALF, PROCESS_TOML, chain_requirement, contributor, gap_fallout_ppm, make_case

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def normal_chain_case(lower, upper, *, mean_shift=0.0, fallout_ppm=100.0):
    """Invented chain: 4 normal contributors, mixed signs, counts and cp."""
    cs = [
        contributor("a", nominal=30.0, tolerance=0.06, cp=1.0, mean_shift=mean_shift),
        contributor("b", nominal=10.0, tolerance=0.03, cp=1.33, count=2, mean_shift=mean_shift),
        contributor("c", nominal=5.0, tolerance=0.02, mean_shift=mean_shift),
        contributor("d", nominal=4.8, tolerance=0.04, cp=0.8, mean_shift=mean_shift),
    ]
    chain = {"a": 1.0, "b": -1.0, "c": -1.0, "d": 0.5}
    return make_case(cs, [chain_requirement("gap", chain, lower=lower, upper=upper, fallout_ppm=fallout_ppm)])


def normal_chain_reference():
    """Mean and σ of the chain above, by hand: σ_i = t/(3 cp), variance Σ n a² σ²."""
    mean = 30.0 - 2 * 10.0 - 5.0 + 0.5 * 4.8
    var = (0.06 / 3) ** 2 + 2 * (0.03 / (3 * 1.33)) ** 2 + (0.02 / 3) ** 2 + (0.5 * 0.04 / (3 * 0.8)) ** 2
    return mean, math.sqrt(var)


# ----------------------------------------------------------------- confidence interval


@pytest.mark.parametrize("k,n", [(0, 1000), (1, 1000), (37, 200_000), (500, 1000), (1000, 1000)])
def test_clopper_pearson_matches_scipy_binomtest(k, n):
    # Clopper & Pearson (1934), Biometrika 26(4):404-413; reference: scipy.stats.binomtest
    low, high = clopper_pearson(k, n)
    ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="exact")
    assert float(low) == pytest.approx(ref.low, rel=1e-9, abs=1e-15)
    assert float(high) == pytest.approx(ref.high, rel=1e-9, abs=1e-15)


# ----------------------------------------------------------------- normal chains


def test_normal_chain_monte_carlo_interval_contains_scipy_norm():
    mean, sigma = normal_chain_reference()
    lower, upper = mean - 2.6 * sigma, mean + 3.1 * sigma
    case = normal_chain_case(lower, upper)
    check = verify(case, samples=200_000, seed=2024)["gap"]
    # reference: scipy.stats.norm with σ computed by hand from σ_i = t/(3·cp)
    exact_ppm = (stats.norm.cdf(lower, mean, sigma) + stats.norm.sf(upper, mean, sigma)) * 1e6
    assert check.ci_low_ppm <= exact_ppm <= check.ci_high_ppm
    assert check.sigma == pytest.approx(sigma, rel=1e-12)
    assert check.std == pytest.approx(sigma, rel=0.01)
    assert check.rss_ppm == pytest.approx(exact_ppm, rel=1e-9)
    assert not check.model_disagrees


@pytest.mark.parametrize("z", [1.0, 3.0, 4.5, 5.5, 6.1])
def test_normal_chain_convolution_matches_scipy_norm_deep_in_the_tail(z):
    # reference: scipy.stats.norm; at z = 6.1 the tail is 5.3e-10 (5e-4 ppm)
    mean, sigma = normal_chain_reference()
    case = normal_chain_case(mean - z * sigma, None)
    lin = case.requirements[0]
    a = np.array([lin.chain[n] for n in case.names])
    dist = linear_sum_distribution(
        a, case.counts, case.current_tolerances, ["normal"] * 4, case.sigma_factors, mean=mean
    )
    below_ref = stats.norm.cdf(-z)
    assert dist.cdf(mean - z * sigma) == pytest.approx(below_ref, rel=1e-4, abs=1e-15)
    assert dist.sf(mean + z * sigma) == pytest.approx(below_ref, rel=1e-4, abs=1e-15)
    assert abs(dist.cdf(mean - z * sigma) - below_ref) * 1e6 < 1e-3


def test_uniform_plus_normal_convolution_matches_quadrature():
    # reference: P(y > u) = ∫ f_U(s) · P(N > u − s) ds by scipy.integrate.quad with
    # scipy.stats.norm.sf (an independent route to the same convolution integral)
    c, sigma = 0.2, 0.01  # uniform on ±0.2 plus a normal of σ = 0.01
    dist = linear_sum_distribution([1.0, 1.0], [1, 1], [c, 3 * sigma], ["uniform", "normal"], [0.0, 1 / 3])
    for u in (0.0, 0.15, 0.2, 0.23, 0.25):
        ref = integrate.quad(
            lambda s: stats.norm.sf(u - s, scale=sigma) / (2 * c),
            -c,
            c,
            points=[min(max(u - 6 * sigma, -c), c), min(u, c)],
            epsabs=1e-16,
            epsrel=1e-11,
            limit=400,
        )[0]
        assert dist.sf(u) == pytest.approx(ref, rel=1e-4)


# ----------------------------------------------------------------- triangular


def test_single_triangular_convolution_matches_scipy_triang():
    # reference: scipy.stats.triang(c=0.5) is the symmetric triangle on [loc, loc + scale]
    half = 0.4 * 0.25  # |coefficient| · t
    dist = linear_sum_distribution([-0.4], [1], [0.25], ["triangular"], [1 / math.sqrt(6)], mean=3.0)
    ref = stats.triang(0.5, loc=3.0 - half, scale=2 * half)
    for x in np.linspace(3.0 - 1.1 * half, 3.0 + 1.1 * half, 23):
        assert abs(dist.cdf(x) - ref.cdf(x)) < 1e-9
        assert abs(dist.sf(x) - ref.sf(x)) < 1e-9


def triangular_case():
    cs = [
        contributor("p", nominal=12.0, tolerance=0.05, distribution="triangular", count=2),
        contributor("q", nominal=8.0, tolerance=0.08, distribution="triangular"),
        contributor("r", nominal=15.5, tolerance=0.03, distribution="triangular"),
    ]
    chain = {"p": 1.0, "q": 1.0, "r": -2.0}
    return make_case(cs, [chain_requirement("fit", chain, lower=-7.15, upper=-6.88)])


def test_triangular_chain_monte_carlo_agrees_with_convolution():
    check = verify(triangular_case(), samples=200_000, seed=99)["fit"]
    assert check.convolution_ppm is not None
    assert check.ci_low_ppm <= check.convolution_ppm <= check.ci_high_ppm


def test_triangular_sample_passes_kolmogorov_smirnov():
    # reference: scipy.stats.triang through scipy.stats.kstest
    cs = [contributor("p", nominal=2.0, tolerance=0.1, distribution="triangular")]
    case = make_case(cs, [chain_requirement("y", {"p": 1.0}, upper=3.0)])
    y = sample_responses(case, samples=20_000, seed=8)["y"]
    assert stats.kstest(y, stats.triang(0.5, loc=1.9, scale=0.2).cdf).pvalue > 0.001


# ----------------------------------------------------------------- nonlinear responses


def test_square_of_a_centred_normal_is_caught_by_monte_carlo():
    # y = x², x ~ N(0, σ): the linearisation has slope 0 (predicts no spread at all);
    # the truth is y/σ² ~ χ²(1) (reference: scipy.stats.chi2)
    sigma = 0.1
    cs = [contributor("x", nominal=0.0, tolerance=3 * sigma)]
    req = Requirement(name="power", expression="x**2", upper=0.02, fallout_ppm=1000.0)
    check = verify(make_case(cs, [req]), samples=200_000, seed=3)["power"]
    exact_ppm = stats.chi2.sf(0.02 / sigma**2, df=1) * 1e6
    assert check.ci_low_ppm <= exact_ppm <= check.ci_high_ppm
    assert check.rss_ppm == 0.0
    assert check.model_disagrees
    assert check.convolution_ppm is None
    assert "nonlinear" in check.convolution_note
    assert check.status == "fail"


def test_exponential_of_a_wide_normal_matches_lognormal():
    # y = exp(x), x ~ N(0, 0.5²): y is lognormal (reference: scipy.stats.lognorm); the
    # linearised normal prediction is far off and flagged
    cs = [contributor("x", nominal=0.0, tolerance=1.5, limits=(0.1, 2.0))]
    req = Requirement(name="gain", expression="exp(x)", lower=0.5, upper=2.5, fallout_ppm=50_000)
    check = verify(make_case(cs, [req]), samples=200_000, seed=17)["gain"]
    ln = stats.lognorm(s=0.5)
    exact_ppm = (ln.cdf(0.5) + ln.sf(2.5)) * 1e6
    assert check.ci_low_ppm <= exact_ppm <= check.ci_high_ppm
    assert not check.ci_low_ppm <= check.rss_ppm <= check.ci_high_ppm
    assert check.model_disagrees
    assert check.convolution_ppm is None


def test_undefined_responses_count_as_failures():
    # sqrt of a value that is negative half of the time: P = 1/2 exactly (symmetry)
    cs = [contributor("x", nominal=0.0, tolerance=0.3)]
    req = Requirement(name="root", expression="sqrt(x)", upper=10.0)
    check = verify(make_case(cs, [req]), samples=20_000, seed=1)["root"]
    assert check.undefined > 0
    assert check.ci_low_ppm <= 0.5e6 <= check.ci_high_ppm
    total = check.histogram_counts.sum() + check.underflow + check.overflow + check.undefined
    assert total == check.samples


# ----------------------------------------------------------------- mean shift


def test_mean_shift_simulation_matches_worst_mean_fallout():
    mean, sigma = normal_chain_reference()
    lower, upper = mean - 3.3 * sigma, mean + 2.9 * sigma  # upper limit is nearer: s = +1
    case = normal_chain_case(lower, upper, mean_shift=0.5)
    check = verify(case, samples=200_000, seed=7)["gap"]
    # shift by hand: δ = Σ n |a| m t
    delta = 0.5 * (0.06 + 2 * 0.03 + 0.02 + 0.5 * 0.04)
    assert check.shift_side == 1
    assert check.shifted_mean == pytest.approx(mean + delta, rel=1e-12)
    below, above, worst = stack.worst_mean_fallout(mean, delta, sigma, lower, upper)
    assert worst == pytest.approx(mean + delta)
    # reference: scipy.stats.norm at the shifted mean
    ref_ppm = (stats.norm.cdf(lower, mean + delta, sigma) + stats.norm.sf(upper, mean + delta, sigma)) * 1e6
    assert (below + above) * 1e6 == pytest.approx(ref_ppm, rel=1e-9)
    assert check.mean_shift_ppm == pytest.approx(ref_ppm, rel=1e-9)
    assert check.ci_low_ppm <= ref_ppm <= check.ci_high_ppm
    assert check.convolution_ppm == pytest.approx(ref_ppm, rel=1e-6)
    assert check.mean == pytest.approx(mean + delta, abs=4 * sigma / math.sqrt(200_000))


def test_mean_shift_side_follows_the_nearer_limit_and_can_be_turned_off():
    mean, sigma = normal_chain_reference()
    case = normal_chain_case(mean - 2.5 * sigma, mean + 4.0 * sigma, mean_shift=0.3)
    shifted = verify(case, samples=20_000, seed=1)["gap"]
    assert shifted.shift_side == -1 and shifted.shifted_mean < mean
    centred = verify(case, samples=20_000, seed=1, shift_means=False)["gap"]
    assert centred.shift_side == 0 and centred.mean_shift_ppm is None
    assert centred.shifted_mean == pytest.approx(mean)


def test_rss_allocation_verified_with_mean_shifts_says_why_and_what_to_run():
    from allocator.solve import allocate

    mean, sigma = normal_chain_reference()
    case = normal_chain_case(mean - 0.2, mean + 0.2, mean_shift=0.5, fallout_ppm=100.0)
    alloc = allocate(case, "rss")
    assert alloc.success
    t = dict(alloc.tolerances)
    shifted = verify(case, t, samples=20_000, seed=5, allocated_with="rss")
    check = shifted["gap"]
    # why it can fail: the rss allocation meets 100 ppm with centred means (scipy.stats.norm at
    # ȳ), but the simulated means sit δ = Σ n|a| m t off, where the fallout is far larger
    a, n = np.array([1.0, -1.0, -1.0, 0.5]), np.array([1, 2, 1, 1])
    tv = np.array([t[k] for k in "abcd"])
    cp = np.array([1.0, 1.33, 1.0, 0.8])
    sigma_y = math.sqrt(np.sum(n * (a * tv / (3 * cp)) ** 2))
    delta = float(np.sum(n * np.abs(a) * 0.5 * tv))
    centred_ppm = (stats.norm.cdf(mean - 0.2, mean, sigma_y) + stats.norm.sf(mean + 0.2, mean, sigma_y)) * 1e6
    shifted_ppm = (stats.norm.cdf(mean - 0.2, mean + check.shift_side * delta, sigma_y)
                   + stats.norm.sf(mean + 0.2, mean + check.shift_side * delta, sigma_y)) * 1e6
    assert centred_ppm == pytest.approx(100.0, rel=1e-4)
    assert check.rss_ppm == pytest.approx(centred_ppm, rel=1e-6)
    assert check.mean_shift_ppm == pytest.approx(shifted_ppm, rel=1e-6) and shifted_ppm > 10 * 100.0
    # ... and the result says so, in a field every output can show
    note = shifted.assumption_note
    assert "places the case's mean shifts (a, b, c, d)" in note and "gap" in note
    assert "rss allocation did not assume" in note
    assert "--centred" in note and "--model mean-shift" in note
    assert shifted.to_dict()["assumption_note"] == note and "\n" not in note
    assert "note:" in repr(shifted)
    # nothing to say when the simulation matches the model's assumptions
    assert verify(case, t, samples=2_000, seed=5, allocated_with="rss", shift_means=False).assumption_note == ""
    assert verify(case, t, samples=2_000, seed=5, allocated_with="mean-shift").assumption_note == ""
    assert verify(case, t, samples=2_000, seed=5).assumption_note == ""
    no_shift = normal_chain_case(mean - 0.2, mean + 0.2, fallout_ppm=100.0)
    assert verify(no_shift, t, samples=2_000, seed=5, allocated_with="rss").assumption_note == ""


# ----------------------------------------------------------------- reproducibility, memory


def test_same_seed_same_numbers_and_chunk_size_does_not_matter():
    mean, sigma = normal_chain_reference()
    cs = list(normal_chain_case(0, 1).contributors) + [
        contributor("e", nominal=1.0, tolerance=0.02, distribution="uniform", count=3),
        contributor("f", nominal=2.0, tolerance=0.01, distribution="triangular"),
    ]
    reqs = [
        chain_requirement("gap", {"a": 1.0, "b": -1.0, "e": 1.0, "f": -1.0}, lower=mean - 0.05, upper=mean + 0.04),
        Requirement(name="ratio", expression="a / (c + f)", lower=4.26, upper=4.31),
    ]
    case = make_case(cs, reqs)
    samples = 150_001  # not a whole number of blocks
    base = verify(case, samples=samples, seed=42).to_dict()
    again = verify(case, samples=samples, seed=42).to_dict()
    assert base == again
    for chunk in (1, 70_000, 2**17, 10**6):
        other = verify(case, samples=samples, seed=42, chunk_size=chunk).to_dict()
        other.pop("chunk_size"), base.pop("chunk_size", None)
        assert other == base
    different = verify(case, samples=samples, seed=43).to_dict()
    assert different["requirements"][0]["mean"] != base["requirements"][0]["mean"]


def test_verification_results_are_frozen():
    import dataclasses

    cs = [contributor("a", nominal=10.0, tolerance=0.03), contributor("b", nominal=5.0, tolerance=0.03)]
    case = make_case(cs, [chain_requirement("gap", {"a": 1, "b": -1}, lower=4.9, upper=5.1)])
    result = verify(case, samples=2000, seed=3)
    for obj, name in ((result, "status"), (result, "requirements"), (result["gap"], "status"),
                      (result["gap"], "fallout_ppm")):
        with pytest.raises(dataclasses.FrozenInstanceError):
            setattr(obj, name, None)


def test_seed_is_generated_and_reported_when_not_given():
    case = normal_chain_case(-1.0, 1.0)
    first = verify(case, samples=5_000)
    repeat = verify(case, samples=5_000, seed=first.seed)
    assert first.requirements[0].mean == repeat.requirements[0].mean
    assert first.requirements[0].std == repeat.requirements[0].std


def test_chunked_run_memory_stays_bounded():
    n = 10
    cs = [contributor(f"c{i}", nominal=1.0, tolerance=0.01) for i in range(n)]
    case = make_case(cs, [chain_requirement("s", {f"c{i}": 1.0 for i in range(n)}, lower=9.95, upper=10.05)])
    samples = 2_000_000
    everything = samples * n * 8  # what holding all draws at once would take [bytes]
    tracemalloc.start()
    try:
        verify(case, samples=samples, seed=1, chunk_size=2**16)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < everything / 10


def test_unknown_contributor_in_tolerances_is_a_usage_error_with_a_hint():
    # a misspelt name is a wrong argument of a library call, as in analyze and allocate
    case = normal_chain_case(-1.0, 1.0)
    with pytest.raises(UsageError, match=r"^tolerances: unknown contributor 'aa' \(did you mean 'a'\?\)$"):
        verify(case, {"aa": 0.1, "b": 0.03}, samples=1000)
    with pytest.raises(UsageError, match=r"^tolerances: unknown contributor 'zz'$"):  # nothing close: no hint
        verify(case, {"zz": 0.1}, samples=1000)


def test_tolerance_validation():
    case = normal_chain_case(-1.0, 1.0)
    with pytest.raises(CaseError, match="tolerances.a"):
        verify(case, {"a": -0.1}, samples=1000)
    with pytest.raises(CaseError, match="tolerances.b"):
        verify(case, {"b": float("nan")}, samples=1000)
    loose = verify(case, {"a": 0.5}, samples=1000, seed=1)
    assert loose.tolerances["a"] == 0.5 and loose.tolerances["b"] == 0.03


def test_histogram_and_plot(tmp_path):
    mean, sigma = normal_chain_reference()
    case = normal_chain_case(mean - 3 * sigma, mean + 3 * sigma)
    result = verify(case, samples=20_000, seed=4)
    check = result["gap"]
    assert check.histogram_counts.sum() + check.underflow + check.overflow == 20_000
    assert len(check.histogram_edges) == len(check.histogram_counts) + 1
    frame = result.to_frame()
    assert list(frame.index) == ["gap"] and frame.index.name == "requirement"
    assert "<table" in result._repr_html_()
    png = plot_verification(result, tmp_path / "h.png")
    assert png.read_bytes().startswith(PNG_MAGIC)
    svg = render_verification_plot(result, "svg")
    assert b"<svg" in svg[:500]
    with pytest.raises(ValueError):
        render_verification_plot(result, "jpg")



def test_the_histogram_is_drawn_by_the_plotting_module():
    # one module draws every figure: allocator.plots; the density bars integrate to the
    # share of samples inside the histogram range (definition of a density)
    from allocator.plots import verification_figure

    mean, sigma = normal_chain_reference()
    result = verify(normal_chain_case(mean - 3 * sigma, mean + 3 * sigma), samples=20_000, seed=4)
    figure = verification_figure(result)
    (ax,) = figure.axes
    assert ax.get_title().startswith("gap: ")
    check = result["gap"]
    widths = np.diff(check.histogram_edges)
    area = float(np.sum(check.histogram_counts / (check.samples * widths) * widths))
    assert area == pytest.approx(1 - (check.underflow + check.overflow) / check.samples, rel=1e-12)
    bars = ax.patches[0].get_path().vertices  # the stairs: its top edge is the density
    assert bars[:, 1].max() == pytest.approx(float(np.max(check.histogram_counts / (check.samples * widths))))


def test_the_plot_overlays_the_exact_density_of_a_chain():
    # the check carries the convolved density averaged over each histogram bin: for a
    # normal chain that is the normal CDF difference over the bin (scipy.stats.norm), and
    # the figure draws it as the "exact (convolution)" line; an expression has none
    from allocator.plots import verification_figure

    mean, sigma = normal_chain_reference()
    result = verify(normal_chain_case(mean - 3 * sigma, mean + 3 * sigma), samples=20_000, seed=4)
    check = result["gap"]
    edges = check.histogram_edges
    expected = np.diff(stats.norm.cdf(edges, mean, sigma)) / np.diff(edges)
    assert np.allclose(check.exact_density, expected, rtol=1e-9, atol=1e-9 * expected.max())
    (ax,) = verification_figure(result).axes
    assert "exact (convolution)" in [t.get_text() for t in ax.get_legend().get_texts()]
    cs = [contributor("r", nominal=2.0, tolerance=0.1)]
    nonlinear = make_case(cs, [Requirement(name="sq", expression="r * r", upper=4.5)])
    assert verify(nonlinear, samples=2000, seed=1)["sq"].exact_density is None


def test_bin_probabilities_of_a_normal_plus_uniform_chain_match_quadrature():
    # density of N(0, σ²) + U(−c, c): (Φ((x + c)/σ) − Φ((x − c)/σ)) / 2c, integrated over
    # each bin by scipy.integrate.quad
    sigma, c = 0.01, 0.05
    dist = linear_sum_distribution([1, 1], [1, 1], [0.03, c], ["normal", "uniform"], [1 / 3, 0], mean=1.0)
    edges = np.linspace(0.9, 1.1, 41)

    def density(x):
        return (stats.norm.cdf((x - 1.0 + c) / sigma) - stats.norm.cdf((x - 1.0 - c) / sigma)) / (2 * c)

    expected = [integrate.quad(density, a, b, epsabs=1e-14)[0] for a, b in zip(edges[:-1], edges[1:])]
    assert np.allclose(dist.bin_probabilities(edges), expected, rtol=1e-6, atol=1e-12)


# ----------------------------------------------------------------- command line

CASE_TOML = """\
# Invented case for tests.
title = "Invented slide fit"

[[contributor]]
name = "rail"
nominal = 40.0
tolerance = 0.05
limits = [0.005, 0.2]
cost = {{ curve = "reciprocal", a = 1.0, b = 0.01 }}

[[contributor]]
name = "carriage"
nominal = 39.8
tolerance = 0.04
limits = [0.005, 0.2]
distribution = "uniform"
cost = {{ curve = "reciprocal", a = 1.0, b = 0.01 }}

[[requirement]]
name = "clearance"
chain = {{ rail = 1, carriage = -1 }}
lower = {lower}
upper = 0.35
fallout_ppm = 100
"""


@pytest.fixture
def case_file(tmp_path):
    path = tmp_path / "slide.toml"
    path.write_text(CASE_TOML.format(lower=0.05))
    return path


def run(*args):
    return CliRunner().invoke(cli, ["verify", *map(str, args)])


def test_cli_json_keys(case_file):
    out = run(case_file, "--samples", "2e4", "--seed", "3", "--json")
    assert out.exit_code == 0, out.output
    doc = json.loads(out.output)
    assert doc["seed"] == 3
    for req in doc["requirements"]:
        assert {"name", "samples", "fallout_ppm", "ci_low_ppm", "ci_high_ppm"} <= set(req)
        assert req["samples"] == 20_000


def test_cli_tolerances_file_good_and_bad(case_file, tmp_path):
    good = tmp_path / "alloc.json"
    good.write_text(json.dumps({"results": [{"model": "rss", "status": "optimal", "total_cost": 3.0, "tolerances": {"rail": 0.03, "carriage": 0.03}}]}))
    out = run(case_file, "--tolerances", good, "--samples", "1e4", "--seed", "1", "--json")
    assert out.exit_code == 0, out.output
    assert json.loads(out.output)["tolerances"] == {"rail": 0.03, "carriage": 0.03}

    plain = tmp_path / "plain.json"
    plain.write_text(json.dumps({"rail": 0.02}))
    out = run(case_file, "--tolerances", plain, "--samples", "1e4", "--json")
    assert out.exit_code == 0, out.output
    assert json.loads(out.output)["tolerances"]["rail"] == 0.02

    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"results": [{"model": "rss", "tolerances": {"rial": 0.03}}]}))
    out = run(case_file, "--tolerances", bad, "--samples", "1e4")
    assert out.exit_code == 2
    assert "results[0].tolerances.rial" in out.output and "did you mean 'rail'" in out.output
    assert "Traceback" not in out.output

    negative = tmp_path / "neg.json"
    negative.write_text(json.dumps({"rail": 0.0}))
    out = run(case_file, "--tolerances", negative)
    assert out.exit_code == 2 and "neg.json: rail:" in out.output

    two = tmp_path / "two.json"
    two.write_text(json.dumps({"results": [
        {"model": "worst-case", "tolerances": {"rail": 0.01}},
        {"model": "rss", "tolerances": {"rail": 0.02}},
    ]}))
    out = run(case_file, "--tolerances", two, "--samples", "1e4")
    assert out.exit_code == 2 and "--model" in out.output
    out = run(case_file, "--tolerances", two, "--model", "rss", "--samples", "1e4", "--json")
    assert out.exit_code == 0, out.output
    assert json.loads(out.output)["tolerances"]["rail"] == 0.02


def test_cli_plot_writes_png(case_file, tmp_path):
    target = tmp_path / "hist.png"
    out = run(case_file, "--samples", "1e4", "--seed", "2", "--plot", target)
    assert out.exit_code == 0, out.output
    assert target.read_bytes()[:8] == PNG_MAGIC
    out = run(case_file, "--samples", "1e4", "--plot", tmp_path / "hist.jpg")
    assert out.exit_code == 2
    before = case_file.read_bytes()
    out = run(case_file, "--samples", "1e4", "--plot", case_file)
    assert out.exit_code == 2 and case_file.read_bytes() == before


def test_cli_exit_1_when_target_exceeded(tmp_path):
    path = tmp_path / "tight.toml"
    path.write_text(CASE_TOML.format(lower=0.19))  # nominal clearance 0.2: about half fail
    out = run(path, "--samples", "2e4", "--seed", "1")
    assert out.exit_code == 1
    assert "fail" in out.output
    # the verdict and its reason once, in the output; stderr one short line
    assert "result: fail - fallout above target" in out.stdout
    assert out.stderr == "error: verification: fallout above target for clearance\n"


def test_cli_rss_allocation_with_mean_shifts_explains_itself(tmp_path):
    path = tmp_path / "shifted.toml"
    text = CASE_TOML.format(lower=0.05).replace(
        'name = "rail"\nnominal = 40.0\n', 'name = "rail"\nnominal = 40.0\nmean_shift = 0.8\n'
    )
    assert "mean_shift = 0.8" in text
    path.write_text(text)
    out = run(path, "--model", "rss", "--samples", "2e4", "--seed", "4")
    assert out.exit_code in (0, 1), out.output
    assert "note: the simulation places the case's mean shifts (rail)" in out.output
    assert "rss allocation did not assume" in out.output and "--centred" in out.output
    doc = json.loads(run(path, "--model", "rss", "--samples", "2e4", "--seed", "4", "--json").stdout)
    assert "--centred" in doc["assumption_note"] and doc["allocated_with"] == "rss"
    centred = run(path, "--model", "rss", "--samples", "2e4", "--seed", "4", "--centred")
    assert "note:" not in centred.output
    own = run(path, "--model", "mean-shift", "--samples", "2e4", "--seed", "4")
    assert "note:" not in own.output and "mean shifts placed on the worse side" in own.output


def test_cli_sample_bounds(case_file):
    assert run(case_file, "--samples", "999").exit_code == 2
    assert run(case_file, "--samples", "2e9").exit_code == 2
    assert run(case_file, "--samples", "abc").exit_code == 2
    assert run(case_file, "--seed", "-4", "--samples", "1e3").exit_code == 2
    for bad in ("2.5", "-1"):
        out = run(case_file, "--samples", bad)
        assert out.exit_code == 2 and out.stderr.startswith("error: --samples: ") and out.stderr.count("\n") == 1


def test_report_and_verify_share_one_samples_type():
    from allocator.cli.common import SampleCount
    from allocator.cli.report import report
    from allocator.cli.verify import verify as verify_command

    for command in (report, verify_command):
        option = next(p for p in command.params if p.name == "samples")
        assert isinstance(option.type, SampleCount)
    assert SampleCount().convert("2e5", None, None) == 200_000


def test_special_ndtr_is_the_normal_cdf_used():
    # guard for the reference itself: scipy.special.ndtr agrees with scipy.stats.norm
    assert special.ndtr(-6.1) == pytest.approx(stats.norm.cdf(-6.1), rel=1e-12)


# ----------------------------------------------------------------- the process that makes a part
# PROCESS_TOML (tests/helpers.py): an invented bore, turned (the contributor's cp 1.0) or
# ground (cp 1.67), and a pin; references from scipy.stats.norm with σ_i = t_i/(3·cp_i).


def process_case():
    from allocator.case import loads_case

    return loads_case(PROCESS_TOML)


def test_verify_simulates_the_cp_of_the_process_it_is_told():
    case = process_case()
    t_bore, t_pin = 0.038, 0.02  # both processes make ±0.038; turning is the cheaper
    ground = gap_fallout_ppm(t_bore, 1.67, t_pin)
    default = gap_fallout_ppm(t_bore, 1.0, t_pin)
    assert default > 10 * ground  # about 36 000 ppm against about 3 000 ppm
    check = verify(case, {"bore": t_bore}, processes={"bore": "grinding"}, samples=200_000, seed=31)["gap"]
    assert check.ci_low_ppm <= ground <= check.ci_high_ppm
    assert not check.ci_low_ppm <= default <= check.ci_high_ppm
    # an all-normal chain: the convolution and the rss prediction are exact
    assert check.convolution_ppm == pytest.approx(ground, rel=1e-9)
    assert check.rss_ppm == pytest.approx(ground, rel=1e-9)
    assert check.sigma == pytest.approx(math.hypot(t_bore / (3 * 1.67), t_pin / 3), rel=1e-12)
    # the same draws for sample_responses: its fallout is the verification's
    y = sample_responses(case, {"bore": t_bore}, processes={"bore": "grinding"}, samples=20_000, seed=31)["gap"]
    short = verify(case, {"bore": t_bore}, processes={"bore": "grinding"}, samples=20_000, seed=31)["gap"]
    assert np.count_nonzero(np.abs(y - 0.1) > GAP_HALF) == short.failures


def test_a_tolerance_no_process_was_chosen_for_is_made_by_the_cheapest_that_holds_it():
    case = process_case()
    # ±0.038: both make it, turning is cheaper there (0.1 + 0.01/0.038 < 0.5 + 0.01/0.038)
    both = verify(case, {"bore": 0.038}, samples=1000, seed=1)["gap"]
    assert both.convolution_ppm == pytest.approx(gap_fallout_ppm(0.038, 1.0, 0.02), rel=1e-9)
    # ±0.012: only grinding makes it, so the part has grinding's cp
    ground = verify(case, {"bore": 0.012}, samples=1000, seed=1)["gap"]
    assert ground.convolution_ppm == pytest.approx(gap_fallout_ppm(0.012, 1.67, 0.02), rel=1e-9)
    assert case.making_processes([0.038, 0.02]) == ("turning", "")
    assert case.making_processes([0.012, 0.02]) == ("grinding", "")
    # analyze follows the same rule and takes a chosen process too
    from allocator.analysis import analyze

    assert analyze(case, {"bore": 0.012}).requirements[0].fallout_ppm == pytest.approx(
        gap_fallout_ppm(0.012, 1.67, 0.02), rel=1e-9
    )
    chosen = analyze(case, {"bore": 0.038}, processes={"bore": "grinding"}).requirements[0]
    assert chosen.fallout_ppm == pytest.approx(gap_fallout_ppm(0.038, 1.67, 0.02), rel=1e-9)


def test_verify_of_an_allocation_simulates_the_processes_it_chose():
    from allocator.solve import allocate

    case = process_case()
    allocation = allocate(case, "rss")
    assert allocation.success
    # turning cannot go below ±0.035, which the 2700 ppm target needs: grinding is chosen
    assert allocation.processes["bore"] == "grinding"
    t = dict(allocation.tolerances)
    ground = gap_fallout_ppm(t["bore"], 1.67, t["pin"])
    default = gap_fallout_ppm(t["bore"], 1.0, t["pin"])
    assert default > 4 * ground  # about 16 000 ppm against the 2700 ppm target
    result = verify(case, allocation, samples=200_000, seed=5)
    check = result["gap"]
    assert result.allocated_with == "rss"
    assert check.ci_low_ppm <= ground <= check.ci_high_ppm
    assert not check.ci_low_ppm <= default <= check.ci_high_ppm
    assert check.convolution_ppm == pytest.approx(ground, rel=1e-9)
    # the same through the tolerances and processes given apart
    apart = verify(case, t, processes=allocation.processes, samples=200_000, seed=5)["gap"]
    assert apart.failures == check.failures


def test_a_chosen_process_must_exist_and_make_the_tolerance():
    case = process_case()
    with pytest.raises(CaseError, match=r"processes\.bore: no process 'honing'"):
        verify(case, {"bore": 0.038}, processes={"bore": "honing"}, samples=1000)
    with pytest.raises(CaseError, match=r"processes\.bore: process 'grinding' makes ±0.004 to ±0.04, not ±0.05"):
        verify(case, processes={"bore": "grinding"}, samples=1000)
    with pytest.raises(CaseError, match=r"processes\.pin: 'pin' has no process entries"):
        verify(case, processes={"pin": "turning"}, samples=1000)
    with pytest.raises(CaseError, match=r"processes\.nut: unknown contributor"):
        verify(case, processes={"nut": "turning"}, samples=1000)


def test_cli_verify_reads_the_chosen_process_from_the_allocation(tmp_path):
    path = tmp_path / "bore.toml"
    path.write_text(PROCESS_TOML)
    alloc = tmp_path / "alloc.json"
    done = CliRunner().invoke(cli, ["allocate", str(path), "--model", "rss", "--json"])
    assert done.exit_code == 0, done.output
    alloc.write_text(done.stdout)
    t = json.loads(done.stdout)["results"][0]["tolerances"]
    ground = gap_fallout_ppm(t["bore"], 1.67, t["pin"])
    for args in (["--tolerances", alloc], ["--model", "rss"]):
        out = run(path, *args, "--samples", "1e4", "--seed", "2", "--json")
        assert out.exit_code in (0, 1), out.output
        doc = json.loads(out.stdout)
        assert doc["processes"] == {"bore": "grinding"}
        assert doc["requirements"][0]["convolution_ppm"] == pytest.approx(ground, rel=1e-9)
    human = run(path, "--model", "rss", "--samples", "1e4", "--seed", "2")
    assert "bore by grinding" in human.output

    # a plain map carries no process: the cheapest that holds the tolerance (grinding here)
    plain = tmp_path / "plain.json"
    plain.write_text(json.dumps(t))
    doc = json.loads(run(path, "--tolerances", plain, "--samples", "1e4", "--json").stdout)
    assert doc["processes"] == {"bore": "grinding"}

    # a process the file names that cannot make the tolerance: one line naming the field
    document = json.loads(alloc.read_text())
    document["results"][0]["tolerances"]["bore"] = 0.1
    edited = tmp_path / "edited.json"
    edited.write_text(json.dumps(document))
    out = run(path, "--tolerances", edited, "--samples", "1e4")
    assert out.exit_code == 2
    assert out.stderr.count("\n") == 1 and "Traceback" not in out.output
    assert "edited.json: results[0].contributors[0].process: process 'grinding' makes" in out.stderr
