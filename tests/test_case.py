"""Loading and validating case files (allocator.case) and the `init` command.

Expected values are read from the TOML/CSV text itself with the standard library
(tomllib, csv) or written out in the test, never taken from the loader's own output.
"""

from __future__ import annotations

import csv
import hashlib
import math
import os
import tomllib
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from allocator import case as case_module
from allocator.case import load_case, loads_case
from allocator.chain import linearise, linearise_all
from allocator.errors import CaseError

ROOT = Path(__file__).resolve().parents[1]
CASES = sorted((ROOT / "cases").glob("*.toml"))
INVENTED = "# Invented example for allocator demos; not real product data."

MINIMAL = """\
title = "minimal"

[[contributor]]
name = "a"
nominal = 10
tolerance = 0.1
limits = [0.05, 0.2]
cost = { curve = "reciprocal", b = 0.5 }

[[contributor]]
name = "b"
nominal = 4.0
tolerance = 0.02
fixed = true

[[requirement]]
name = "gap"
chain = { a = 1, b = -2 }
upper = 3.0
"""


def _error(text: str, **kwargs) -> CaseError:
    with pytest.raises(CaseError) as info:
        loads_case(text, source="t.toml", **kwargs)
    assert "\n" not in str(info.value)
    return info.value


# --------------------------------------------------------------------------- demo cases


def test_there_are_demo_cases():
    names = {p.name for p in CASES}
    assert {"gearbox_end_play.toml", "divider_output.toml", "pump_shim.toml"} <= names


@pytest.mark.parametrize("path", CASES, ids=lambda p: p.name)
def test_demo_case_loads_and_linearises(path):
    assert path.read_text(encoding="utf-8").splitlines()[0] == INVENTED
    case = load_case(path)
    raw = tomllib.loads(path.read_text(encoding="utf-8"))
    assert case.title == raw["title"]
    assert case.names == tuple(c["name"] for c in raw["contributor"])
    assert case.path == path
    assert case.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    for lin in linearise_all(case):
        assert math.isfinite(lin.nominal)
        assert np.all(np.isfinite(lin.sensitivity))
    # a demo must be worth allocating: something is free to move
    assert any(not c.fixed for c in case.contributors)


def test_gearbox_chain_nominal_is_sum_of_coeff_count_nominal():
    path = ROOT / "cases" / "gearbox_end_play.toml"
    raw = tomllib.loads(path.read_text(encoding="utf-8"))
    by_name = {c["name"]: c for c in raw["contributor"]}
    (req,) = raw["requirement"]
    expected = sum(
        coeff * by_name[n].get("count", 1) * by_name[n]["nominal"] for n, coeff in req["chain"].items()
    )
    case = load_case(path)
    assert linearise(case, case.requirement("end_play")).nominal == pytest.approx(expected, abs=1e-12)
    bearing = case.contributor("bearing_width")
    assert bearing.count == 2 and bearing.fixed and bearing.limits is None and bearing.cost is None
    assert case.contributor("gasket").distribution == "uniform"
    assert case.contributor("cover_spigot").cp == 1.33
    assert case.allocation.models == ("worst-case", "rss", "mean-shift")
    assert case.economics.volume == 40000 and case.economics.scrap_cost == 55.0
    assert case.frontier.requirement == "end_play" and case.frontier.range == (0.25, 0.60)
    assert case.requirement("end_play").chain == {k: float(v) for k, v in req["chain"].items()}


def test_divider_expression_sensitivities_match_hand_derivatives():
    # v = v_ref·r2/(r1 + r2): ∂v/∂v_ref = r2/(r1+r2), ∂v/∂r1 = −v_ref·r2/(r1+r2)²,
    # ∂v/∂r2 = v_ref·r1/(r1+r2)² (quotient rule)
    case = load_case(ROOT / "cases" / "divider_output.toml")
    v, r1, r2 = (case.contributor(n).nominal for n in ("v_ref", "r1", "r2"))
    lin = linearise(case, case.requirement("v_out"))
    assert lin.nominal == pytest.approx(v * r2 / (r1 + r2), rel=1e-14)
    expected = [r2 / (r1 + r2), -v * r2 / (r1 + r2) ** 2, v * r1 / (r1 + r2) ** 2]
    assert lin.sensitivity == pytest.approx(expected, rel=1e-12)
    r1_cost = case.contributor("r1").cost
    assert r1_cost.is_discrete and r1_cost.points_tolerance == (10.0, 50.0, 100.0, 500.0)
    assert case.contributor("r1").limits == (10.0, 500.0)  # implied by the table


