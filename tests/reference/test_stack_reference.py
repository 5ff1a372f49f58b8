"""Stack models checked against scipy.stats, closed forms and common-practice numbers."""

import math

import numpy as np
import pytest
from scipy import stats

from allocator import stack


@pytest.mark.parametrize(
    "mean, sigma, lower, upper",
    [
        (0.0, 1.0, -3.0, 3.0),  # centred, two-sided
        (0.1, 0.05, -0.02, 0.25),  # asymmetric placement of the nominal
        (10.0, 0.2, None, 10.5),  # one-sided upper
        (10.0, 0.2, 9.3, None),  # one-sided lower
        (5.0, 1e-3, 4.99, 5.02),  # tight sigma, far tails
    ],
)
def test_normal_fallout_matches_scipy_norm(mean, sigma, lower, upper):
    below, above = stack.normal_fallout(mean, sigma, lower, upper)
    ref_below = 0.0 if lower is None else stats.norm.cdf(lower, loc=mean, scale=sigma)
    ref_above = 0.0 if upper is None else stats.norm.sf(upper, loc=mean, scale=sigma)
    assert below == pytest.approx(ref_below, rel=1e-12, abs=1e-300)
    assert above == pytest.approx(ref_above, rel=1e-12, abs=1e-300)


def test_three_sigma_limits_give_2700_ppm():
    # common practice: ±3σ limits leave about 2700 ppm (0.27 %), half on each side
    below, above = stack.normal_fallout(0.0, 1.0, -3.0, 3.0)
    assert (below + above) * 1e6 == pytest.approx(2700, rel=0.015)
    assert below == pytest.approx(above, rel=1e-12)


def test_six_sigma_limits_give_about_0002_ppm():
    # common practice: ±6σ (centred) leaves about 0.002 ppm
    below, above = stack.normal_fallout(0.0, 1.0, -6.0, 6.0)
    assert (below + above) * 1e6 == pytest.approx(0.002, rel=0.02)


def test_tolerance_of_six_sigma_means_sigma_is_t_over_3():
    # common practice: a ± tolerance band of width 6σ (cp = 1) means σ = t / 3
    from allocator.model import sigma_factor

    t = 0.06
    assert sigma_factor("normal", 1.0) * t == pytest.approx(t / 3)
    assert 2 * t == pytest.approx(6 * sigma_factor("normal", 1.0) * t)
    # cp = 1.33: the band is ±4σ
    assert sigma_factor("normal", 4 / 3) * t == pytest.approx(t / 4)
    # uniform on ±t has σ = t/√3, triangular σ = t/√6 (compare scipy.stats)
    assert sigma_factor("uniform") * t == pytest.approx(stats.uniform(loc=-t, scale=2 * t).std())
    assert sigma_factor("triangular") * t == pytest.approx(stats.triang(0.5, loc=-t, scale=2 * t).std())


def test_worst_case_by_hand():
    # invented 4-contributor chain: y = A - B - 2·C + 0.5·D, with C counted twice
    a = np.array([1.0, -1.0, -2.0, 0.5])
    n = np.array([1, 1, 2, 1])
    t = np.array([0.10, 0.05, 0.02, 0.04])
    # by hand: 1·0.10 + 1·0.05 + 2·2·0.02 + 0.5·0.04 = 0.10 + 0.05 + 0.08 + 0.02 = 0.25
    assert stack.worst_case_half_width(a, n, t) == pytest.approx(0.25)
    lo, hi = stack.worst_case_range(1.0, a, n, t)
    assert (lo, hi) == pytest.approx((0.75, 1.25))


def test_variance_additivity_against_simulation():
    # independent contributors: σ_y² = Σ n (a σ)²; compare with a large seeded simulation
    rng = np.random.default_rng(20261202)
    a = np.array([1.0, -1.0, 0.5, 2.0])
    n = np.array([1, 3, 1, 2])
    sigma = np.array([0.02, 0.01, 0.05, 0.004])
    samples = 400_000
    y = np.zeros(samples)
    for ai, ni, si in zip(a, n, sigma):
        y += ai * rng.normal(0.0, si, size=(samples, ni)).sum(axis=1)
    predicted = stack.rss_sigma(a, n, sigma)
    # the sample σ of N normals has standard error ≈ σ/√(2N); allow 5 standard errors
    assert abs(y.std(ddof=1) - predicted) < 5 * predicted / math.sqrt(2 * samples)


