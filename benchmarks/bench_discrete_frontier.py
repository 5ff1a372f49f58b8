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
process; on a shared machine CPU time is the steadier figure) and in wall seconds. The
points' statuses are printed: each must be 'optimal' or 'infeasible' (a point that could
not be met), never 'failed'.
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

from allocator.case import load_case
from allocator.solve import allocate
from allocator.sweep import frontier

CASE = Path(__file__).resolve().parent / "nine_part_discrete.toml"
MODELS = ("worst-case", "rss", "mean-shift")


def _timed(func):
    cpu, wall = time.process_time(), time.perf_counter()
    out = func()
    return out, time.process_time() - cpu, time.perf_counter() - wall


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=25)
    parser.add_argument("--model", action="append", choices=MODELS, default=None)
    parser.add_argument("--quick", action="store_true", help="6 points instead of 25")
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
    for model in args.model or MODELS:
        single, a_cpu, a_wall = _timed(lambda: allocate(case, model))
        front, f_cpu, f_wall = _timed(lambda: frontier(case, models=(model,), points=points))
        statuses = front.statuses[model]
        bad = [s for s in statuses if s not in ("optimal", "infeasible")]
        summary = f"{statuses.count('optimal')} optimal, {statuses.count('infeasible')} infeasible"
        if bad:
            summary += f", {len(bad)} NOT solved: {front.message}"
        print(f"{model:<11} {a_cpu:>12.2f} {f_cpu:>12.2f} {f_cpu / a_cpu:>6.1f}   "
              f"{a_wall:>13.2f} {f_wall:>13.2f} {f_wall / a_wall:>6.1f}  {summary}"
              f" (single: {single.status}, gap {single.gap:.2g})")


if __name__ == "__main__":
    main()
