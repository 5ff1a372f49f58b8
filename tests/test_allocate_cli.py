"""`allocator allocate` through click's CliRunner: human table, --json, --csv, --fix, errors.

The numbers come from the library (tests/test_allocate.py and tests/reference/ check those
against independent solvers and closed forms); here the command must show them faithfully,
keep the output contracts and use the documented exit codes.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
from pathlib import Path

import pytest
from click.testing import CliRunner

from allocator.case import load_case
from allocator.cli.main import cli
from allocator.errors import UsageError
from allocator.solve import allocate
from helpers import BRACKET

CASES = Path(__file__).resolve().parents[1] / "cases"
GEARBOX = CASES / "gearbox_end_play.toml"



def _write(tmp_path, lower=0.05):
    path = tmp_path / "bracket.toml"
    path.write_text(BRACKET.replace("{lower}", str(lower)))
    return path


def run(*args):
    return CliRunner().invoke(cli, ["allocate", *map(str, args)])


def test_human_output_shows_every_model_contributor_and_requirement(tmp_path):
    path = _write(tmp_path)
    result = run(path)
    assert result.exit_code == 0, result.output
    out = result.stdout
    case = load_case(path)
    for model in ("worst-case", "rss"):
        assert f"model {model}: optimal" in out
        library = allocate(case, model)
        for name, t in library.tolerances.items():
            assert f"±{t:.4g}" in out, (model, name)
        assert f"total cost {library.total_cost:.6g} EUR" in out
    for name in ("plate", "washer", "boss", "requirement clearance"):
        assert name in out
    assert "ppm (target 100 ppm)" in out and "shadow prices" in out


def test_json_keeps_the_contract_and_matches_the_library(tmp_path):
    path = _write(tmp_path)
    result = run(path, "--json")
    assert result.exit_code == 0
    doc = json.loads(result.stdout)
    case = load_case(path)
    assert [r["model"] for r in doc["results"]] == ["worst-case", "rss"]
    for entry in doc["results"]:
        assert {"model", "status", "total_cost", "tolerances"} <= set(entry)
        library = allocate(case, entry["model"])
        assert entry["status"] == "optimal"
        assert entry["total_cost"] == pytest.approx(library.total_cost, rel=1e-12)
        assert entry["tolerances"] == pytest.approx(dict(library.tolerances), rel=1e-12)
        assert entry["requirements"][0]["name"] == "clearance"


def test_csv_has_one_row_per_model_and_contributor():
    result = run(GEARBOX, "--csv", "--model", "rss", "--model", "worst-case")
    assert result.exit_code == 0
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    case = load_case(GEARBOX)
    assert len(rows) == 2 * len(case.contributors)
    assert [r["model"] for r in rows[:1] + rows[-1:]] == ["rss", "worst-case"]
    library = allocate(case, "rss")
    for row in rows[: len(case.contributors)]:
        assert float(row["allocated"]) == pytest.approx(library.tolerances[row["contributor"]], rel=1e-12)
    assert {r["bound"] for r in rows} >= {"fixed"}


def test_fix_holds_the_tolerance_and_reports_the_cost_of_holding(tmp_path):
    path = _write(tmp_path)
    result = run(path, "--model", "rss", "--fix", "plate=0.02")
    assert result.exit_code == 0, result.output
    assert "held: plate = ±0.02" in result.stdout
    assert "more than the unheld optimum" in result.stdout
    doc = json.loads(run(path, "--model", "rss", "--fix", "plate=0.02", "--json").stdout)
    entry = doc["results"][0]
    assert entry["tolerances"]["plate"] == 0.02
    assert entry["cost_delta"] == pytest.approx(entry["total_cost"] - entry["unfixed_total_cost"])
    assert entry["cost_delta"] > 0  # holding plate tighter than its optimum costs money


@pytest.mark.parametrize(
    "fix, message",
    [
        ("plat=0.02", "did you mean 'plate'"),
        ("plate=0", "must be > 0"),
        ("plate=-0.1", "must be > 0"),
        ("plate", "expected NAME=T"),
        ("plate=wide", "is not a number"),
    ],
)
def test_bad_fix_is_one_line_and_exit_2(tmp_path, fix, message):
    result = run(_write(tmp_path), "--fix", fix)
    assert result.exit_code == 2
    assert message in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1 and "Traceback" not in result.output
    assert result.stdout == ""


@pytest.mark.parametrize("value", ["0.5", "0.009", "1e-9"])
def test_fix_outside_the_limits_is_refused_naming_them(tmp_path, value):
    # plate can be made to ±0.01 .. ±0.2; a hold outside that is not a tolerance it has
    path = _write(tmp_path)
    expected = f"fix: plate: tolerance {float(value):g} is outside its limits [0.01, 0.2]"
    result = run(path, "--fix", f"plate={value}")
    assert result.exit_code == 2, result.output
    assert result.stderr.strip() == f"error: {expected}"
    assert result.stdout == "" and "Traceback" not in result.output
    with pytest.raises(UsageError) as info:  # the library says the same
        allocate(load_case(path), "rss", fix={"plate": float(value)})
    assert str(info.value) == expected


def test_fix_at_a_limit_is_accepted(tmp_path):
    path = tmp_path / "loose.toml"  # limits wide enough for plate at its loosest
    path.write_text(BRACKET.replace("{lower}", "-1.0").replace("upper = 0.35", "upper = 1.5"))
    for value in ("0.01", "0.2"):
        result = run(path, "--model", "rss", "--fix", f"plate={value}", "--json")
        assert result.exit_code == 0, result.output
        assert json.loads(result.stdout)["results"][0]["tolerances"]["plate"] == float(value)


def test_fix_outside_every_process_names_each_range():
    path = CASES / "pump_shim.toml"
    result = run(path, "--model", "rss", "--fix", "body_depth=0.5")
    assert result.exit_code == 2, result.output
    line = result.stderr.strip()
    assert len(line.splitlines()) == 1
    assert line == (
        "error: fix: body_depth: tolerance 0.5 is outside the limits of every process "
        "(turning [0.02, 0.1], fine boring [0.008, 0.03], grinding [0.002, 0.01])"
    )
    with pytest.raises(UsageError, match="outside the limits of every process"):
        allocate(load_case(path), "worst-case", fix={"body_depth": 0.5})


def test_json_and_csv_together_is_a_usage_error(tmp_path):
    result = run(_write(tmp_path), "--json", "--csv")
    assert result.exit_code == 2 and "cannot be used together" in result.stderr


def test_infeasible_requirement_exits_1_with_its_name(tmp_path):
    # nominal clearance 12 − 2·1.5 − 8.8 = 0.2; at the tightest tolerances the worst case is
    # 0.2 ± (0.01 + 2·0.005 + 0.01) = [0.17, 0.23], which misses [0.18, 0.21] on both sides
    path = tmp_path / "tight.toml"
    path.write_text(BRACKET.replace("{lower}", "0.18").replace("upper = 0.35", "upper = 0.21"))
    result = run(path, "--model", "worst-case")
    assert result.exit_code == 1
    assert "exceeds upper 0.21 by 0.02" in result.stdout and "below lower 0.18 by 0.01" in result.stdout
    # the reason is printed once (stdout); stderr only says which model failed, in one line
    assert "requirement 'clearance'" in result.stdout
    assert result.stderr == "error: allocation with model worst-case: infeasible\n"
    as_json = run(path, "--model", "worst-case", "--json")
    doc = json.loads(as_json.stdout)
    assert doc["results"][0]["status"] == "infeasible" and doc["results"][0]["total_cost"] is None
    assert as_json.stderr == "error: allocation with model worst-case: infeasible\n"


@pytest.mark.parametrize("output", ["human", "--json"])
def test_one_model_crashing_does_not_hide_the_models_that_solved(tmp_path, monkeypatch, output):
    # mean shift once raised inside its solver: nothing was printed, not even rss's answer
    import allocator.solve

    path = _write(tmp_path)
    expected = allocate(load_case(path), "rss")
    original = allocator.solve.allocate

    def spoiled(case, model=None, **kwargs):
        if model == "mean-shift":
            raise ValueError("zero-size array to reduction operation maximum which has no identity")
        return original(case, model, **kwargs)

    monkeypatch.setattr(allocator.solve, "allocate", spoiled)
    args = [path, "--model", "rss", "--model", "mean-shift"] + ([output] if output != "human" else [])
    result = run(*args)
    assert result.exit_code == 3
    assert "Traceback" not in result.output
    lines = result.stderr.splitlines()
    assert len(lines) == 1
    assert lines[0].startswith("error: internal error in model mean-shift: ValueError: zero-size array")
    if output == "--json":
        doc = json.loads(result.stdout)
        assert [r["model"] for r in doc["results"]] == ["rss"]
        assert doc["results"][0]["total_cost"] == pytest.approx(expected.total_cost, rel=1e-12)
    else:
        assert "model rss: optimal" in result.stdout
        assert f"total cost {expected.total_cost:.6g}" in result.stdout


def _table_rows(block: str) -> list[dict[str, str]]:
    """The rows of one plain-text table (header, dashes, rows) as {header: cell}."""
    lines = block.splitlines()
    at = next(i for i, line in enumerate(lines) if line.startswith("---"))
    spans = [m.span() for m in re.finditer(r"-+", lines[at])]
    cut = lambda line: [line[a:b if k + 1 < len(spans) else None].strip()  # noqa: E731
                        for k, (a, b) in enumerate(spans)]
    header = cut(lines[at - 1])
    rows = []
    for line in lines[at + 1:]:
        if not line.strip() or line.startswith("total cost"):
            break
        rows.append(dict(zip(header, cut(line))))
    return rows


def test_a_dearer_allocation_says_what_it_costs_more(tmp_path):
    # with lower = 0.1 the current design misses the worst case (0.2 ± (0.05 + 2·0.02 + 0.04)
    # = [0.07, 0.33]), so the worst-case allocation must tighten and costs more than today
    path = _write(tmp_path, lower=0.1)
    result = run(path, "--model", "worst-case")
    assert result.exit_code == 0, result.output
    # the current cost from the cost curves by hand: plate 0.5 + 0.01/0.05, washer
    # 2 × (0.05 + 0.4·exp(−30·0.02)), boss 1 + 0.0002/0.04²
    current = (0.5 + 0.01 / 0.05) + 2 * (0.05 + 0.4 * math.exp(-0.6)) + (1.0 + 0.0002 / 0.04**2)
    total = allocate(load_case(path), "worst-case").total_cost
    assert total > current
    more, share = total - current, 100 * (total - current) / current
    assert f"current {current:.6g}; costs {more:.4g} more ({share:.1f} %))" in result.stdout
    assert "saves -" not in result.stdout and "-%" not in result.stdout


def test_process_and_grade_columns_and_iteration_count():
    # the gear hub case: two parts choose a process, the washer has none; every
    # tolerance is rounded to an ISO 286 grade
    gear_hub = CASES / "gear_hub_end_play.toml"
    result = run(gear_hub, "--model", "worst-case")
    assert result.exit_code == 0, result.output
    library = allocate(load_case(gear_hub), "worst-case")
    rows = {r["contributor"]: r for r in _table_rows(result.stdout)}
    assert set(rows) == set(dict(library.tolerances))
    for row in library.rows():
        name = row["contributor"]
        assert rows[name]["process"] == (row["process"] or ""), name
        assert rows[name]["grade"] == library.grades.get(name, ""), name
    assert rows["washer"]["process"] == "" and rows["washer"]["grade"].startswith("IT")
    # an iteration count reads "1 iteration", "2 iterations"
    counts = re.findall(r"(\d+) (iterations?)\b", result.stdout)
    assert counts
    for n, word in counts:
        assert word == ("iteration" if n == "1" else "iterations")


def test_no_process_or_grade_column_where_none_applies(tmp_path):
    result = run(_write(tmp_path), "--model", "rss")
    header = _table_rows(result.stdout)[0]
    assert "process" not in header and "grade" not in header


@pytest.mark.skipif(__import__("sys").platform == "win32", reason="needs a POSIX pseudo-terminal")
def test_progress_per_model_on_a_terminal_only(tmp_path):
    # choose tables make every model a mixed-integer solve: on a terminal a bar counts the
    # models at once; stdout (a pipe) keeps one JSON document; CliRunner (no terminal) none
    from helpers import run_on_a_terminal

    divider = CASES / "divider_output.toml"
    code, out, terminal = run_on_a_terminal(["allocate", divider, "--json"], cwd=tmp_path)
    assert code == 0, terminal
    assert len(json.loads(out)["results"]) == 2
    assert "allocate" in terminal and "/2" in terminal and "model" in terminal
    plain = CliRunner().invoke(cli, ["allocate", str(divider), "--json"])
    assert plain.exit_code == 0 and plain.stderr == ""
    assert json.loads(plain.stdout) == json.loads(out)