@pytest.mark.parametrize(
    "mean, p, lower, upper",
    [(0.0, 0.0027, -3.0, 3.0), (0.1, 1e-4, -0.3, 0.35), (2.0, 1e-6, None, 2.5), (2.0, 1e-6, 1.2, None), (0.3, 0.01, 0.0, 0.31)],
)
def test_sigma_limit_round_trip_with_scipy(mean, p, lower, upper):
    s = stack.sigma_limit(mean, p, lower, upper)
    total = (0 if lower is None else stats.norm.cdf(lower, mean, s)) + (0 if upper is None else stats.norm.sf(upper, mean, s))
    assert total == pytest.approx(p, rel=1e-9)


def test_sigma_limit_one_sided_closed_form():
    # one-sided: σ_max = (U − μ) / z_{1−p} with z from scipy.stats.norm.isf
    assert stack.sigma_limit(1.0, 1e-4, None, 1.3) == pytest.approx(0.3 / stats.norm.isf(1e-4), rel=1e-13)


def test_sigma_limit_zero_when_mean_outside():
    assert stack.sigma_limit(1.0, 1e-3, 0.0, 0.9) == 0.0


def test_worst_mean_fallout_picks_band_end_nearest_a_limit():
    # mean band [0.1 − 0.05, 0.1 + 0.05]; the upper limit is nearer, so the worst mean is 0.15
    below, above, mu = stack.worst_mean_fallout(0.1, 0.05, 0.04, -0.2, 0.3)
    assert mu == pytest.approx(0.15)
    assert below + above == pytest.approx(stats.norm.cdf(-0.2, 0.15, 0.04) + stats.norm.sf(0.3, 0.15, 0.04))
    # with no shift it is plain rss
    assert stack.worst_mean_fallout(0.1, 0.0, 0.04, -0.2, 0.3)[:2] == stack.normal_fallout(0.1, 0.04, -0.2, 0.3)


def test_mean_shift_sigma_limit_is_sigma_limit_at_worst_mean():
    s = stack.mean_shift_sigma_limit(0.1, 0.05, 1e-4, -0.2, 0.3)
    total = stats.norm.cdf(-0.2, 0.15, s) + stats.norm.sf(0.3, 0.15, s)
    assert total == pytest.approx(1e-4, rel=1e-9)


def test_normal_quantile_matches_scipy_special_ndtri():
    # the stack models' own Φ⁻¹ (no scipy import on the allocation path) against scipy
    from scipy import special

    for p in np.concatenate([np.logspace(-300, -0.302, 600), np.linspace(0.01, 0.99, 99), [0.5, 1 - 1e-12]]):
        ours, ref = stack.normal_quantile(float(p)), float(special.ndtri(p))
        assert ours == pytest.approx(ref, rel=1e-13, abs=1e-15), p
    with pytest.raises(ValueError):
        stack.normal_quantile(0.0)


def test_two_sided_sigma_limit_matches_brentq_on_scipy():
    # σ with Φ((L − μ)/σ) + Φ((μ − U)/σ) = p: scipy's brentq on scipy.stats.norm as the reference
    from scipy import optimize

    for lower, upper, p in [(-1.0, 1.3, 1e-4), (-0.2, 5.0, 0.01), (-1.0, 1.0000001, 1e-6), (-2.0, 2.5, 0.2)]:
        sigma = stack.sigma_limit(0.0, p, lower, upper)
        ref = optimize.brentq(lambda s: stats.norm.cdf(lower / s) + stats.norm.sf(upper / s) - p,
                              1e-3, 10.0, xtol=1e-16, rtol=1e-15)
        assert sigma == pytest.approx(ref, rel=1e-13)
