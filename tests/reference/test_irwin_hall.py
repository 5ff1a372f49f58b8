"""Sums of uniforms against the Irwin–Hall distribution (closed form, exact arithmetic).

Source of the closed form: Irwin, J. O. (1927). On the frequency distribution of the means
of samples from a population having any law of frequency with finite moments, with special
reference to Pearson's Type II. Biometrika 19(3/4), 225-239; and Hall, P. (1927). The
distribution of means for samples of size N drawn from a population in which the variate
takes values between 0 and 1, all such values being equally likely. Biometrika 19(3/4),
240-245. For S = U_1 + … + U_n with U_i ~ U(0, 1):

    F_n(x) = 1/n! · Σ_{k=0}^{⌊x⌋} (−1)^k · C(n, k) · (x − k)^n,   0 ≤ x ≤ n.

The formula is evaluated here with exact rational arithmetic (fractions.Fraction), so the
reference carries no rounding error of its own.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from scipy import stats

from allocator.convolve import linear_sum_distribution
from allocator.simulate import sample_responses, verify
from helpers import chain_requirement, contributor, make_case


def irwin_hall_cdf(x: float, n: int) -> float:
    """Irwin (1927) / Hall (1927) CDF of the sum of n U(0, 1), exact rational arithmetic."""
    if x <= 0:
        return 0.0
    if x >= n:
        return 1.0
    xf = Fraction(x)
    total = sum(
        (-1) ** k * math.comb(n, k) * (xf - k) ** n for k in range(0, math.floor(xf) + 1)
    )
    return float(total / math.factorial(n))


def irwin_hall_sf(x: float, n: int) -> float:
    """Upper tail by symmetry of the Irwin–Hall distribution: P(S > x) = F_n(n − x)."""
    return irwin_hall_cdf(n - x, n)


def uniform_case(n, *, as_count=False, upper=None, lower=None):
    """n uniforms on nominal 0.5 ± 0.5, i.e. U(0, 1) each, summed by a chain."""
    if as_count:
        cs = [contributor("u", nominal=0.5, tolerance=0.5, limits=(0.1, 1.0), distribution="uniform", count=n)]
        chain = {"u": 1.0}
    else:
        cs = [
            contributor(f"u{i}", nominal=0.5, tolerance=0.5, limits=(0.1, 1.0), distribution="uniform")
            for i in range(n)
        ]
        chain = {f"u{i}": 1.0 for i in range(n)}
    return make_case(cs, [chain_requirement("sum", chain, lower=lower, upper=upper)])


@pytest.mark.parametrize("n", [1, 2, 3, 4, 6, 10])
def test_convolution_matches_irwin_hall_cdf(n):
    # Irwin (1927), Hall (1927): closed-form CDF; convolution to 1e-9 absolute
    dist = linear_sum_distribution([1.0] * n, [1] * n, [0.5] * n, ["uniform"] * n, [0.0] * n, mean=n / 2)
    xs = np.linspace(0.0, n, 61)[1:-1]
    got = np.array([dist.cdf(x) for x in xs])
    ref = np.array([irwin_hall_cdf(float(x), n) for x in xs])
    assert np.max(np.abs(got - ref)) < 1e-9
    # upper tail computed directly, also to 1e-9
    got_sf = np.array([dist.sf(x) for x in xs])
    ref_sf = np.array([irwin_hall_sf(float(x), n) for x in xs])
    assert np.max(np.abs(got_sf - ref_sf)) < 1e-9


@pytest.mark.parametrize("n", [3, 5])
def test_convolution_tail_relative_accuracy(n):
    # Irwin (1927), Hall (1927): far tail F_n(x) = x^n / n! for x ≤ 1; relative 1e-4
    dist = linear_sum_distribution([1.0] * n, [1] * n, [0.5] * n, ["uniform"] * n, [0.0] * n, mean=n / 2)
    for x in (0.05, 0.1, 0.3):
        ref = x**n / math.factorial(n)
        assert dist.cdf(x) == pytest.approx(ref, rel=1e-4)
        assert dist.sf(n - x) == pytest.approx(ref, rel=1e-4)


def test_count_instances_are_independent_uniforms():
    # one contributor with count = 5 is the sum of 5 independent U(0,1): Irwin–Hall n = 5
    n = 5
    dist = linear_sum_distribution([1.0], [n], [0.5], ["uniform"], [0.0], mean=n / 2)
    for x in (0.7, 1.5, 2.5, 3.9, 4.6):
        assert abs(dist.cdf(x) - irwin_hall_cdf(x, n)) < 1e-9


def test_verify_convolution_and_monte_carlo_against_irwin_hall():
    # Irwin (1927), Hall (1927): P(S < 0.8) + P(S > 3.5) for n = 4
    n, lower, upper = 4, 0.8, 3.5
    exact_ppm = (irwin_hall_cdf(lower, n) + irwin_hall_sf(upper, n)) * 1e6
    for as_count in (False, True):
        case = uniform_case(n, as_count=as_count, lower=lower, upper=upper)
        result = verify(case, samples=200_000, seed=11)
        check = result["sum"]
        assert check.convolution_ppm == pytest.approx(exact_ppm, abs=1e-3)
        assert check.ci_low_ppm <= exact_ppm <= check.ci_high_ppm


@pytest.mark.parametrize("n", [1, 2, 4])
def test_monte_carlo_sample_passes_kolmogorov_smirnov(n):
    # Kolmogorov-Smirnov (scipy.stats.kstest) against the Irwin (1927) / Hall (1927) CDF
    case = uniform_case(n, upper=n + 1.0)
    y = sample_responses(case, samples=20_000, seed=5)["sum"]
    cdf = np.vectorize(lambda x: irwin_hall_cdf(float(x), n))
    result = stats.kstest(y, cdf)
    assert result.pvalue > 0.001
    # and the test has power: a normal with the same mean and σ is rejected for n = 1
    if n == 1:
        wrong = stats.kstest(y, stats.norm(0.5, math.sqrt(1 / 12)).cdf)
        assert wrong.pvalue < 1e-6
