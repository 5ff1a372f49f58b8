"""Write the golden outputs of every demo case (run only when a change of numbers is intended).

    python tests/golden/regenerate.py

Each demo case in cases/ is run through the command line exactly as a user runs it
(``--json``): analyze, allocate under each model, frontier (3 points) under each model and
verify (fixed seed) of the current tolerances. tests/test_golden.py re-runs the same
commands and compares every number to 1e-12 relative. The files pin behaviour during
refactoring; they are not a check of correctness (the reference tests are).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(ROOT))

MODELS = ("worst-case", "rss", "mean-shift")
CASES = sorted((ROOT / "cases").glob("*.toml"))


def commands(case: Path) -> dict[str, list[str]]:
    """Command label -> CLI arguments (paths relative to the repository root)."""
    rel = str(case.relative_to(ROOT))
    out = {"analyze": ["analyze", rel, "--json"]}
    for m in MODELS:
        out[f"allocate {m}"] = ["allocate", rel, "--model", m, "--json"]
    for m in MODELS:
        out[f"frontier {m}"] = ["frontier", rel, "--model", m, "--points", "3", "--json"]
    out["verify"] = ["verify", rel, "--seed", "7", "--samples", "20000", "--json"]
    return out


def run(args: list[str]):
    """(exit code, parsed JSON or None) of one command, run in this process."""
    import os

    from click.testing import CliRunner

    from allocator.cli.main import cli

    here = os.getcwd()
    os.chdir(ROOT)
    try:
        done = CliRunner().invoke(cli, args, catch_exceptions=False)
    finally:
        os.chdir(here)
    try:
        document = json.loads(done.stdout)
    except ValueError:
        document = None
    return done.exit_code, document


def main() -> None:
    for case in CASES:
        record = {}
        for label, args in commands(case).items():
            code, document = run(args)
            record[label] = {"args": args, "exit_code": code, "json": document}
            print(f"{case.name}: {label}: exit {code}", file=sys.stderr)
        (HERE / f"{case.stem}.json").write_text(json.dumps(record, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    main()
