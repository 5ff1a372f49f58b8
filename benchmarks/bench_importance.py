"""Importance sampling at 1e-3 ppm: error against exact answers, interval width and time.

Goal (issue 16): a fallout of 1e-3 ppm estimated within ±10 % (95 % interval half-width)
from at most 10⁶ samples. Each invented case below has its limit placed so that the exact
fallout is 1e-3 ppm, from a reference outside the method:

- ``normal10``: ten normal parts, two-sided (each side 5e-4 ppm): scipy.stats.norm;
- ``irwin_hall4`` / ``irwin_hall10``: four / ten uniforms (one contributor with count):
  Irwin (1927) and Hall (1927) in exact rational arithmetic;
- ``triangular2``: a triangular part with count 2 (= four uniforms): Irwin–Hall;
- ``normal_uniform``: a normal plus a uniform part: scipy.integrate.quad of the normal CDF;
- ``mixed_shift``: normal, uniform and triangular parts with counts and mean shifts: the
  numerical convolution of allocator.convolve (another method of this package);
- ``bilinear``: y = k·(L0 − L), normal parts: scipy.integrate.quad of the conditional normal.

For every sample count and case it runs ``--repeat`` seeds and prints the median relative
error |p̂/p − 1|, the mean relative 95 % half-width, how many intervals hold the exact
answer, and the seconds per run (FORM, SORM and sampling together).

Run:  python benchmarks/bench_importance.py [--samples 1e4,1e5,1e6] [--repeat 20]
"""

from __future__ import annotations

import argparse
import math
import time
from fractions import Fraction

import numpy as np
from scipy import integrate, optimize, stats

from allocator.convolve import linear_sum_distribution
from allocator.importance import verify_importance
from allocator.model import Case, Contributor, Requirement

TARGET = 1e-9  # 1e-3 ppm
GOAL_HALF_WIDTH = 0.10
GOAL_SAMPLES = 1_000_000


def _case(contributors, requirement) -> Case:
    return Case(title="invented benchmark case", contributors=tuple(contributors), requirements=(requirement,))


def irwin_hall_sf(n: int, x: Fraction) -> float:
    """P(S > x), S the sum of n U(0, 1), exactly (by symmetry from the lower tail)."""
    y = n - x
    total = sum((-1) ** k * math.comb(n, k) * (y - k) ** n for k in range(0, math.floor(y) + 1))
    return float(Fraction(total) / math.factorial(n))


def irwin_hall_point(n: int, p: float) -> Fraction:
    """x with P(S > x) = p, for p ≤ 1/n!: x = n − (n!·p)^(1/n)."""
    e = (math.factorial(n) * p) ** (1.0 / n)
    return n - Fraction(e).limit_denominator(10**12)


def normal10():
    parts = [Contributor(name=f"p{i}", nominal=10.0 + i, tolerance=0.02 + 0.002 * i, cp=1.0 + 0.05 * i)
             for i in range(10)]
    sign = [1.0 if i % 2 == 0 else -1.0 for i in range(10)]
    mean = sum(s * (10.0 + i) for i, s in enumerate(sign))
    sigma = math.sqrt(sum((c.tolerance / (3 * c.cp)) ** 2 for c in parts))
    z = stats.norm.isf(TARGET / 2)
    req = Requirement(name="gap", chain=dict(zip((c.name for c in parts), sign)),
                      lower=mean - z * sigma, upper=mean + z * sigma)
    return _case(parts, req), 2 * stats.norm.sf(z)


def irwin_hall(n: int):
    def build():
        x = irwin_hall_point(n, TARGET)
        parts = [Contributor(name="u", nominal=0.0, tolerance=1.0, distribution="uniform", count=n)]
        return _case(parts, Requirement(name="sum", chain={"u": 1.0}, upper=float(2 * x - n))), irwin_hall_sf(n, x)

    return build


def triangular2():
    x = irwin_hall_point(4, TARGET)  # four U(0, 1); a triangular on ±t is two uniforms on ±t/2
    parts = [Contributor(name="tri", nominal=5.0, tolerance=0.5, distribution="triangular", count=2)]
    return _case(parts, Requirement(name="sum", chain={"tri": 1.0}, upper=10.0 + float((x - 2) / 2))), \
        irwin_hall_sf(4, x)


def normal_uniform():
    sigma, c = 0.01, 0.05

    def sf(u):
        return integrate.quad(lambda v: stats.norm.sf((u - v) / sigma) / (2 * c), -c, c, epsabs=0, epsrel=1e-12)[0]

    u = optimize.brentq(lambda u: math.log(sf(u)) - math.log(TARGET), c, c + 10 * sigma, xtol=1e-15)
    parts = [Contributor(name="n", nominal=10.0, tolerance=0.03),
             Contributor(name="w", nominal=2.0, tolerance=c, distribution="uniform")]
    return _case(parts, Requirement(name="s", chain={"n": 1.0, "w": 1.0}, upper=12.0 + u)), sf(u)


