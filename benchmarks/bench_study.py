"""A study of many cases: 1 local worker against 2 local workers and a Dask LocalCluster.

Cases: ``--cases`` invented chains (default 200), written as case files into a temporary
folder: 4 to 12 contributors with random invented cost curves (benchmarks/invented.py), one
or two two-sided requirements whose limits need about 30 % less worst-case spread than the
current tolerances give; models worst-case and rss. Never real product data.

Baseline: ``allocator.study(folder, workers=1)`` (every case in this process, after a
warm-up that does the solvers' first imports; each runner is warmed up too). Measured in
the same run: ``workers=2`` (a local process pool) and a ``distributed.LocalCluster`` with
two worker processes (needs the ``cluster`` extra; skipped with a note otherwise). Printed:
seconds and the speed-up against the baseline; each run's rows must equal the baseline's.
The ideal speed-up on two idle cores is 2; pool start-up, the workers' first imports and a
busy machine take from it.

Run:  python benchmarks/bench_study.py [--cases 200] [--seed 1]
"""

from __future__ import annotations

import argparse
import math
import tempfile
import time
from pathlib import Path

import numpy as np

import allocator
from invented import random_cost


def cost_text(curve) -> str:
    parts = [f'curve = "{curve.curve}"', f"a = {float(curve.a)!r}", f"b = {float(curve.b)!r}"]
    if curve.curve == "exponential":
        parts.append(f"c = {float(curve.c)!r}")
    if curve.curve == "reciprocal-power":
        parts.append(f"k = {float(curve.k)!r}")
    return "{ " + ", ".join(parts) + " }"


def invented_case(rng, index: int) -> str:
    """The text of one invented case file."""
    n = int(rng.integers(4, 13))
    lines = [f'title = "invented benchmark chain {index}"', 'currency = "EUR"', ""]
    tolerances = rng.uniform(0.02, 0.08, n)
    for i in range(n):
        lines += ["[[contributor]]", f'name = "part{i}"', f"nominal = {10.0 + i}",
                  f"tolerance = {float(tolerances[i])!r}", "limits = [0.002, 0.2]",
                  f"cost = {cost_text(random_cost(rng))}", ""]
    for j in range(int(rng.integers(1, 3))):
        members = rng.choice(n, size=max(2, n - j * 2), replace=False)
        signs = rng.choice([-1.0, 1.0], size=len(members))
        nominal = float(sum(s * (10.0 + m) for s, m in zip(signs, members)))
        half = 0.7 * float(sum(tolerances[m] for m in members))  # 30 % less than today's worst case
        chain = ", ".join(f"part{m} = {float(s)!r}" for m, s in zip(members, signs))
        lines += ["[[requirement]]", f'name = "gap{j}"', f"chain = {{ {chain} }}",
                  f"lower = {nominal - half!r}", f"upper = {nominal + half!r}", "fallout_ppm = 100", ""]
    lines += ["[allocation]", 'models = ["worst-case", "rss"]', "",
              "[economics]", f"volume = {int(rng.integers(1, 100)) * 1000}", ""]
    return "\n".join(lines)


def timed(label: str, **options):
    start = time.perf_counter()
    result = allocator.study(options.pop("folder"), **options)
    return label, time.perf_counter() - start, result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", type=int, default=200)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    with tempfile.TemporaryDirectory(prefix="bench-study-") as folder:
        for i in range(args.cases):
            Path(folder, f"case{i:04d}.toml").write_text(invented_case(rng, i), encoding="utf-8")
        # warm-up: the solvers' first imports happen here, not inside the first timing (the
        # local pool forks from this process; the cluster's workers are warmed up below)
        first = sorted(Path(folder).iterdir())[:2]
        allocator.study(first, workers=1)
        runs = [timed("1 worker (baseline)", folder=folder, workers=1),
                timed("2 local workers", folder=folder, workers=2)]
        try:
            import distributed
        except ImportError:
            distributed = None
        if distributed is None:
            print("LocalCluster: skipped (pip install \"allocator[cluster]\")")
        else:
            with distributed.LocalCluster(host="127.0.0.1", n_workers=2, threads_per_worker=1, processes=True,
                                          dashboard_address=None) as cluster:
                allocator.study(first, scheduler=cluster.scheduler_address)  # warm-up: imports on the workers
                runs.append(timed("LocalCluster, 2 processes", folder=folder, scheduler=cluster.scheduler_address))
    _, base, reference = runs[0]
    counts = {}
    for r in reference.rows:
        counts[r.status] = counts.get(r.status, 0) + 1
    print(f"{args.cases} invented cases, {len(reference.rows)} rows ({counts})")
    for label, seconds, result in runs:
        same = "same rows" if result.rows == reference.rows else "ROWS DIFFER"
        speedup = base / seconds if seconds > 0 else math.inf
        print(f"  {label:28s} {seconds:8.2f} s   speed-up {speedup:5.2f}   {same}")


if __name__ == "__main__":
    main()
