"""Discrete allocation speed, as ratios against a continuous solve of the same size.

Run:  python benchmarks/bench_discrete.py [--quick]

Cases are invented here with a fixed seed. Printed per stack model:

  continuous  allocate() on 30 contributors with reciprocal costs over each contributor's
              option range (exact dual or Clarabel): the baseline, 1.00
  choose 30x6 DiscreteAllocation on 30 contributors x 6 options (half of them `choose`
              tables of 6 tolerances, half two processes with 3 listed tolerances each and
              their own cp): HiGHS MILP with lazy cuts for mean shift. Must end 'optimal'
              with HiGHS's MIP gap 0 (proven optimum), checked here.
  processes   30 contributors, 10 of them with 2 processes on continuous curves: grid MILP
              + conic polish + refined lower bound; the reported gap is printed.

Times are the median of --repeat runs (default 3) in one process, after a warm-up.
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

from allocator.model import AllocationSettings, Case, Contributor, CostCurve, Process, Requirement
from allocator.solve import allocate
from allocator.solve.discrete import DiscreteAllocation

MODELS = ("worst-case", "rss", "mean-shift")


def _choose(points, prices):
    return CostCurve("table", points_tolerance=tuple(points), points_cost=tuple(prices), between="choose")


def _requirements(people, rng, model, count, room=0.45):
    """``count`` requirements (the whole chain, then shared subsets) for ``model``."""
    lo = np.array([c.limits[0] if c.limits else min(p.limits[0] for p in c.processes) for c in people])
    hi = np.array([c.limits[1] if c.limits else max(p.limits[1] for p in c.processes) for c in people])
    m = np.array([c.mean_shift for c in people])
    out = []
    for r in range(count):
        members = np.arange(len(people)) if r == 0 else np.sort(
            rng.choice(len(people), size=len(people) // 2, replace=False))
        chain = {people[i].name: float(rng.choice([-1.0, 1.0]) * rng.uniform(0.5, 2.0)) for i in members}
        a = np.abs(np.array(list(chain.values())))
        t = (lo + room * (hi - lo))[members]
        y0 = sum(chain[people[i].name] * people[i].count * people[i].nominal for i in members)
        # room for about `room` of the way from the tightest to the loosest tolerances
        if model == "worst-case":
            half = float(a @ t)
        else:
            half = 4.5 * float(np.sqrt(np.sum((a * t / 3) ** 2)))
            half += float(a @ (m[members] * t)) if model == "mean-shift" else 0.0
        out.append(Requirement(f"r{r}", chain=chain, lower=y0 - 1.2 * half, upper=y0 + half,
                               fallout_ppm=100))
    return tuple(out)


def discrete_case(model, requirements=1, n=30, options=6, seed=5) -> Case:
    rng = np.random.default_rng(seed)
    people = []
    for i in range(n):
        base = rng.uniform(0.004, 0.012)
        common = dict(name=f"x{i}", nominal=float(rng.uniform(1, 50)), mean_shift=float(rng.uniform(0, 0.3)))
        if i % 2:
            processes = []
            for k, cp in enumerate((1.0, 1.33)):
                points = np.sort(base * rng.uniform(1, 12, options // 2))
                prices = np.sort(rng.uniform(0.2, 4.0, options // 2))[::-1] + k
                processes.append(Process(f"p{k}", (points[0], points[-1]), _choose(points, prices), cp=cp))
            people.append(Contributor(tolerance=processes[0].limits[0], processes=tuple(processes), **common))
        else:
            points = np.sort(base * rng.uniform(1, 12, options))
            prices = np.sort(rng.uniform(0.2, 4.0, options))[::-1]
            people.append(Contributor(tolerance=float(points[0]), limits=(points[0], points[-1]),
                                      cost=_choose(points, prices), **common))
    return Case(title="invented 30 x 6", contributors=tuple(people),
                requirements=_requirements(people, rng, model, requirements),
                allocation=AllocationSettings(models=(model,)))


def continuous_twin(case: Case) -> Case:
    """Same contributors and ranges with reciprocal costs (the continuous baseline)."""
    people = []
    for c in case.contributors:
        lo = c.limits[0] if c.limits else min(p.limits[0] for p in c.processes)
        hi = c.limits[1] if c.limits else max(p.limits[1] for p in c.processes)
        people.append(Contributor(name=c.name, nominal=c.nominal, tolerance=lo, limits=(lo, hi),
                                  cost=CostCurve("reciprocal", a=0.5, b=0.01), mean_shift=c.mean_shift))
    return Case(title="continuous twin", contributors=tuple(people), requirements=case.requirements,
                allocation=case.allocation)


def process_case(model, n=30, with_processes=10, seed=9) -> Case:
    rng = np.random.default_rng(seed)
    people = []
    for i in range(n):
        lo = rng.uniform(0.003, 0.01)
        common = dict(name=f"x{i}", nominal=float(rng.uniform(1, 50)), mean_shift=float(rng.uniform(0, 0.3)))
        if i < with_processes:
            processes = (
                Process("rough", (2 * lo, 20 * lo), CostCurve("reciprocal", a=0.5, b=0.004)),
                Process("fine", (lo / 2, 4 * lo), CostCurve("reciprocal", a=2.0, b=0.001), cp=1.33),
            )
            people.append(Contributor(tolerance=4 * lo, processes=processes, **common))
        else:
            people.append(Contributor(tolerance=lo, limits=(lo, 12 * lo), cost=CostCurve(
                "exponential", a=0.3, b=2.0, c=float(rng.uniform(20, 60))), **common))
    return Case(title="invented processes", contributors=tuple(people),
                requirements=_requirements(people, rng, model, 1, room=0.3),
                allocation=AllocationSettings(models=(model,)))


def _timed(fn, repeat):
    fn()  # warm-up (imports, first HiGHS call)
    times, out = [], None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def iso_demo(repeat):
    """Whole process: `allocate` of the ISO 286 demo per model against its own `analyze`."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}  # as installed
    root = Path(__file__).resolve().parents[1]
    case = str(root / "cases" / "gear_hub_end_play.toml")

    def wall(args):
        times = []
        for _ in range(repeat):
            t0 = time.perf_counter()
            subprocess.run([sys.executable, "-m", "allocator", *args], cwd=root, capture_output=True,
                           check=False, env=env)
            times.append(time.perf_counter() - t0)
        return statistics.median(times)

    base = wall(["analyze", case])
    print(f"ISO 286 demo, whole process: analyze {base:.3f} s")
    for model in MODELS:
        t = wall(["allocate", case, "--model", model])
        print(f"  allocate --model {model:<11} {t:6.3f} s  {t / base:5.2f}x analyze  goal <= 3x: "
              + ("ok" if t <= 3 * base else "ABOVE GOAL"))
    print()


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="one repeat, skip the process case")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--iso-demo", action="store_true", help="also time the ISO 286 demo against its analyze")
    args = parser.parse_args()
    repeat = 1 if args.quick else args.repeat
    if args.iso_demo:
        iso_demo(max(repeat, 3))

    print(f"{'model':<11} {'case':<16} {'time [s]':>9} {'ratio':>7}  result")
    for model in MODELS:
        for count in (1, 2):
            chosen = discrete_case(model, count)
            twin = continuous_twin(chosen)
            t_base, base = _timed(lambda: allocate(twin, model), repeat)
            label = f"{count} requirement" + ("s" if count > 1 else "")
            print(f"{model:<11} {'continuous':<16} {t_base:9.3f} {1.0:7.2f}  {base.status}, "
                  f"{base.solver} ({label})")
            t_disc, res = _timed(lambda: DiscreteAllocation(chosen, model).solve(), repeat)
            proven = res.status == "optimal" and res.gap == 0.0
            print(f"{'':<11} {'choose 30x6':<16} {t_disc:9.3f} {t_disc / t_base:7.1f}  {res.status}, "
                  f"MIP gap {res.gap}, {res.iterations} MILP solve(s)"
                  + ("" if proven else "   <-- NOT PROVEN OPTIMAL"))
        if not args.quick:
            pcase = process_case(model)
            t_base, base = _timed(lambda: allocate(continuous_twin(pcase), model), repeat)
            t_proc, pres = _timed(lambda: DiscreteAllocation(pcase, model).solve(), repeat)
            print(f"{'':<11} {'processes 30':<16} {t_proc:9.3f} {t_proc / t_base:7.1f}  {pres.status}, "
                  f"gap {pres.gap:.1e}, {pres.iterations} MILP solves (vs its continuous twin)")


if __name__ == "__main__":
    main()
