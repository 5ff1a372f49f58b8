"""Large cases: whole-process `allocator allocate` against a direct cvxpy/Clarabel model.

Run:  python benchmarks/bench_large.py [--repeat N] [--contributors N] [--requirements M]

Writes the invented case of ``large_case.py`` (default 1000 contributors × 100
requirements, 30 parts per chain; two-sided limits for worst case and rss, an upper limit
only for mean shift, where the direct model is then exact) to a temporary folder and runs,
each in its own process, ``python -m allocator allocate CASE --model MODEL --json`` and
``python benchmarks/direct_model.py CASE MODEL`` (the baseline: a vectorised model a user
could write by hand, solved by Clarabel). Per model: the median wall time and the peak
resident memory (``os.wait4``'s ``ru_maxrss``) of each, their ratios (goals: time ≤ 0.5×,
memory ≤ 1.5×), allocate's status, solver and certified gap, and the relative cost
difference (goal ≤ 1e-7).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))  # this checkout's allocator, before anything imports one

from large_case import write_large_case  # noqa: E402
MODELS = ("worst-case", "rss", "mean-shift")


def run_measured(cmd):
    """(wall [s], peak RSS [MB], stdout, exit code) of one process, via os.wait4."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop("PYTHONDONTWRITEBYTECODE", None)  # as installed: compiled modules are cached
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        start = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=out, stderr=err, cwd=ROOT, env=env)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - start
        proc.returncode = os.waitstatus_to_exitcode(status)
        out.seek(0)
        return wall, usage.ru_maxrss / 1024.0, out.read().decode(), proc.returncode


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--contributors", type=int, default=1000)
    parser.add_argument("--requirements", type=int, default=100)
    parser.add_argument("--per-chain", type=int, default=30)
    parser.add_argument("--models", nargs="*", default=list(MODELS))
    args = parser.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="bench_large_"))
    print(f"invented case {args.contributors} contributors x {args.requirements} requirements, "
          f"{args.per_chain} per chain; median of {args.repeat} runs each, alternated")
    print(f"{'model':<11} {'allocate s':>10} {'direct s':>9} {'time':>6} {'alloc MB':>9} {'direct MB':>9} "
          f"{'memory':>7} {'cost diff':>9}  allocate's answer")
    for model in args.models:
        path = folder / f"large_{model}.toml"
        write_large_case(path, contributors=args.contributors, requirements=args.requirements,
                         per_chain=args.per_chain, model=model, sides="upper" if model == "mean-shift" else "two")
        ours = [sys.executable, "-m", "allocator", "allocate", str(path), "--model", model, "--json"]
        theirs = [sys.executable, str(HERE / "direct_model.py"), str(path), model]
        samples = {"ours": [], "theirs": []}
        for _ in range(args.repeat):  # alternate, so both see the same machine load
            samples["ours"].append(run_measured(ours))
            samples["theirs"].append(run_measured(theirs))
        t_ours = statistics.median(s[0] for s in samples["ours"])
        t_dir = statistics.median(s[0] for s in samples["theirs"])
        m_ours = statistics.median(s[1] for s in samples["ours"])
        m_dir = statistics.median(s[1] for s in samples["theirs"])
        result = json.loads(samples["ours"][-1][2])["results"][0]
        direct = json.loads(samples["theirs"][-1][2])
        diff = abs(result["total_cost"] - direct["cost"]) / abs(direct["cost"])
        gap = result.get("gap")
        verdict = "ok" if t_ours <= 0.5 * t_dir and m_ours <= 1.5 * m_dir and diff <= 1e-7 else "ABOVE GOAL"
        print(f"{model:<11} {t_ours:>10.2f} {t_dir:>9.2f} {t_ours / t_dir:>5.2f}x {m_ours:>9.0f} {m_dir:>9.0f} "
              f"{m_ours / m_dir:>6.2f}x {diff:>9.1e}  {result['status']}, {result['solver']}, "
              f"gap {gap if gap is None else format(gap, '.0e')}; direct {direct['status']}; {verdict}")


if __name__ == "__main__":
    main()
