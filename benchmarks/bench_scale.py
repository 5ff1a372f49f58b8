"""How allocation time and memory grow with the number of contributors and requirements.

Run:  python benchmarks/bench_scale.py [--full] [--models worst-case rss] [--plot scale.png]

Invented cases from ``large_case.py`` (30 parts per chain, or all of them when there are
fewer; random reciprocal / reciprocal-power / exponential costs; fixed seed). Per model and
size, ``allocate(case, model)`` is timed in this process (median of ``--repeat`` runs after
a warm-up; loading the case file is not included) and its peak memory taken by
``tracemalloc`` (numpy's arrays included). Grids:

- default: n = 10, 100, 1000, 10 000 contributors with m = 10 requirements, and
  m = 1, 10, 100 requirements with n = 1000;
- ``--full``: n = 10, 30, 100, 300, 1000, 3000, 10 000 with m = 10, and m = 1, 3, 10, 30,
  100, 300, 1000 with n = 1000 (and n = 10 000 with m = 1000).

Printed: a table (time, peak memory, status, solver, certified gap) and, per model and
axis, the growth exponent ``b`` of ``time ∝ size^b`` and ``memory ∝ size^b`` fitted by least
squares on the logarithms (from 100 contributors or 10 requirements up, where fixed costs
no longer dominate). Memory growing faster than linearly is flagged. With ``--plot FILE`` a log-log
figure of both.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))  # this checkout's allocator, before anything imports one

from large_case import write_large_case  # noqa: E402
from allocator.case import load_case  # noqa: E402
from allocator.solve import allocate  # noqa: E402


def measure(case, model, repeat):
    """(median seconds, peak MB, result) of allocate(case, model)."""
    result = allocate(case, model)  # warm-up (first calls import and compile)
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        allocate(case, model)
        times.append(time.perf_counter() - start)
    tracemalloc.start()
    allocate(case, model)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return statistics.median(times), peak / 2**20, result


def exponent(sizes, values, smallest):
    """Least-squares slope of log(values) on log(sizes) (sizes ≥ ``smallest``), or NaN."""
    x, y = np.asarray(sizes, dtype=float), np.asarray(values, dtype=float)
    keep = (x >= smallest) & (y > 0)
    if keep.sum() < 2:
        return float("nan")
    return float(np.polyfit(np.log(x[keep]), np.log(y[keep]), 1)[0])


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--full", action="store_true", help="the full grid (minutes)")
    parser.add_argument("--models", nargs="*", default=["worst-case", "rss"])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--plot", help="write a log-log figure to this file (PNG or SVG)")
    args = parser.parse_args()
    if args.full:
        axes = {"contributors": [(n, 10) for n in (10, 30, 100, 300, 1000, 3000, 10000)],
                "requirements": [(1000, m) for m in (1, 3, 10, 30, 100, 300, 1000)]}
        extra = [(10000, 1000)]
    else:
        axes = {"contributors": [(n, 10) for n in (10, 100, 1000, 10000)],
                "requirements": [(1000, m) for m in (1, 10, 100)]}
        extra = []
    folder = Path(tempfile.mkdtemp(prefix="bench_scale_"))
    rows = {}
    print(f"{'model':<11} {'n':>6} {'m':>5} {'time s':>9} {'peak MB':>8}  answer")
    for model in args.models:
        for n, m in sorted({pt for pts in axes.values() for pt in pts} | set(extra)):
            path = folder / f"case_{model}_{n}_{m}.toml"
            write_large_case(path, contributors=n, requirements=m, per_chain=30, model=model,
                             sides="upper" if model == "mean-shift" else "two")
            case = load_case(path)
            seconds, peak, result = measure(case, model, args.repeat)
            rows[model, n, m] = (seconds, peak)
            gap = "-" if result.gap is None else f"{result.gap:.0e}"
            print(f"{model:<11} {n:>6} {m:>5} {seconds:>9.4f} {peak:>8.1f}  {result.status}, {result.solver}, gap {gap}")
    print()
    print("growth exponents b (value ∝ size^b, least squares from n = 100 / m = 10 up)")
    fits = {}
    for model in args.models:
        for axis, points in axes.items():
            size = [n if axis == "contributors" else m for n, m in points]
            t = [rows[model, n, m][0] for n, m in points]
            mem = [rows[model, n, m][1] for n, m in points]
            smallest = 100 if axis == "contributors" else 10
            bt, bm = exponent(size, t, smallest), exponent(size, mem, smallest)
            fits[model, axis] = (size, t, mem)
            flag = "SUPERLINEAR MEMORY" if bm > 1.1 else "memory at most linear"
            print(f"  {model:<11} in {axis:<13} time b = {bt:5.2f}   memory b = {bm:5.2f}   {flag}")
    if args.plot:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        fig, (ax_t, ax_m) = plt.subplots(1, 2, figsize=(10, 4))
        for (model, axis), (size, t, mem) in fits.items():
            label = f"{model}, vary {axis}"
            ax_t.loglog(size, t, marker="o", label=label)
            ax_m.loglog(size, mem, marker="o", label=label)
        ax_t.set(xlabel="contributors or requirements", ylabel="allocate time [s]")
        ax_m.set(xlabel="contributors or requirements", ylabel="peak memory [MB]")
        ax_t.legend(fontsize=7)
        fig.suptitle("allocate on invented cases (30 parts per chain)")
        fig.tight_layout()
        fig.savefig(args.plot)
        print(f"figure: {args.plot}")


if __name__ == "__main__":
    main()
