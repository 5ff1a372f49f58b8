"""Studies of many cases (allocator.studies, `allocator study`), locally and on a Dask cluster.

The rows are checked against allocating each case alone (allocator.allocate on the file,
the same floats), the shadow prices of the tolerances against the closed-form Lagrange
solution for reciprocal cost curves under worst case (Chase, Greenwood, Loosli & Hauglund
1990, "Least cost tolerance allocation for mechanical assemblies with automated process
selection", Manufacturing Review 3(1)), and the cluster runs against local runs of the same
work. Every case here is invented.
"""

from __future__ import annotations

import json
import math
import shutil
import sys
from pathlib import Path

import pytest
from click.testing import CliRunner

import allocator
from allocator.cli.main import cli
from allocator.errors import UsageError
from allocator.studies import contributor_prices, study
from helpers import run_on_a_terminal

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "cases" / "gearbox_end_play.toml"

# Invented chain: three reciprocal parts, y = a + b − c with b two instances per assembly,
# upper limit only. Worst case (docs/case-file.md, count semantics): ȳ + Σ n|s|t ≤ upper with
# ȳ = Σ s·n·nominal = 10 + 2·5 − 4 = 16, so the room is T = 0.3.
CHAIN = {
    "a": {"nominal": 10.0, "b": 0.004, "count": 1, "s": 1.0},
    "b": {"nominal": 5.0, "b": 0.001, "count": 2, "s": 1.0},
    "c": {"nominal": 4.0, "b": 0.009, "count": 1, "s": -1.0},
}
ROOM = 0.3


def chain_text(volume: float | None = 20000.0, upper: float = 16.0 + ROOM, title: str = "invented chain") -> str:
    lines = [f'title = "{title}"', 'currency = "EUR"', ""]
    for name, p in CHAIN.items():
        lines += ["[[contributor]]", f'name = "{name}"', f"nominal = {p['nominal']}", "tolerance = 0.02",
                  "limits = [0.0005, 1.0]", f"count = {p['count']}",
                  f'cost = {{ curve = "reciprocal", a = 0.5, b = {p["b"]} }}', ""]
    chain = ", ".join(f"{n} = {p['s']}" for n, p in CHAIN.items())
    lines += ["[[requirement]]", 'name = "gap"', f"chain = {{ {chain} }}", f"upper = {upper}", "",
              "[allocation]", 'models = ["worst-case", "rss"]', ""]
    if volume is not None:
        lines += ["[economics]", f"volume = {volume}", ""]
    return "\n".join(lines)


@pytest.fixture
def folder(tmp_path):
    """Four invented cases (the chain, a copy of a demo case, an infeasible one, a bad one)."""
    (tmp_path / "a_chain.toml").write_text(chain_text(), encoding="utf-8")
    shutil.copy(DEMO, tmp_path / "b_gearbox.toml")
    # the chain with room 0.0002: every part at its tightest limit misses it (worst case 0.002, RSS ~0.0009)
    (tmp_path / "c_infeasible.toml").write_text(chain_text(upper=16.0002, title="invented tight chain"),
                                                encoding="utf-8")
    (tmp_path / "d_bad.toml").write_text(chain_text().replace('curve = "reciprocal"', 'curve = "recipro"', 1),
                                         encoding="utf-8")
    (tmp_path / "notes.txt").write_text("not a case", encoding="utf-8")
    return tmp_path


@pytest.fixture
def good(folder):
    """Only the cases that solve (a folder of its own)."""
    out = folder / "good"
    out.mkdir()
    for name in ("a_chain.toml", "b_gearbox.toml"):
        shutil.copy(folder / name, out / name)
    return out


def test_rows_equal_allocating_each_case_alone(folder):
    result = study([folder], workers=1)
    files = [Path(f).name for f in result.files]
    assert files == ["a_chain.toml", "b_gearbox.toml", "c_infeasible.toml", "d_bad.toml"]
    for row in result.rows:
        if row.status == "bad input":
            continue
        case = allocator.load_case(row.file)
        alone = allocator.allocate(case, row.model)
        assert row.status == alone.status
        assert row.current_cost == alone.current_cost  # the same floats, not merely close
        assert row.total_cost == alone.total_cost
        if alone.success:
            assert row.saving == alone.current_cost - alone.total_cost
            assert row.saving_per_year == row.saving * case.economics.volume
            assert row.binding == tuple(f"{r.name} ({r.binding})" for r in alone.requirements if r.binding)
    models = {Path(r.file).name: [] for r in result.rows}
    for r in result.rows:
        models[Path(r.file).name].append(r.model)
    assert models["a_chain.toml"] == ["worst-case", "rss"]  # the case's own models
    assert models["b_gearbox.toml"] == ["worst-case", "rss", "mean-shift"]


