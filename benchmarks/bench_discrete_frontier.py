"""Frontier speed on a case with processes and tables, as a ratio against one allocation.

Run:  python benchmarks/bench_discrete_frontier.py [--points 25] [--model rss ...] [--quick]

The case is benchmarks/nine_part_discrete.toml (invented): nine contributors, three with a
choice of process on continuous cost curves, two bought parts sold in classes ("choose"
tables), one part priced by an interpolated table and three plain parts. Printed per
stack model:

  allocate   allocate(case, model) at the case's own limits: a fresh solver, as the
             `allocate` command runs it; the baseline, 1.00
  frontier   frontier(case, models=(model,), points=N) over the case's [frontier] range,
             everything included (solver set-up, every point solved, re-checked and its
             lower bound proven, the current-design solve)     goal: 25 points <= 10 x

Both are timed in this process, one after the other, in CPU seconds (HiGHS runs in the
process; on a shared machine CPU time is the steadier figure) and in wall seconds, each
the median of --repeat runs (default 5; a single allocation takes a few milliseconds, so
one run is at the mercy of the clock's and the machine's noise). The
points' statuses are printed: each must be 'optimal' or 'infeasible' (a point that could
not be met), never 'failed'.

For context (not the goal's baseline), a second table times a fresh allocate() at each
of the frontier's limits: the median of those single allocations, the frontier against
that median, and how much faster the frontier is than the fresh allocations together
(what sharing bounds, incumbents, cuts and warm starts between the points buys). The
costs of the fresh allocations are checked equal to the frontier's points (1e-9).
"""

from __future__ import annotations

import argparse
import math
import statistics
import time
from pathlib import Path

from allocator.case import load_case
from allocator.solve import allocate
from allocator.sweep import frontier

CASE = Path(__file__).resolve().parent / "nine_part_discrete.toml"
MODELS = ("worst-case", "rss", "mean-shift")


def _timed(func, repeat=1):
    """``(result, cpu, wall)``: the medians of ``repeat`` runs (each a fresh call)."""
    cpus, walls = [], []
    for _ in range(repeat):
        cpu, wall = time.process_time(), time.perf_counter()
        out = func()
        cpus.append(time.process_time() - cpu)
        walls.append(time.perf_counter() - wall)
    return out, statistics.median(cpus), statistics.median(walls)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=25)
    parser.add_argument("--model", action="append", choices=MODELS, default=None)
    parser.add_argument("--quick", action="store_true", help="6 points instead of 25")
    parser.add_argument("--repeat", type=int, default=5, help="median of this many runs of each")
    args = parser.parse_args()
    points = 6 if args.quick else args.points
    case = load_case(CASE)
    print(f"case: {CASE.name} (invented), {len(case.contributors)} contributors; "
          f"frontier of {points} points over {case.frontier.range}")
    allocate(case, "rss")  # warm-up: imports and compiled caches are not counted
    header = f"{'model':<11} {'allocate cpu':>12} {'frontier cpu':>12} {'ratio':>6}   " \
             f"{'allocate wall':>13} {'frontier wall':>13} {'ratio':>6}  points"
    print(header)
    print("-" * len(header))
    rows = []
    for model in args.model or MODELS:
        single, a_cpu, a_wall = _timed(lambda: allocate(case, model), args.repeat)
        front, f_cpu, f_wall = _timed(lambda: frontier(case, models=(model,), points=points), args.repeat)
        statuses = front.statuses[model]
        bad = [s for s in statuses if s not in ("optimal", "infeasible")]
        summary = f"{statuses.count('optimal')} optimal, {statuses.count('infeasible')} infeasible"
        if bad:
            summary += f", {len(bad)} NOT solved: {front.message}"
        print(f"{model:<11} {a_cpu:>12.4f} {f_cpu:>12.3f} {f_cpu / a_cpu:>6.1f}   "
              f"{a_wall:>13.4f} {f_wall:>13.3f} {f_wall / a_wall:>6.1f}  {summary}"
              f" (single: {single.status}, gap {single.gap:.2g})")
        rows.append((model, front, f_cpu))
    print("\ncontext: a fresh allocate() at each of the frontier's limits (CPU seconds)")
    header = f"{'model':<11} {'median single':>13} {'all singles':>11} {'frontier':>9} " \
             f"{'frontier/median':>15} {'singles/frontier':>16}"
    print(header)
    print("-" * len(header))
    for model, front, f_cpu in rows:
        times = []
        for value, cost in zip(front.values, front.costs[model]):
            overrides = {front.requirement: {front.vary: float(value)}}
            alloc, cpu, _ = _timed(lambda: allocate(case, model, overrides=overrides))
            times.append(cpu)
            if cost is not None and not math.isclose(alloc.total_cost, cost, rel_tol=1e-9):
                raise SystemExit(f"{model} at {value}: fresh {alloc.total_cost} != frontier {cost}")
        median = statistics.median(times)
        print(f"{model:<11} {median:>13.3f} {sum(times):>11.2f} {f_cpu:>9.2f} "
              f"{f_cpu / median:>15.1f} {sum(times) / f_cpu:>16.1f}")


if __name__ == "__main__":
    main()
