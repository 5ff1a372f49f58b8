"""Monte Carlo throughput against raw numpy normal generation, measured in the same run.

Case: an invented linear chain of n = 10 normal contributors, one two-sided requirement.
Baseline: ``Generator.standard_normal`` filling a preallocated buffer with the same number
of values (samples × n), i.e. the cost of the random numbers alone. Goal: verify reaches
at least 50 % of the baseline's assemblies per second (everything else it does -
responses, counting, histograms, sums, per-block seeding, the convolution - in the rest).

Run:  python benchmarks/bench_simulate.py [--samples 10000000] [--repeat 3]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from allocator.model import Case, Contributor, Requirement
from allocator.simulate import verify

GOAL = 0.50


def chain_case(n: int) -> Case:
    contributors = tuple(
        Contributor(name=f"part{i}", nominal=10.0 + i, tolerance=0.02 + 0.002 * i) for i in range(n)
    )
    chain = {f"part{i}": (1.0 if i % 2 == 0 else -1.0) for i in range(n)}
    nominal = sum(c * (10.0 + i) for i, c in enumerate(chain.values()))
    requirement = Requirement(name="gap", chain=chain, lower=nominal - 0.09, upper=nominal + 0.09, fallout_ppm=100)
    return Case(title="invented benchmark chain", contributors=contributors, requirements=(requirement,))


def baseline_seconds(samples: int, n: int, seed: int) -> float:
    """Time to draw samples × n standard normals into a reused 2¹⁶ × n buffer."""
    rng = np.random.default_rng(seed)
    buffer = np.empty((2**16, n))
    full, rest = divmod(samples, 2**16)
    start = time.perf_counter()
    for _ in range(full):
        rng.standard_normal(out=buffer)
    if rest:
        rng.standard_normal(out=buffer[:rest])
    return time.perf_counter() - start


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=float, default=1e7)
    parser.add_argument("--contributors", type=int, default=10)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    samples, n = int(args.samples), args.contributors
    case = chain_case(n)
    verify(case, samples=10_000, seed=0)  # warm up imports and caches

    base, ours = [], []
    for r in range(args.repeat):  # interleaved, best of each
        base.append(baseline_seconds(samples, n, seed=r))
        start = time.perf_counter()
        result = verify(case, samples=samples, seed=r)
        ours.append(time.perf_counter() - start)
    t_base, t_ours = min(base), min(ours)
    check = result.requirements[0]
    ratio = t_base / t_ours
    print(f"samples {samples:,}, contributors {n}, chunk {result.chunk_size:,} rows, block {result.block_size:,}")
    print(f"raw standard_normal : {samples / t_base:12,.0f} assemblies/s  ({t_base:.3f} s)")
    print(f"verify              : {samples / t_ours:12,.0f} assemblies/s  ({t_ours:.3f} s)")
    print(f"ratio               : {ratio:.1%}  (goal >= {GOAL:.0%}: {'met' if ratio >= GOAL else 'NOT met'})")
    print(
        f"check: fallout {check.fallout_ppm:.4g} ppm [{check.ci_low_ppm:.4g}, {check.ci_high_ppm:.4g}], "
        f"rss {check.rss_ppm:.4g} ppm, convolution {check.convolution_ppm:.4g} ppm"
    )


if __name__ == "__main__":
    main()