@pytest.mark.slow
def test_every_demo_case_in_two_workers_equals_allocating_it_alone():
    # processes, cost tables from CSV, ISO 286 and step rounding: the mixed-integer paths
    result = study([ROOT / "cases"], workers=2)
    assert result.status == "optimal" and len(result.files) == len(list((ROOT / "cases").glob("*.toml")))
    for row in result.rows:
        alone = allocator.allocate(allocator.load_case(row.file), row.model)
        assert (row.status, row.total_cost, row.current_cost) == (alone.status, alone.total_cost, alone.current_cost)
        # a rounded allocation is priced at its unrounded optimum, whose cost has a derivative
        priced = alone.unrounded if alone.unrounded is not None else alone
        assert dict(row.largest_prices).items() <= contributor_prices(allocator.load_case(row.file), priced).items()


def test_a_bad_and_an_infeasible_case_keep_their_rows_and_the_study_goes_on(folder):
    result = study([folder], workers=1)
    by_file = {}
    for r in result.rows:
        by_file.setdefault(Path(r.file).name, []).append(r)
    bad = by_file["d_bad.toml"]
    assert [(r.model, r.status) for r in bad] == [(None, "bad input")]
    assert "d_bad.toml" in bad[0].message and "recipro" in bad[0].message
    tight = by_file["c_infeasible.toml"]
    assert {r.status for r in tight} == {"infeasible"} and all("gap" in r.message for r in tight)
    assert all(r.total_cost is None and r.saving is None for r in tight)
    assert {r.status for r in by_file["b_gearbox.toml"]} == {"optimal"}
    assert result.status == "bad input" and result.exit_code == 2 and not result.success
    # without the bad case: infeasible decides (exit 1)
    rest = study([folder / n for n in ("a_chain.toml", "c_infeasible.toml")], workers=1)
    assert rest.status == "infeasible" and rest.exit_code == 1


def test_totals_add_the_solved_rows_per_model(folder):
    result = study([folder], workers=1)
    for total in result.totals:
        rows = [r for r in result.rows if r.model == total.model and r.success]
        assert total.solved == len(rows)
        assert total.saving == pytest.approx(sum(r.saving for r in rows), rel=1e-12)
        assert total.total_cost == pytest.approx(sum(r.total_cost for r in rows), rel=1e-12)
        yearly = [r.saving_per_year for r in rows if r.saving_per_year is not None]
        assert total.saving_per_year == pytest.approx(sum(yearly), rel=1e-12)


def test_shadow_prices_of_tolerances_match_the_closed_form_lagrange_solution(tmp_path):
    # Chase et al. (1990): min Σ n(a + b/t) s.t. Σ n|s|t = T gives n b/t² = λ n|s| with
    # √λ = Σ n √(b|s|) / T, so the price −n C'(t) of each tolerance is λ n |s|.
    path = tmp_path / "chain.toml"
    path.write_text(chain_text(), encoding="utf-8")
    case = allocator.load_case(path)
    alloc = allocator.allocate(case, "worst-case")
    root_lambda = sum(p["count"] * math.sqrt(p["b"] * abs(p["s"])) for p in CHAIN.values()) / ROOM
    expected = {n: root_lambda**2 * p["count"] * abs(p["s"]) for n, p in CHAIN.items()}
    prices = contributor_prices(case, alloc)
    assert prices == pytest.approx(expected, rel=1e-6)
    row = study([path], models=["worst-case"], workers=1).rows[0]
    ranked = sorted(expected, key=lambda n: -expected[n])
    assert [n for n, _ in row.largest_prices] == ranked[:3]


def test_workers_one_and_two_give_identical_rows(folder):
    one = study([folder], workers=1)
    two = study([folder], workers=2)
    assert one.rows == two.rows and one.totals == two.totals and one.status == two.status