def mixed_shift():
    parts = [
        Contributor(name="a", nominal=40.0, tolerance=0.05, cp=1.2, mean_shift=0.2),
        Contributor(name="b", nominal=10.0, tolerance=0.03, distribution="uniform", count=2, mean_shift=0.1),
        Contributor(name="c", nominal=5.0, tolerance=0.04, distribution="triangular", count=3),
        Contributor(name="d", nominal=4.0, tolerance=0.02, distribution="uniform"),
    ]
    chain = {"a": 1.0, "b": -1.0, "c": -1.0, "d": 1.0}
    mean = 40.0 - 20.0 - 15.0 + 4.0
    delta = 0.2 * 0.05 + 2 * 0.1 * 0.03  # the mean shifts on the upper side

    def dist():
        return linear_sum_distribution(list(chain.values()), [1, 2, 3, 1], [0.05, 0.03, 0.04, 0.02],
                                       ["normal", "uniform", "triangular", "uniform"], [1 / 3.6, 0, 0, 0],
                                       mean=mean + delta)

    d = dist()
    upper = optimize.brentq(lambda u: math.log(d.sf(u)) - math.log(TARGET), mean, mean + 0.3, xtol=1e-14)
    return _case(parts, Requirement(name="gap", chain=chain, upper=upper)), d.sf(upper)


def bilinear():
    mk, sk, md, sd = 2.0, 0.1 / 3, 10.0, math.hypot(0.1, 0.2 / 3)

    def sf(u):
        def f(k):
            return stats.norm.pdf(k, mk, sk) * stats.norm.sf((u / k - md) / sd)

        return integrate.quad(f, mk - 12 * sk, mk + 12 * sk, epsabs=0, epsrel=1e-11, points=[mk], limit=200)[0]

    u = optimize.brentq(lambda u: math.log(sf(u)) - math.log(TARGET), 20.5, 25.0, xtol=1e-13)
    parts = [Contributor(name="k", nominal=2.0, tolerance=0.1), Contributor(name="L0", nominal=30.0, tolerance=0.3),
             Contributor(name="L", nominal=20.0, tolerance=0.2)]
    return _case(parts, Requirement(name="preload", expression="k * (L0 - L)", upper=u)), sf(u)


CASES = {
    "normal10": normal10,
    "irwin_hall4": irwin_hall(4),
    "irwin_hall10": irwin_hall(10),
    "triangular2": triangular2,
    "normal_uniform": normal_uniform,
    "mixed_shift": mixed_shift,
    "bilinear": bilinear,
}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", default="1e4,1e5", help="comma-separated sample counts per run")
    parser.add_argument("--repeat", type=int, default=5, help="seeds per case and sample count")
    parser.add_argument("--cases", default=",".join(CASES))
    args = parser.parse_args()
    counts = [int(float(s)) for s in args.samples.split(",")]
    print(f"exact fallout {TARGET * 1e6:g} ppm per case; {args.repeat} seeds each")
    print(f"{'case':16s} {'samples':>9s} {'med |err|':>10s} {'half-width':>11s} {'covered':>8s} {'s/run':>7s} "
          f"{'FORM/exact':>11s} {'SORM/exact':>11s}")
    widths_at: dict[int, list[float]] = {n: [] for n in counts}  # mean half-width per case
    for name in args.cases.split(","):
        case, exact = CASES[name]()
        exact_ppm = exact * 1e6
        for n in counts:
            errors, widths, covered, seconds = [], [], 0, []
            for seed in range(args.repeat):
                start = time.perf_counter()
                check = verify_importance(case, samples=n, seed=seed).requirements[0]
                seconds.append(time.perf_counter() - start)
                errors.append(abs(check.fallout_ppm / exact_ppm - 1))
                widths.append(check.relative_half_width)
                covered += check.ci_low_ppm <= exact_ppm <= check.ci_high_ppm
            form = check.form_ppm / exact_ppm if check.form_ppm is not None else math.nan
            sorm = check.sorm_ppm / exact_ppm if check.sorm_ppm is not None else math.nan
            print(f"{name:16s} {n:9,d} {np.median(errors):10.2%} {np.mean(widths):11.2%} "
                  f"{covered:4d}/{args.repeat:<3d} {np.median(seconds):7.3f} {form:11.3g} {sorm:11.3g}")
            widths_at[n].append(float(np.mean(widths)))
    largest = max((c for c in counts if c <= GOAL_SAMPLES), default=None)
    if largest is not None:
        worst_at_goal = max(widths_at[largest])
        verdict = "met" if worst_at_goal <= GOAL_HALF_WIDTH else "NOT met"
        print(f"goal ±{GOAL_HALF_WIDTH:.0%} at {TARGET * 1e6:g} ppm with ≤ {GOAL_SAMPLES:,} samples: {verdict} "
              f"(widest mean half-width at {largest:,} samples: {worst_at_goal:.2%})")


if __name__ == "__main__":
    main()