def test_pump_processes_and_csv_table():
    path = ROOT / "cases" / "pump_shim.toml"
    case = load_case(path)
    body = case.contributor("body_depth")
    assert [p.name for p in body.processes] == ["turning", "fine boring", "grinding"]
    assert body.limits is None and body.cost is None
    assert [p.cp for p in body.processes] == [None, None, 1.33]
    assert body.processes[1].cost.curve == "reciprocal-power" and body.processes[1].cost.k == 1.2
    with open(ROOT / "cases" / "shim_costs.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    shim = case.contributor("shim")
    assert shim.cost.points_tolerance == tuple(float(r["tolerance"]) for r in rows)
    assert shim.cost.points_cost == tuple(float(r["cost"]) for r in rows)
    assert shim.cost.between == "interpolate"
    assert shim.limits == (float(rows[0]["tolerance"]), float(rows[-1]["tolerance"]))


# --------------------------------------------------------------------------- defaults


def test_defaults_as_written_in_the_contract():
    case = loads_case(MINIMAL)
    assert case.units == "mm" and case.currency == ""
    a = case.contributor("a")
    assert (a.distribution, a.cp, a.mean_shift, a.count, a.fixed, a.description) == (
        "normal", 1.0, 0.0, 1, False, ""
    )
    assert a.cost.a == 0.0 and a.cost.b == 0.5
    assert isinstance(a.nominal, float) and isinstance(a.tolerance, float)  # ints accepted
    assert a.limits == (0.05, 0.2)
    gap = case.requirement("gap")
    assert gap.fallout_ppm == 2700 and gap.lower is None and gap.upper == 3.0
    assert gap.chain == {"a": 1.0, "b": -2.0}
    assert case.allocation.models == ("worst-case", "rss") and case.allocation.rounding is None
    assert case.economics.volume is None and case.economics.scrap_cost is None
    assert case.frontier.requirement is None and case.frontier.points == 25
    assert case.path is None
    assert case.sha256 == hashlib.sha256(MINIMAL.encode()).hexdigest()


def test_settings_tables_are_read():
    text = MINIMAL + (
        '\n[allocation]\nmodels = ["mean-shift"]\nrounding = "iso286"\n'
        "\n[economics]\nvolume = 1000\nscrap_cost = 0\n"
        '\n[frontier]\nrequirement = "gap"\nvary = "fallout_ppm"\nrange = [1, 5000]\npoints = 2\n'
    )
    case = loads_case(text)
    assert case.allocation.models == ("mean-shift",) and case.allocation.rounding == "iso286"
    assert case.economics.volume == 1000.0 and case.economics.scrap_cost == 0.0
    assert case.frontier.vary == "fallout_ppm" and case.frontier.range == (1.0, 5000.0)
    assert case.frontier.points == 2


def test_table_cost_implies_limits_and_choose_keeps_listed_inside():
    table = 'cost = { curve = "table", between = "choose", tolerance = [0.02, 0.05, 0.1, 0.2], cost = [4, 2, 1, 0.5] }'
    text = MINIMAL.replace('cost = { curve = "reciprocal", b = 0.5 }', table)
    implied = loads_case(text.replace("limits = [0.05, 0.2]\n", "")).contributor("a")
    assert implied.limits == (0.02, 0.2)
    assert implied.cost.points_tolerance == (0.02, 0.05, 0.1, 0.2)
    narrowed = loads_case(text.replace("[0.05, 0.2]", "[0.04, 0.15]")).contributor("a")
    # only 0.05 and 0.1 lie inside [0.04, 0.15]
    assert narrowed.cost.points_tolerance == (0.05, 0.1) and narrowed.cost.points_cost == (2.0, 1.0)
    assert narrowed.limits == (0.05, 0.1)
    # one listed tolerance inside the limits: the limits pin it, the table stays whole
    single = loads_case(text.replace("[0.05, 0.2]", "[0.08, 0.15]")).contributor("a")
    assert single.limits == (0.1, 0.1) and len(single.cost.points_tolerance) == 4
    # interpolated tables keep every point and the limits given
    interp = loads_case(text.replace('"choose"', '"interpolate"').replace("[0.05, 0.2]", "[0.04, 0.15]"))
    assert interp.contributor("a").limits == (0.04, 0.15)
    assert len(interp.contributor("a").cost.points_tolerance) == 4


def test_fixed_contributor_needs_neither_limits_nor_cost_nor_tolerance_check():
    text = MINIMAL.replace("tolerance = 0.02\nfixed = true", "tolerance = 5.0\nfixed = true")
    assert loads_case(text).contributor("b").tolerance == 5.0


def test_count_semantics_nominal_of_chain():
    # b has count 3: the name stands for the sum of three parts
    case = loads_case(MINIMAL.replace("fixed = true", "fixed = true\ncount = 3"))
    assert linearise(case, case.requirement("gap")).nominal == pytest.approx(10 - 2 * 3 * 4.0)


# --------------------------------------------------------------------------- messages


def test_field_paths_are_one_based_and_name_the_item():
    text = MINIMAL.replace("tolerance = 0.02", "tolerance = -0.02")
    err = _error(text)
    assert err.file == "t.toml" and err.field == "contributor[2] (b).tolerance"
    assert str(err) == "t.toml: contributor[2] (b).tolerance: must be > 0 (got -0.02)"


def test_field_path_before_the_name_is_known():
    err = _error(MINIMAL.replace('name = "b"', 'name = "9b"'))
    assert err.field == "contributor[2].name"


def test_process_field_path():
    text = MINIMAL.replace(
        'limits = [0.05, 0.2]\ncost = { curve = "reciprocal", b = 0.5 }\n',
        '\n[[contributor.process]]\nname = "milling"\nlimits = [0.05, 0.2]\ncost = { curve = "reciprocal", b = 0.5 }\n'
        '\n[[contributor.process]]\nname = "grinding"\nlimits = [0.01, 0.05]\ncost = { curve = "reciprocal", b = -1 }\n',
    )
    assert str(_error(text)) == (
        "t.toml: contributor[1] (a).process[2] (grinding).cost.b: must be > 0 (got -1)"
    )


def test_unknown_key_did_you_mean():
    err = _error(MINIMAL.replace("nominal = 10", "nominl = 10"))
    assert err.field == "contributor[1] (a)"
    assert err.problem == "unknown key 'nominl' (did you mean 'nominal'?)"


def test_not_toml_names_the_line():
    line = MINIMAL.splitlines().index("upper = 3.0") + 1
    err = _error(MINIMAL.replace("upper = 3.0", "upper = = 3.0"))
    assert "not valid TOML" in err.problem and f"line {line}," in err.problem


def test_missing_file_and_folder(tmp_path):
    with pytest.raises(CaseError, match="file not found"):
        load_case(tmp_path / "nope.toml")
    with pytest.raises(CaseError, match="is a folder"):
        load_case(tmp_path)


def test_cost_curve_check_is_consulted(monkeypatch):
    """costs.check_curve's one-line problem becomes a CaseError on the cost field."""
    seen = []

    def fake_check(curve, limits):
        seen.append((curve.curve, limits))
        return "cost must fall as the tolerance grows" if curve.curve == "reciprocal" else None

    monkeypatch.setattr(case_module, "_curve_checker", lambda: fake_check)
    err = _error(MINIMAL)
    assert str(err) == "t.toml: contributor[1] (a).cost: cost must fall as the tolerance grows"
    assert seen == [("reciprocal", (0.05, 0.2))]


# --------------------------------------------------------------------------- units labels


def test_units_per_contributor_and_requirement_default_to_the_case():
    text = MINIMAL.replace('name = "a"\n', 'name = "a"\nunits = "N/mm"\n').replace(
        'name = "gap"\n', 'name = "gap"\nunits = " N "\n'
    )
    case = loads_case(text)
    assert case.contributor("a").units == "N/mm" and case.contributor("b").units is None
    assert case.contributor_units("a") == "N/mm" and case.contributor_units("b") == "mm"
    assert case.requirement("gap").units == "N"  # a label, spaces around it dropped
    assert case.requirement_units("gap") == "N"
    assert case.sensitivity_units("gap", "b") == "N/mm"
    assert case.sensitivity_units("gap", "a") == "mm"  # N per (N/mm)
    assert case.unit_labels == ("mm", "N/mm", "N")
    plain = loads_case(MINIMAL)
    assert plain.contributor_units("a") == plain.requirement_units("gap") == "mm"
    # a label only: the numbers the case holds are the same
    assert linearise(case, case.requirement("gap")).nominal == linearise(plain, plain.requirement("gap")).nominal


@pytest.mark.parametrize(
    "where, value, problem",
    [
        ("a", '""', "contributor[1] (a).units: must not be empty"),
        ("a", "5", "contributor[1] (a).units: must be a text label such as \"mm\" (got 5)"),
        ("gap", '"N\\nm"', "requirement[1] (gap).units: must be one line of printable text"),
        ("gap", '"' + "x" * 25 + '"', "requirement[1] (gap).units: must be a short label such as \"mm\" (at most 24"),
    ],
)
def test_bad_units_label_is_one_line_naming_the_field(where, value, problem):
    text = MINIMAL.replace(f'name = "{where}"\n', f'name = "{where}"\nunits = {value}\n')
    assert problem in str(_error(text))


def test_misspelt_units_key_gets_a_hint():
    err = _error(MINIMAL.replace('name = "gap"\n', 'name = "gap"\nunit = "N"\n'))
    assert err.field == "requirement[1] (gap)"
    assert err.problem == "unknown key 'unit' (did you mean 'units'?)"


def test_ratio_labels():
    from allocator.model import per_unit

    assert per_unit("EUR", "N") == "EUR/N"
    assert per_unit("mm", "mm") == "-"
    assert per_unit("EUR", "N/mm") == "EUR/(N/mm)"
    assert per_unit("N", "N/mm") == "mm"
    assert per_unit("EUR", "") == "EUR" and per_unit("", "mm") == "1/mm"


# --------------------------------------------------------------------------- CSV tables


def _csv_case(folder: Path, file_value: str) -> Path:
    text = MINIMAL.replace(
        'limits = [0.05, 0.2]\ncost = { curve = "reciprocal", b = 0.5 }',
        f'cost = {{ curve = "table", file = "{file_value}" }}',
    )
    path = folder / "case.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_csv_in_subfolder_with_bom_and_blank_lines(tmp_path):
    (tmp_path / "data").mkdir()
    (tmp_path / "data" / "t.csv").write_text(
        "\ufefftolerance, cost\n0.05,2.0\n\n0.1,1.0\n0.2,0.5\n", encoding="utf-8"
    )
    case = load_case(_csv_case(tmp_path, "data/t.csv"))
    a = case.contributor("a")
    assert a.cost.points_tolerance == (0.05, 0.1, 0.2) and a.cost.points_cost == (2.0, 1.0, 0.5)
    assert a.limits == (0.05, 0.2)


def test_csv_bad_row_reports_row_number(tmp_path):
    (tmp_path / "t.csv").write_text("tolerance,cost\n0.05,2.0\n0.1,1.0\n0.1,0.5\n", encoding="utf-8")
    with pytest.raises(CaseError) as info:
        load_case(_csv_case(tmp_path, "t.csv"))
    assert info.value.field == "contributor[1] (a).cost.file"
    assert info.value.problem.startswith("t.csv row 4: tolerance must be greater than")


def test_csv_symlink_leaving_the_folder_is_refused(tmp_path):
    outside = tmp_path / "outside.csv"
    outside.write_text("tolerance,cost\n0.05,2.0\n0.2,0.5\n", encoding="utf-8")
    folder = tmp_path / "case"
    folder.mkdir()
    os.symlink(outside, folder / "link.csv")
    with pytest.raises(CaseError, match="leads outside the case's folder"):
        load_case(_csv_case(folder, "link.csv"))
    # a link that stays inside the folder is fine
    (folder / "real.csv").write_text(outside.read_text(), encoding="utf-8")
    os.symlink(folder / "real.csv", folder / "inside.csv")
    assert load_case(_csv_case(folder, "inside.csv")).contributor("a").limits == (0.05, 0.2)


def test_csv_needs_a_folder_when_loading_from_text(tmp_path):
    (tmp_path / "t.csv").write_text("tolerance,cost\n0.05,2.0\n0.2,0.5\n", encoding="utf-8")
    text = _csv_case(tmp_path, "t.csv").read_text(encoding="utf-8")
    with pytest.raises(CaseError, match="needs a case read from disk"):
        loads_case(text)
    assert loads_case(text, base_dir=tmp_path).contributor("a").limits == (0.05, 0.2)


# --------------------------------------------------------------------------- init


def test_init_writes_a_starter_that_loads(tmp_path):
    from allocator.cli.main import cli

    target = tmp_path / "new.toml"
    result = CliRunner().invoke(cli, ["init", str(target)])
    assert result.exit_code == 0, result.output
    text = target.read_text(encoding="utf-8")
    assert "Invented example" in text
    case = load_case(target)
    assert linearise_all(case)


def test_init_refuses_to_overwrite_without_force(tmp_path):
    from allocator.cli.main import cli

    target = tmp_path / "mine.toml"
    target.write_text("precious", encoding="utf-8")
    result = CliRunner().invoke(cli, ["init", str(target)])
    assert result.exit_code == 2
    assert len(result.output.strip().splitlines()) == 1 and "--force" in result.output
    assert target.read_text(encoding="utf-8") == "precious"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["mine.toml"]  # no stray temp file
    result = CliRunner().invoke(cli, ["init", str(target), "--force"])
    assert result.exit_code == 0
    load_case(target)


# --------------------------------------------------------------------------- units label


@pytest.mark.parametrize("label", ["inch", "in", "µm", "N·m", "arc minutes", "x" * 24])
def test_units_is_a_label_kept_as_written_and_never_a_scale(label):
    from allocator.analysis import analyze

    case = loads_case(MINIMAL.replace('title = "minimal"', f'title = "minimal"\nunits = "{label}"'))
    assert case.units == label
    # a label changes no number: the same analysis as the default "mm"
    def numbers(analysis):
        """The analysis without its units labels."""
        d = analysis.requirements[0].to_dict()
        d["contributors"] = [{k: v for k, v in c.items() if "units" not in k} for c in d["contributors"]]
        return {k: v for k, v in d.items() if "units" not in k}

    assert analyze(case).requirements[0].units == label
    assert numbers(analyze(case)) == numbers(analyze(loads_case(MINIMAL)))


@pytest.mark.parametrize(
    "value, fragment",
    [
        ('""', "units: must not be empty"),
        ('"   "', "units: must not be empty"),
        ('"""mm\ninch"""', "units: must be one line of printable text such as \"mm\" (got the character '\\n')"),
        ('"mm\t"', "units: must be one line of printable text"),
        ('"' + "x" * 25 + '"', "units: must be a short label such as \"mm\" (at most 24 characters, got 25)"),
        ("25.4", "units: must be a text label such as \"mm\" (got 25.4)"),
    ],
    ids=["empty", "blank", "two-lines", "tab", "too-long", "number"],
)
def test_units_that_cannot_be_shown_as_a_label_are_refused(value, fragment):
    err = _error(MINIMAL.replace('title = "minimal"', f'title = "minimal"\nunits = {value}'))
    assert fragment in str(err) and str(err).startswith("t.toml: units: ")


def test_iso286_rounding_refuses_units_it_cannot_convert_to_millimetres():
    text = MINIMAL + '\n[allocation]\nrounding = "iso286"\n'
    err = _error(text.replace('title = "minimal"', 'title = "minimal"\nunits = "inch"'))
    assert "units: 'inch' cannot be converted to millimetres for rounding = \"iso286\"" in str(err)
    assert loads_case(text.replace('title = "minimal"', 'title = "minimal"\nunits = "in"')).units == "in"
    # with a numeric step the label is only a label
    step = MINIMAL.replace('title = "minimal"', 'title = "minimal"\nunits = "inch"') + "\n[allocation]\nrounding = 0.001\n"
    assert loads_case(step).units == "inch"


def test_starter_template_says_units_is_a_label():
    from allocator.cli.init import starter_text

    line = next(l for l in starter_text().splitlines() if l.startswith("units"))
    assert "a label, not a scale" in line and "nothing is converted" in starter_text()


# --------------------------------------------------------------------------- rising cost tables


def test_interpolated_cost_table_that_rises_is_refused_naming_the_points():
    table = 'cost = { curve = "table", tolerance = [0.05, 0.1, 0.2], cost = [3.0, 1.0, 1.5] }'
    text = MINIMAL.replace('cost = { curve = "reciprocal", b = 0.5 }', table)
    err = _error(text)
    assert str(err).startswith("t.toml: contributor[1] (a).cost: cost rises between tolerance 0.1 and 0.2 (from 1 to 1.5)")
    assert 'between = "choose"' in str(err)


def test_interpolated_csv_cost_table_that_rises_is_refused(tmp_path):
    (tmp_path / "rising.csv").write_text("tolerance,cost\n0.05,3.0\n0.1,1.0\n0.2,1.2\n", encoding="utf-8")
    path = _csv_case(tmp_path, "rising.csv")
    with pytest.raises(CaseError) as info:
        load_case(path)
    assert str(info.value).startswith(f"{path}: contributor[1] (a).cost: cost rises between tolerance 0.1 and 0.2")


def test_choose_cost_table_may_list_a_dominated_entry():
    # a looser class that costs more is never worth choosing, but it is not an error
    table = 'cost = { curve = "table", between = "choose", tolerance = [0.05, 0.1, 0.2], cost = [3.0, 1.0, 1.5] }'
    case = loads_case(MINIMAL.replace('cost = { curve = "reciprocal", b = 0.5 }', table))
    assert case.contributor("a").cost.points_cost == (3.0, 1.0, 1.5)
    # flat stretches and round-off are no rise either
    flat = 'cost = { curve = "table", tolerance = [0.05, 0.1, 0.2], cost = [3.0, 1.0, 1.0000000000000002] }'
    assert loads_case(MINIMAL.replace('cost = { curve = "reciprocal", b = 0.5 }', flat))


def test_iso286_rounding_checks_each_rounded_contributors_own_units():
    text = MINIMAL + '\n[allocation]\nrounding = "iso286"\n'
    # a rounded contributor labelled in a unit that is not a length: refused on its own field
    err = _error(text.replace('name = "a"\n', 'name = "a"\nunits = "N"\n'))
    assert str(err).startswith("t.toml: contributor[1] (a).units: 'N' cannot be converted to millimetres")
    # a fixed contributor is not rounded, and a length label of its own is honoured
    assert loads_case(text.replace('name = "b"\n', 'name = "b"\nunits = "N"\n')).contributor_units("b") == "N"
    case = loads_case(text.replace('title = "minimal"', 'title = "minimal"\nunits = "N"')
                      .replace('name = "a"\n', 'name = "a"\nunits = "mm"\n'))
    assert case.units == "N" and case.contributor_units("a") == "mm"