def test_cli_json_keys_and_exit_codes(folder, good):
    runner = CliRunner()
    done = runner.invoke(cli, ["study", str(folder), "--workers", "1", "--json"])
    assert done.exit_code == 2, done.output
    document = json.loads(done.stdout)
    for row in document["cases"]:
        assert {"file", "model", "status", "total_cost", "current_cost"} <= set(row)
    assert [r["status"] for r in document["cases"]].count("bad input") == 1
    assert done.stderr.count("\n") == 1 and done.stderr.startswith("error: study:")

    tight = runner.invoke(cli, ["study", str(good), str(folder / "c_infeasible.toml"), "--workers", "1"])
    assert tight.exit_code == 1, tight.output
    assert "infeasible" in tight.stdout

    fine = runner.invoke(cli, ["study", str(good), "--workers", "1", "--model", "rss", "--csv"])
    assert fine.exit_code == 0, fine.output
    header = fine.stdout.splitlines()[0].split(",")
    assert header[:4] == ["file", "title", "model", "status"]
    assert len(fine.stdout.splitlines()) == 3  # header and one rss row per case


def test_cli_usage_errors_are_one_line_exit_2(folder):
    runner = CliRunner()
    empty = folder / "empty"
    empty.mkdir()
    for args in (["study", str(empty)],
                 ["study", str(folder), "--workers", "0"],
                 ["study", str(folder), "--workers", "2", "--scheduler", "tcp://127.0.0.1:1"],
                 ["study", str(folder), "-o", str(folder / "missing" / "s.html")],
                 ["study", str(folder), "-o", str(folder)]):
        done = runner.invoke(cli, args)
        assert done.exit_code == 2, (args, done.output)
        assert done.stderr.count("\n") == 1, (args, done.stderr)


