"""Frontier speed, as a ratio against single exact-dual allocations measured in the same run.

Run:  python benchmarks/bench_frontier.py [--quick]

The case is invented here with a fixed seed: 20 contributors (random reciprocal,
reciprocal-power and exponential curves, counts 1-2, random sensitivities and limits),
one two-sided requirement. Printed:

  baseline   100 x ExactAllocation.solve(overrides) on one prepared problem (rss), i.e.
             100 single exact 1-D dual allocations with the upper limit at the sweep's
             values: the reference, 1.00
  allocate   100 x allocate(copy of the case with that upper limit) (prepare each time)
  frontier   frontier(case, 100 points, worst-case + rss + mean-shift), everything
             included (solver set-up, infeasibility checks, the re-check of every point,
             the current-design solves)                               goal <= 0.5 s
             A: no contributor has a mean shift: all three models take the exact dual, all
                points in one call (ExactAllocation.roots)
             B: mean shifts 0-0.3: mean shift takes Newton on the KKT conditions at each
                value, each solve starting from the previous value's prices
  economics  fallout_economics(case) for rss (scan + bounded Brent + stationarity check)

Times are the best of --repeat runs after one warm-up run (imports and caches are not
counted; a command-line run pays them once).
"""

from __future__ import annotations

import argparse
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))  # this checkout's allocator

from allocator.economics import fallout_economics
from allocator.sweep import frontier
from allocator.model import AllocationSettings, Case, Contributor, Economics, Requirement
from allocator.solve import allocate, prepare
from allocator.solve.exact import ExactAllocation

from invented import random_cost  # noqa: E402  (benchmarks/ is on sys.path when run as a script)

POINTS = 100


def invented_case(n: int = 20, *, mean_shift: bool, seed: int = 11) -> Case:
    rng = np.random.default_rng(seed)
    people = []
    for i in range(n):
        cost = random_cost(rng)
        lo = rng.uniform(0.002, 0.01)
        people.append(Contributor(
            name=f"x{i}", nominal=rng.uniform(1, 50), tolerance=lo * 3, limits=(lo, lo * rng.uniform(5, 30)),
            cost=cost, count=int(rng.choice([1, 1, 2])),
            mean_shift=float(rng.uniform(0, 0.3)) * mean_shift,  # same draws for A and B
        ))
    chain = {p.name: float(rng.choice([-1, 1]) * rng.uniform(0.5, 2)) for p in people}
    nominal = sum(chain[p.name] * p.count * p.nominal for p in people)
    loose = sum(abs(chain[p.name]) * p.count * p.limits[1] for p in people)
    req = Requirement(name="gap", chain=chain, lower=nominal - 0.3 * loose, upper=nominal + 0.3 * loose,
                      fallout_ppm=100.0)
    return Case(title="invented frontier benchmark", contributors=tuple(people), requirements=(req,),
                allocation=AllocationSettings(models=("worst-case", "rss", "mean-shift")),
                economics=Economics(volume=10000, scrap_cost=50.0))


def best_of(repeat: int, fn):
    fn()  # warm-up: imports, caches, first compile
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="one timed run each")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    repeat = 1 if args.quick else args.repeat

    case = invented_case(mean_shift=False)
    req = case.requirements[0]
    nominal = sum(req.chain[c.name] * c.count * c.nominal for c in case.contributors)
    values = np.linspace(nominal + 0.12 * (req.upper - nominal), nominal + 2.0 * (req.upper - nominal), POINTS)

    exact = ExactAllocation(prepare(case, "rss"))

    def baseline():
        for v in values:
            exact.solve({"gap": {"upper": float(v)}})

    def independent():
        for v in values:
            allocate(replace(case, requirements=(replace(req, upper=float(v)),)), "rss")

    t_base = best_of(repeat, baseline)
    t_alloc = best_of(repeat, independent)
    print(f"invented case: {len(case.contributors)} contributors, 1 requirement, {POINTS} values of its upper limit")
    print(f"{'':<44}{'time [s]':>10}{'ratio':>9}")
    print(f"{'baseline: 100 x exact dual solve (rss)':<44}{t_base:>10.3f}{1.0:>9.2f}")
    print(f"{'100 x allocate(case copy) (rss)':<44}{t_alloc:>10.3f}{t_alloc / t_base:>9.2f}")

    results = {}
    for label, shifted in (("A", False), ("B", True)):
        c = invented_case(mean_shift=shifted)
        front = None

        def run():
            nonlocal front
            front = frontier(c, vary="upper", values=values)

        t = best_of(repeat, run)
        results[label] = (t, front)
        methods = "; ".join(f"{m}: {how}" for m, how in front.solvers.items())
        print(f"{f'frontier {label}: 100 points x 3 models':<44}{t:>10.3f}{t / t_base:>9.2f}"
              f"   goal <= 0.5 s: {'met' if t <= 0.5 else 'NOT met'}")
        print(f"    {front.status}; {methods}")
        per_point = t / (POINTS * len(front.models))
        print(f"    {per_point * 1e3:.2f} ms per (value, model) point, {front.solves} solver calls")

    econ = None

    def economics():
        nonlocal econ
        econ = fallout_economics(case)

    t_econ = best_of(repeat, economics)
    r = econ.result("rss")
    print(f"{'fallout economics (rss)':<44}{t_econ:>10.3f}{t_econ / t_base:>9.2f}")
    print(f"    optimum {r.optimal_ppm:.4g} ppm, {r.status}: {r.message}")


if __name__ == "__main__":
    main()
