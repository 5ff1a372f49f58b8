"""Allocation speed, as ratios against the exact 1-D Lagrange dual measured in the same run.

Run:  python benchmarks/bench_allocate.py [--quick]

Cases are invented here with a fixed seed (random reciprocal / reciprocal-power /
exponential curves, random sensitivities and limits, one fixed contributor).

Printed per size n (one requirement, worst-case and rss; limits chosen so it binds):
  dual     the bare 1-D dual root (ExactAllocation._root): the baseline, 1.00
  allocate allocate(case, model): prepare + infeasibility check + dual + numpy re-check
           + polish + result object (what a user calls)              goal <= 3x dual
  conic    CompiledAllocation.solve() on the compiled problem (Clarabel + KKT refinement
           + re-check), compile time shown separately (the first one includes importing cvxpy)
One requirement under mean shift: the Newton/KKT path against the conic cutting planes.
Multi-requirement: conic re-solve time (and Clarabel's own solve time) for 20 and 100
contributors x 5 requirements                               goal n = 100 <= 20 ms solver side
Whole process: `allocator allocate` on the gearbox demo, wall time         goal <= 1 s
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from allocator.model import AllocationSettings, Case, Contributor, Requirement
from allocator.solve import allocate, prepare
from allocator.solve.continuous import CompiledAllocation
from allocator.solve.exact import ExactAllocation

from invented import random_cost  # noqa: E402  (benchmarks/ is on sys.path when run as a script)

ROOT = Path(__file__).resolve().parents[1]


def invented_case(n: int, requirements: int = 1, model: str = "worst-case", seed: int = 7) -> Case:
    """Random invented case whose requirements bind under ``model`` (fixed seed)."""
    rng = np.random.default_rng(seed + 1000 * requirements + n)
    people = []
    for i in range(n):
        cost = random_cost(rng)
        lo = rng.uniform(0.002, 0.01)
        people.append(Contributor(
            name=f"x{i}", nominal=rng.uniform(1, 50), tolerance=0.03, limits=(lo, lo * rng.uniform(5, 30)),
            cost=cost, count=int(rng.choice([1, 1, 1, 2])), mean_shift=float(rng.uniform(0, 0.3)),
        ))
    people[0] = Contributor(name="x0", nominal=10.0, tolerance=0.02, fixed=True)
    loose = np.array([(c.limits or (c.tolerance, c.tolerance))[1] for c in people])
    count = np.array([c.count for c in people], dtype=float)
    shift = np.array([c.mean_shift for c in people])
    reqs = []
    for r in range(requirements):
        members = rng.choice(n, size=max(2, n // 2) if requirements > 1 else n, replace=False)
        chain = {f"x{i}": float(rng.choice([-1, 1]) * rng.uniform(0.5, 2)) for i in sorted(members)}
        a = np.zeros(n)
        for k, c in chain.items():
            a[int(k[1:])] = c
        y0 = float(np.sum(a * count * np.array([c.nominal for c in people])))
        # room: a fraction of what the loosest tolerances need under the model, so it binds
        half = float(np.sum(count * np.abs(a) * loose))
        sigma = float(np.sqrt(np.sum(count * (a * loose / 3.0) ** 2)))
        delta = float(np.sum(count * np.abs(a) * shift * loose))
        room = {"worst-case": half / 3.0, "rss": 2.0 * sigma, "mean-shift": 2.0 * sigma + 0.5 * delta}[model]
        reqs.append(Requirement(name=f"r{r}", chain=chain, lower=y0 - room, upper=y0 + room * 1.2,
                                fallout_ppm=100.0))
    return Case(title="invented benchmark case", contributors=tuple(people), requirements=tuple(reqs),
                allocation=AllocationSettings(models=("worst-case", "rss", "mean-shift")))


def best_time(fn, repeat: int) -> float:
    """Median of ``repeat`` timings after one warm-up call [s]."""
    fn()
    samples = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        samples.append(time.perf_counter() - start)
    return statistics.median(samples)


def single_requirement(sizes, repeat):
    print("One requirement (ratios to the bare 1-D dual root of the same case and model)")
    print(f"{'n':>6} {'model':<11} {'dual ms':>9} {'allocate':>10} {'conic':>10} {'compile ms':>11}  check")
    for n in sizes:
        for model in ("worst-case", "rss"):
            case = invented_case(n, model=model)
            problem = prepare(case, model)
            exact = ExactAllocation(problem)
            rhs = float(exact.dual.rhs(problem.limits())[0][0])
            dual = best_time(lambda: exact.roots([rhs]), repeat)
            full = best_time(lambda: allocate(case, model), repeat)
            start = time.perf_counter()
            compiled = CompiledAllocation.from_problem(problem)
            first = compiled.solve()
            compile_ms = (time.perf_counter() - start) * 1e3
            conic = best_time(compiled.solve, max(3, repeat // 5))
            ref = allocate(case, model)
            agree = abs(first.total_cost / ref.total_cost - 1)
            verdict = "ok" if full <= 3 * dual else "ABOVE GOAL"
            binding = ref.requirements[0].binding or "slack"
            print(f"{n:>6} {model:<11} {dual * 1e3:>9.3f} {full / dual:>9.2f}x {conic / dual:>9.1f}x "
                  f"{compile_ms:>11.1f}  {ref.status}/{first.status}, {binding}, costs agree to "
                  f"{agree:.0e}; allocate <= 3x dual: {verdict}")
    print()
    print("One requirement, mean shift (Newton on the KKT conditions vs the conic cutting planes)")
    print(f"{'n':>6} {'newton ms':>10} {'conic ms':>10} {'ratio':>7}  check")
    for n in sizes:
        case = invented_case(n, model="mean-shift")
        newton = best_time(lambda: allocate(case, "mean-shift"), max(3, repeat // 3))
        compiled = CompiledAllocation(case, "mean-shift")
        first = compiled.solve()
        conic = best_time(compiled.solve, max(3, repeat // 5))
        ref = allocate(case, "mean-shift")
        agree = abs(first.total_cost / ref.total_cost - 1)
        print(f"{n:>6} {newton * 1e3:>10.2f} {conic * 1e3:>10.2f} {conic / newton:>6.1f}x  "
              f"{ref.solver} {ref.status}, gap {ref.gap:.0e}; conic {first.status}, costs agree to {agree:.0e}")


def multi_requirement(sizes, repeat):
    print()
    print("5 requirements (conic path; compile once, then re-solve)")
    print(f"{'n':>6} {'model':<11} {'re-solve ms':>12} {'clarabel ms':>12} {'compile ms':>11}  status")
    for n in sizes:
        for model in ("worst-case", "rss", "mean-shift"):
            case = invented_case(n, requirements=5, model=model)
            start = time.perf_counter()
            compiled = CompiledAllocation(case, model)
            result = compiled.solve()
            compile_ms = (time.perf_counter() - start) * 1e3
            solve = best_time(compiled.solve, repeat)
            clarabel = (compiled.cvx.solver_stats.solve_time or float("nan")) * 1e3
            note = ""
            if n == 100:
                note = "  goal <= 20 ms: " + ("ok" if solve * 1e3 <= 20 else "above goal")
            print(f"{n:>6} {model:<11} {solve * 1e3:>12.2f} {clarabel:>12.2f} {compile_ms:>11.1f}  "
                  f"{result.status} ({result.message.split('; ', 1)[-1]}){note}")


def whole_process(repeat):
    print()
    print("Whole process (subprocess wall time, median; this checkout's allocator via python -m)")
    demo = ROOT / "cases" / "gearbox_end_play.toml"
    rounded = ROOT / "cases" / "gear_hub_end_play.toml"  # ISO 286 rounding: discrete solver
    py = sys.executable
    # the import floor: what `allocate` on the demo imports, without reading or solving
    floor = ("import allocator.cli.main, allocator.cli.allocate, allocator.case, allocator.solve.dispatch, "
             "allocator.solve.exact, allocator.solve.multipliers, allocator.analysis")
    runs = {
        "python -c pass (baseline)": [py, "-c", "pass"],
        "import floor of allocate (no case, no solve)": [py, "-c", floor],
        "allocator --help": [py, "-m", "allocator", "--help"],
        "demo, worst-case + rss": [py, "-m", "allocator", "allocate", str(demo), "--model", "worst-case", "--model", "rss"],
        "demo, all 3 models": [py, "-m", "allocator", "allocate", str(demo)],
        "demo with ISO 286 rounding (discrete)": [py, "-m", "allocator", "allocate", str(rounded)],
    }
    import os

    env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}  # as installed
    base = floor_time = None
    for label, cmd in runs.items():
        times = []
        for _ in range(repeat):
            start = time.perf_counter()
            done = subprocess.run(cmd, check=False, capture_output=True, cwd=ROOT, env=env)
            times.append(time.perf_counter() - start)
        wall = statistics.median(times)
        base = base or wall
        if label.startswith("import floor"):
            floor_time = wall
        goal = ""
        if label.startswith("demo") and floor_time is not None:
            goal = (f"  exit {done.returncode}; floor + {wall - floor_time:.3f} s; goal <= floor + 0.2 s: "
                    + ("ok" if wall <= floor_time + 0.2 else "ABOVE GOAL"))
        print(f"  {label:<46} {wall:6.3f} s  ({wall / base:5.1f}x python startup){goal}")


def main():
    quick = "--quick" in sys.argv
    single_requirement((5, 20, 100) if quick else (5, 20, 100, 1000), 5 if quick else 25)
    multi_requirement((20,) if quick else (20, 100), 5 if quick else 15)
    whole_process(3 if quick else 7)


if __name__ == "__main__":
    main()