def test_html_page_is_written_whole_and_never_over_a_case(good, monkeypatch):
    runner = CliRunner()
    page = good / "study.html"
    done = runner.invoke(cli, ["study", str(good), "--workers", "1", "-o", str(page)])
    assert done.exit_code == 0, done.output
    text = page.read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>") and text.rstrip().endswith("</html>")
    assert "<svg" in text and "<script" not in text
    assert "stable, capable processes" in text and "worst case" in text  # the cautions
    result = study([good], workers=1)
    from allocator.report.html import fmt_number

    assert fmt_number(result.rows[0].total_cost) in text
    # a failed write keeps the previous page whole and leaves no temporary file
    page.write_text("previous page", encoding="utf-8")
    import allocator.files

    def refuse(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(allocator.files.os, "replace", refuse)
    done = runner.invoke(cli, ["study", str(good), "--workers", "1", "-o", str(page)])
    monkeypatch.undo()
    assert done.exit_code == 2 and done.stderr.count("\n") == 1
    assert page.read_text(encoding="utf-8") == "previous page"
    assert sorted(p.name for p in good.iterdir()) == ["a_chain.toml", "b_gearbox.toml", "study.html"]
    # an input case is never the output
    before = (good / "a_chain.toml").read_bytes()
    done = runner.invoke(cli, ["study", str(good), "--workers", "1", "-o", str(good / "a_chain.toml")])
    assert done.exit_code == 2 and "refusing to overwrite" in done.stderr
    assert (good / "a_chain.toml").read_bytes() == before


def test_a_progress_bar_on_a_terminal_and_nothing_but_json_on_stdout(good, tmp_path):
    code, out, terminal = run_on_a_terminal(["study", good, "--workers", "1", "--json"], cwd=tmp_path)
    assert code == 0, terminal
    assert len(json.loads(out)["cases"]) == 5  # nothing but the document on stdout
    assert "study:" in terminal and "/2 [" in terminal and "case/s" in terminal
    piped = CliRunner().invoke(cli, ["study", str(good), "--workers", "1", "--json"])
    assert piped.stderr == ""  # no bar on a pipe


def test_a_bug_while_solving_a_case_is_exit_3_naming_the_case(good, monkeypatch):
    import allocator.solve

    def broken(case, model, **kwargs):
        raise ZeroDivisionError("invented bug")

    monkeypatch.setattr(allocator.solve, "allocate", broken)
    done = CliRunner().invoke(cli, ["study", str(good / "a_chain.toml"), "--workers", "1"])
    assert done.exit_code == 3
    assert done.stderr.count("\n") == 1 and "case " in done.stderr and "a_chain.toml" in done.stderr
    assert "ZeroDivisionError: invented bug" in done.stderr


def test_study_frames_hook_gives_the_tables(good):
    frames = study([good], workers=1).frames()
    assert list(frames) == ["cases", "totals"]
    assert len(frames["cases"]) == 5 and set(frames["totals"]["model"]) == {"worst-case", "rss", "mean-shift"}


def test_a_scheduler_without_the_extra_names_the_install(good, monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed -> ImportError
    with pytest.raises(UsageError, match=r'pip install "allocator\[cluster\]"'):
        study([good], scheduler="tcp://127.0.0.1:8786")
    done = CliRunner().invoke(cli, ["study", str(good), "--scheduler", "tcp://127.0.0.1:8786"])
    assert done.exit_code == 2
    assert done.stderr.count("\n") == 1 and 'pip install "allocator[cluster]"' in done.stderr


# --------------------------------------------------------------------------- on a Dask cluster


@pytest.fixture(scope="module")
def scheduler():
    """A local Dask cluster on 127.0.0.1: one worker process (so that every task and result
    crosses a process boundary, as on a real cluster), no dashboard; closed after the module."""
    distributed = pytest.importorskip("distributed", reason="needs the cluster extra: pip install '.[cluster]'")
    with distributed.LocalCluster(host="127.0.0.1", n_workers=1, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        yield cluster.scheduler_address


def test_study_on_the_cluster_equals_the_local_study(folder, scheduler):
    local = study([folder], workers=1)
    remote = study([folder], scheduler=scheduler)
    assert remote.rows == local.rows and remote.status == local.status


def test_verify_on_the_cluster_is_bit_identical_to_a_local_run(scheduler):
    from allocator.parallel import cluster_runner

    case = allocator.load_case(DEMO)
    local = allocator.verify(case, samples=300_000, seed=11, chunk_size=2**16)
    with cluster_runner(scheduler) as run:
        remote = allocator.verify(case, samples=300_000, seed=11, chunk_size=2**16, map_blocks=run)
    assert json.dumps(remote.to_dict(), default=list) == json.dumps(local.to_dict(), default=list)
    runner = CliRunner()
    args = ["verify", str(DEMO), "--samples", "200000", "--seed", "5", "--json"]
    here = runner.invoke(cli, args)
    there = runner.invoke(cli, args + ["--scheduler", scheduler])
    assert here.exit_code == there.exit_code == 0, there.output
    assert there.stdout == here.stdout


def test_xlsx_holds_the_same_numbers_as_json_with_the_currency_in_the_headers(tmp_path):
    pytest.importorskip("openpyxl", reason="the sheets extra (openpyxl) is not installed")
    import pandas as pd

    demo = Path(__file__).resolve().parents[1] / "cases"
    files = [str(demo / "gearbox_end_play.toml"), str(demo / "pump_shim.toml")]
    book = tmp_path / "study.xlsx"
    done = CliRunner().invoke(cli, ["study", *files, "--model", "rss", "--workers", "1", "--json",
                                    "--xlsx", str(book)])
    assert done.exit_code == 0, done.output
    rows = json.loads(done.stdout)["cases"]
    sheets = pd.read_excel(book, sheet_name=None)
    assert set(sheets) == {"cases", "totals"}
    cases = sheets["cases"]
    currency = {r["currency"] for r in rows}
    assert len(currency) == 1
    label = f"[{currency.pop()}]"
    assert f"total_cost {label}" in cases.columns and "currency" not in cases.columns
    for row, (_, cell) in zip(rows, cases.iterrows()):
        assert cell["file"] == row["file"]
        # a workbook number keeps 16 significant digits (docs/spreadsheets.md)
        assert cell[f"total_cost {label}"] == pytest.approx(row["total_cost"], rel=1e-15)
        assert cell[f"current_cost {label}"] == pytest.approx(row["current_cost"], rel=1e-15)
    assert sheets["totals"][f"saving {label}"].iloc[0] == pytest.approx(
        sum(r["current_cost"] - r["total_cost"] for r in rows), rel=1e-12)
