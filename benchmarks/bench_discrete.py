"""Discrete allocation speed, as ratios against a continuous solve of the same size.

Run:  python benchmarks/bench_discrete.py [--quick]

Cases are invented here with a fixed seed. Printed per stack model:

  continuous  allocate() on 30 contributors with reciprocal costs over each contributor's
              option range (exact dual or Clarabel): the baseline, 1.00
  choose 30x6 DiscreteAllocation on 30 contributors x 6 options (half of them `choose`
              tables of 6 tolerances, half two processes with 3 listed tolerances each and
              their own cp): branch and bound with Lagrangian bounds for one requirement,
              else (and for mean shift where that bound is weak) HiGHS MILP with lazy
              cuts. Must end 'optimal' with gap 0 (proven optimum), checked here.
  processes   30 contributors, 10 of them with 2 processes on continuous curves: branch
              and bound + conic polish (one requirement), else grid MILP + conic polish +
              refined lower bound; the reported gap is printed.

Times are the median of --repeat runs (default 3) in one process, after a warm-up.

With --demo, whole processes instead (subprocess, wall and child CPU time, median of --repeat runs,
default 5 there): ``python -m allocator analyze`` on the ISO 286 demo
(cases/gear_hub_end_play.toml, invented) is the baseline, 1.00, and ``allocate --model M``
for each model is its ratio (goal: at most 3); the import floor (``python -c "import
allocator.solve.discrete"`` plus what the allocation imports) is printed beside it.
The package imported is the one in this checkout (PYTHONPATH is set to it).
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from allocator.model import AllocationSettings, Case, Contributor, CostCurve, Process, Requirement
from allocator.solve import allocate
from allocator.solve.discrete import DiscreteAllocation

MODELS = ("worst-case", "rss", "mean-shift")
ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "cases" / "gear_hub_end_play.toml"


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


def _process_time(args, repeat):
    """Median (wall, CPU) time [s] of ``python <args>`` run from the checkout, as a whole
    process (CPU: user + system of the child, the steadier figure on a shared machine)."""
    import resource

    env = dict(os.environ, PYTHONPATH=str(ROOT))
    walls, cpus = [], []
    for _ in range(repeat):
        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        t0 = time.perf_counter()
        subprocess.run([sys.executable, *args], cwd=ROOT, env=env, check=False,
                       stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        walls.append(time.perf_counter() - t0)
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpus.append(after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime)
    return statistics.median(walls), statistics.median(cpus)


def demo(repeat):
    """Whole-process allocate on the ISO 286 demo against its own analyze."""
    floor = _process_time(["-c", "import allocator.cli.main, allocator.cli.allocate, allocator.analysis, "
                           "allocator.solve.discrete, allocator.solve.branch, allocator.solve.exact"], repeat)
    base = _process_time(["-m", "allocator", "analyze", str(DEMO)], repeat)
    print(f"demo: {DEMO.name} (invented), whole processes, median of {repeat}")
    print(f"{'command':<28} {'wall [s]':>9} {'ratio':>7} {'cpu [s]':>9} {'ratio':>7}")

    def row(label, t):
        return f"{label:<28} {t[0]:9.3f} {t[0] / base[0]:7.2f} {t[1]:9.3f} {t[1] / base[1]:7.2f}"

    print(row("import floor (allocate's)", floor))
    print(row("analyze", base))
    for model in MODELS:
        t = _process_time(["-m", "allocator", "allocate", str(DEMO), "--model", model], repeat)
        print(row("allocate --model " + model, t) + ("" if t[1] <= 3 * base[1] else "   <-- over 3x"))


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="one repeat, skip the process case")
    parser.add_argument("--repeat", type=int, default=None)
    parser.add_argument("--demo", action="store_true", help="whole-process allocate vs analyze on the demo")
    args = parser.parse_args()
    if args.demo:
        demo(1 if args.quick else args.repeat or 5)
        return
    repeat = 1 if args.quick else args.repeat or 3

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
                  f"gap {res.gap}, {res.iterations} MILP solve(s) or search nodes, {res.solver}"
                  + ("" if proven else "   <-- NOT PROVEN OPTIMAL"))
        if not args.quick:
            pcase = process_case(model)
            t_base, base = _timed(lambda: allocate(continuous_twin(pcase), model), repeat)
            t_proc, pres = _timed(lambda: DiscreteAllocation(pcase, model).solve(), repeat)
            print(f"{'':<11} {'processes 30':<16} {t_proc:9.3f} {t_proc / t_base:7.1f}  {pres.status}, "
                  f"gap {pres.gap:.1e}, {pres.iterations} MILP solves or search nodes, {pres.solver} "
                  "(vs its continuous twin)")


if __name__ == "__main__":
    main()
