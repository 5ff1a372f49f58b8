"""Spreadsheets in and out: `allocator convert` (case TOML <-> .xlsx), the workbook's errors
at sheet, row and column, `--xlsx` on allocate / frontier / verify, and openpyxl missing.

The references are outside the code under test: the case read from the TOML file by the
case loader (a converted case must equal it), ``tomllib`` for the raw values of the case
files, openpyxl and pandas (their public API only) for what the workbooks really hold,
and the error the loader gives for the same mistake made in TOML text.

Precision: a workbook number carries 16 significant digits (docs/spreadsheets.md). A
decimal typed with at most 15 significant digits comes back exactly (DBL_DIG = 15, C
standard, ISO/IEC 9899 5.2.4.2.2: such a decimal survives the round trip through a
double, and the nearest 16-digit decimal to that double is no farther from it than the
typed one); a double that needs 17 digits comes back within one unit in its 16th
significant digit (half a unit from rounding to 16 digits, at most half a unit more from
reading that decimal back as the nearest double).
"""

from __future__ import annotations

import math
import re
import sys
import tomllib
from dataclasses import fields, is_dataclass, replace
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

openpyxl = pytest.importorskip("openpyxl", reason='workbooks need the extra: pip install "allocator[sheets]"')
pd = pytest.importorskip("pandas")

from allocator.analysis import analyze  # noqa: E402
from allocator.case import load_case, loads_case  # noqa: E402
from allocator.caseout import dumps_case  # noqa: E402
from allocator.cli.main import cli  # noqa: E402
from allocator.errors import CaseError, UsageError  # noqa: E402
from allocator.model import Case, Offer  # noqa: E402
from allocator.sheets import write_workbook  # noqa: E402
from allocator.workbook import SHEETS, case_sheets, load_workbook_case, write_case_workbook  # noqa: E402
from helpers import build_case, with_offers  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
DEMOS = sorted((ROOT / "cases").glob("*.toml"))
GEARBOX = ROOT / "cases" / "gearbox_end_play.toml"
GEAR_HUB = ROOT / "cases" / "gear_hub_end_play.toml"
CLUTCH = ROOT / "cases" / "roller_clutch.toml"  # unknowns and closure equations
CELL = re.compile(r"sheet (\w+), row (\d+)(?:, column (\S+))?")
# invented offers for the gearbox demo (a supplier's tolerance and price per part)
OFFERS = (Offer("spacer", 0.03, 0.6, "invented supplier A"), Offer("gasket", 0.04, 0.35),
          Offer("spacer", 0.05, 0.42, "invented supplier B, 2 weeks"))
GEARBOX_OFFERS = replace(load_case(GEARBOX), offers=OFFERS)


def run(*args):
    return CliRunner().invoke(cli, [str(a) for a in args])


def bare(case):
    """The case without where it came from (path and hash differ by design)."""
    return replace(case, path=None, sha256=None)


def one_unit_in_16th_digit(x: float) -> float:
    """The workbook's documented precision at ``x``: 10**(e - 15) for |x| in [10**e, 10**(e+1))."""
    return 0.0 if x == 0 else 10.0 ** (math.floor(math.log10(abs(x))) - 15)


def assert_same_to_16_digits(back, original, where="case"):
    """Equal, but floats only within one unit in their 16th significant digit (recursively)."""
    if isinstance(original, float) and isinstance(back, float):
        assert abs(back - original) <= one_unit_in_16th_digit(original), (where, back, original)
    elif is_dataclass(original):
        assert type(back) is type(original), where
        for f in fields(original):
            assert_same_to_16_digits(getattr(back, f.name), getattr(original, f.name), f"{where}.{f.name}")
    elif isinstance(original, (tuple, list)):
        assert type(back) is type(original) and len(back) == len(original), (where, back, original)
        for i, (b, o) in enumerate(zip(back, original)):
            assert_same_to_16_digits(b, o, f"{where}[{i}]")
    elif isinstance(original, dict):
        assert list(back) == list(original), (where, back, original)
        for k in original:
            assert_same_to_16_digits(back[k], original[k], f"{where}.{k}")
    else:
        assert back == original, (where, back, original)


def one_line_error(result) -> str:
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("error: "), lines[0]
    assert "Traceback" not in result.output
    return lines[0]


# --------------------------------------------------------------------------- round trip


@pytest.mark.parametrize("path", DEMOS, ids=lambda p: p.stem)
def test_every_demo_case_survives_toml_to_workbook_to_toml(path, tmp_path):
    book, back = tmp_path / "case.xlsx", tmp_path / "back.toml"
    first = run("convert", path, book)
    assert first.exit_code == 0, first.output
    second = run("convert", book, back)
    assert second.exit_code == 0, second.output

    original = load_case(path)
    assert bare(load_workbook_case(book)) == bare(original)
    assert bare(load_case(back)) == bare(original)
    # the same analysis, number for number
    pd.testing.assert_frame_equal(analyze(load_case(back)).to_frame(), analyze(original).to_frame(), rtol=0, atol=0)


@pytest.mark.parametrize("path", DEMOS, ids=lambda p: p.stem)
def test_the_workbook_holds_the_numbers_of_the_case_file(path, tmp_path):
    """Read the written cells with pandas and compare them with tomllib's reading of the file."""
    book = tmp_path / "case.xlsx"
    write_case_workbook(load_case(path), book)
    raw = tomllib.loads(path.read_text(encoding="utf-8"))
    sheets = pd.read_excel(book, sheet_name=None)
    assert list(sheets) == list(SHEETS)
    people = sheets["contributors"].set_index("name")
    for c in raw["contributor"]:
        row = people.loc[c["name"]]
        assert row["nominal"] == c["nominal"] and row["tolerance"] == c["tolerance"]
        if "limits" in c:
            assert [row["tightest"], row["loosest"]] == c["limits"]
        if "cost" in c and c["cost"]["curve"] != "table":
            assert row["curve"] == c["cost"]["curve"]
            for key in ("a", "b", "c", "k"):
                if key in c["cost"]:
                    assert row[key] == c["cost"][key]
        processes = sheets["processes"][sheets["processes"]["contributor"] == c["name"]]
        assert list(processes["process"]) == [p["name"] for p in c.get("process", [])]
    needs = sheets["requirements"].set_index("name")
    for r in raw["requirement"]:
        for name, coeff in r.get("chain", {}).items():
            assert needs.loc[r["name"], f"chain.{name}"] == coeff
        for key in ("lower", "upper", "fallout_ppm"):
            if key in r:
                assert needs.loc[r["name"], key] == r[key]
    for key, sheet in (("unknown", "unknowns"), ("closure", "closures")):  # one row per table, in order
        rows = [{k: v for k, v in row.items() if not pd.isna(v)} for row in sheets[sheet].to_dict("records")]
        assert rows == raw.get(key, [])


def test_a_csv_cost_table_goes_into_the_tables_sheet(tmp_path):
    book = tmp_path / "pump.xlsx"
    write_case_workbook(load_case(ROOT / "cases" / "pump_shim.toml"), book)
    points = pd.read_excel(book, sheet_name="tables")
    csv = pd.read_csv(ROOT / "cases" / "shim_costs.csv")
    shim = points[points["contributor"] == "shim"]
    assert list(shim["tolerance"]) == list(csv["tolerance"]) and list(shim["cost"]) == list(csv["cost"])


def test_random_invented_cases_survive_the_workbook(tmp_path):
    """Many-digit floats, every curve family, fixed parts without cost, counts, cp, offers;
    17-digit doubles come back to the workbook's 16 digits (see the module docstring)."""
    rng = np.random.default_rng(20261202)
    for i in range(6):
        case = build_case(rng, "mean-shift" if i % 2 else "rss", size=7, count=2, broken=None).case
        case = with_offers(rng, case)
        book = tmp_path / f"random{i}.xlsx"
        write_case_workbook(case, book)
        assert_same_to_16_digits(bare(load_workbook_case(book)), bare(case))


def test_a_case_with_offers_survives_toml_to_workbook_to_toml(tmp_path):
    source, book, back = tmp_path / "offers.toml", tmp_path / "offers.xlsx", tmp_path / "back.toml"
    source.write_text(dumps_case(GEARBOX_OFFERS), encoding="utf-8")
    assert run("convert", source, book).exit_code == 0
    assert run("convert", book, back).exit_code == 0
    assert load_workbook_case(book).offers == OFFERS
    assert bare(load_case(back)) == bare(load_case(source)) == bare(GEARBOX_OFFERS)
    sheet = pd.read_excel(book, sheet_name="offers")  # one row per offer, in order
    assert list(sheet.columns) == ["contributor", "tolerance", "price", "note"]
    assert list(sheet["contributor"]) == [o.contributor for o in OFFERS]
    assert list(sheet["price"]) == [o.price for o in OFFERS]


def test_the_offers_sheet_is_optional(tmp_path):
    book = tmp_path / "no_offers.xlsx"
    write_case_workbook(GEARBOX_OFFERS, book)
    wb = openpyxl.load_workbook(book)
    wb.remove(wb["offers"])
    wb.save(book)
    assert bare(load_workbook_case(book)) == bare(load_case(GEARBOX))


def test_a_number_typed_as_an_offers_note_is_read_as_text(tmp_path):
    book = _bad_workbook(tmp_path, _set("offers", 3, "note", 42), GEARBOX_OFFERS)
    assert load_workbook_case(book).offers[1] == replace(OFFERS[1], note="42")


def test_a_workbook_is_accepted_wherever_a_case_file_is(tmp_path):
    book = tmp_path / "gearbox.xlsx"
    write_case_workbook(load_case(GEARBOX), book)
    from_book = run("allocate", book, "--model", "rss", "--json")
    from_toml = run("allocate", GEARBOX, "--model", "rss", "--json")
    assert from_book.exit_code == from_toml.exit_code == 0
    import json

    assert json.loads(from_book.stdout)["results"] == json.loads(from_toml.stdout)["results"]


def test_the_clutch_from_its_workbook_analyses_and_allocates_as_from_its_case_file(tmp_path):
    """Unknowns and closure equations in sheets: the loop solved the same, number for number."""
    book = tmp_path / "clutch.xlsx"
    assert run("convert", CLUTCH, book).exit_code == 0
    import json

    for command in (("analyze", "--json"), ("allocate", "--model", "rss", "--json")):
        from_book, from_toml = run(command[0], book, *command[1:]), run(command[0], CLUTCH, *command[1:])
        assert from_book.exit_code == from_toml.exit_code == 0, from_book.output
        doc_book, doc_toml = json.loads(from_book.stdout), json.loads(from_toml.stdout)
        doc_book.pop("case", None), doc_toml.pop("case", None)  # where it came from differs
        assert doc_book == doc_toml


def test_the_unknowns_and_closures_sheets_are_optional_and_their_defaults_stay_out(tmp_path):
    book = tmp_path / "gearbox.xlsx"
    write_case_workbook(load_case(GEARBOX), book)
    wb = openpyxl.load_workbook(book)
    wb.remove(wb["unknowns"])
    wb.remove(wb["closures"])
    wb.save(book)
    assert bare(load_workbook_case(book)) == bare(load_case(GEARBOX))
    # a closure without a name, an unknown without a description: empty cells, read back as such
    clutch = load_case(CLUTCH)
    plain = replace(clutch, unknowns=tuple(replace(u, description="") for u in clutch.unknowns),
                    closures=tuple(replace(c, name="") for c in clutch.closures))
    write_case_workbook(plain, book)
    sheets = pd.read_excel(book, sheet_name=["unknowns", "closures"])
    assert sheets["unknowns"]["description"].isna().all() and sheets["closures"]["name"].isna().all()
    assert bare(load_workbook_case(book)) == bare(plain)


# --------------------------------------------------------------------------- bad workbooks


def _bad_workbook(tmp_path, edit, source=GEARBOX):
    book = tmp_path / "bad.xlsx"
    write_case_workbook(source if isinstance(source, Case) else load_case(source), book)
    wb = openpyxl.load_workbook(book)
    edit(wb)
    wb.save(book)
    return book


def _column(sheet, header):
    return [c.value for c in sheet[1]].index(header) + 1


def _set(sheet_name, row, header, value):
    def edit(wb):
        sheet = wb[sheet_name]
        sheet.cell(row, _column(sheet, header)).value = value
    return edit


def _rename(sheet_name, header, new):
    def edit(wb):
        sheet = wb[sheet_name]
        sheet.cell(1, _column(sheet, header)).value = new
    return edit


def _drop_column(sheet_name, header):
    def edit(wb):
        sheet = wb[sheet_name]
        sheet.delete_cols(_column(sheet, header))
    return edit


BAD = {
    # name: (edit, source, sheet, row, column or None, fragment of the problem)
    "missing sheet": (lambda wb: wb.remove(wb["requirements"]), GEARBOX, None, None, None,
                      "missing sheet 'requirements'"),
    "missing column": (_drop_column("contributors", "nominal"), GEARBOX, "contributors", "1", None,
                       "missing column 'nominal'"),
    "unknown column": (_rename("contributors", "mean_shift", "meanshift"), GEARBOX, "contributors", "1",
                       "meanshift", "did you mean 'mean_shift'?"),
    "text in a number cell": (_set("contributors", 3, "nominal", "0.5 mm"), GEARBOX, "contributors", "3",
                              "nominal", "must be a number (got text '0.5 mm')"),
    "text in a cost parameter of a process": (_set("processes", 4, "b", "cheap"), GEAR_HUB, "processes", "4",
                                              "b", "must be a number"),
    "unknown contributor in a chain": (_rename("requirements", "chain.spacer", "chain.spacr"), GEARBOX,
                                       "requirements", "2", "chain.spacr",
                                       "unknown contributor 'spacr' (did you mean 'spacer'?)"),
    "unknown contributor of a process": (_set("processes", 3, "contributor", "grove_position"), GEAR_HUB,
                                         "processes", "3", "contributor", "unknown contributor 'grove_position'"),
    "unknown contributor of a table point": (_set("tables", 2, "contributor", "circlipp"), GEAR_HUB, "tables",
                                             "2", "contributor", "unknown contributor 'circlipp'"),
    "negative table point": (_set("tables", 3, "tolerance", -0.03), GEAR_HUB, "tables", "3", "tolerance",
                             "must be > 0"),
    "unknown model in settings": (_set("settings", 5, "value", "worst-case, rss, wc"), GEARBOX, "settings", "5",
                                  "value", "must be one of worst-case, rss, mean-shift, convolution (got 'wc')"),
    "a name twice": (_set("contributors", 4, "name", "gasket"), GEARBOX, "contributors", "4", "name",
                     "'gasket' is already used by row 3"),
    "a process twice": (_set("processes", 3, "process", "turning"), GEAR_HUB, "processes", "3", "process",
                        "'turning' of 'groove_position' is already used by row 2"),
    "limits as one column": (_rename("contributors", "tightest", "limits"), GEARBOX, "contributors", "1", "limits",
                             "limits are the two columns tightest and loosest"),
    "no title row": (lambda wb: wb["settings"].delete_rows(2), GEARBOX, None, None, None,
                     "sheet settings, setting title: missing (a title for the case)"),
    "one limit only": (_set("contributors", 2, "loosest", None), GEARBOX, "contributors", "2", "loosest",
                       "give both tightest and loosest"),
    "unknown contributor of an offer": (_set("offers", 3, "contributor", "gaskett"), GEARBOX_OFFERS, "offers", "3",
                                        "contributor", "unknown contributor 'gaskett' (did you mean 'gasket'?)"),
    "an offer outside the limits": (_set("offers", 4, "tolerance", 0.3), GEARBOX_OFFERS, "offers", "4",
                                    "tolerance", "tolerance 0.3 is outside its limits [0.003, 0.08]"),
    "an offer without a price": (_set("offers", 2, "price", None), GEARBOX_OFFERS, "offers", "2", "price",
                                 "missing"),
    "text in an offer's price": (_set("offers", 2, "price", "0.6 EUR"), GEARBOX_OFFERS, "offers", "2", "price",
                                 "must be a number (got text '0.6 EUR')"),
    "an offers sheet without prices": (_drop_column("offers", "price"), GEARBOX_OFFERS, "offers", "1", None,
                                       "missing column 'price' (the offered price per part)"),
    "unknown column in offers": (_rename("offers", "note", "notes"), GEARBOX_OFFERS, "offers", "1", "notes",
                                 "did you mean 'note'?"),
    "a number as an equation": (_set("closures", 2, "equation", 3.5), CLUTCH, "closures", "2", "equation",
                                "must be text (got 3.5)"),
    "an unknown without a name": (_set("unknowns", 3, "name", None), CLUTCH, "unknowns", "3", "name",
                                  "missing (a name for the unknown)"),
    "an unknown without a guess": (_set("unknowns", 2, "guess", None), CLUTCH, "unknowns", "2", "guess",
                                   "missing (a start value for the nominal solve)"),
    "a closure without an equation": (_set("closures", 3, "equation", None), CLUTCH, "closures", "3", "equation",
                                      "missing (the equation"),
    "text in a guess": (_set("unknowns", 2, "guess", "0.1 rad"), CLUTCH, "unknowns", "2", "guess",
                        "must be a number (got text '0.1 rad')"),
    "unknown column in unknowns": (_rename("unknowns", "guess", "gues"), CLUTCH, "unknowns", "1", "gues",
                                   "did you mean 'guess'?"),
    "an equation in a column expression": (_rename("closures", "equation", "expression"), CLUTCH, "closures", "1",
                                           "expression", "a closure's equation goes in the column equation"),
    "a closures sheet without equations": (_drop_column("closures", "equation"), CLUTCH, "closures", "1", None,
                                           "missing column 'equation'"),
    "a misspelt unknown in an equation": (_set("closures", 2, "equation", "offset + roller_radius * sin(ph)"),
                                          CLUTCH, "closures", "2", "equation",
                                          "unknown name 'ph' (not a contributor or unknown) (did you mean 'phi'?)"),
    "an unknown named as a contributor": (_set("unknowns", 2, "name", "hub_flat"), CLUTCH, "unknowns", "2", "name",
                                          "'hub_flat' is already a contributor"),
    "an unknown twice": (_set("unknowns", 3, "name", "phi"), CLUTCH, "unknowns", "3", "name",
                         "'phi' is already used by row 2"),
    "a closure name twice": (_set("closures", 3, "name", "loop_x"), CLUTCH, "closures", "3", "name",
                             "'loop_x' is already used by row 2"),
    "one equation too many": (lambda wb: wb["closures"].append(["loop_z", "phi - 0.1"]), CLUTCH, "closures", None,
                              None, "3 closure equations for 2 unknowns"),
    "no closures sheet": (lambda wb: wb.remove(wb["closures"]), CLUTCH, "unknowns", None, None,
                          "0 closure equations for 2 unknowns"),
    "an equation taken for a formula": (_set("closures", 2, "equation", "#NAME?"), CLUTCH, "closures", "2",
                                        "equation", "holds the spreadsheet error #NAME? (the program took the "
                                        "equation for a formula"),
    "unknown sheet": (lambda wb: wb.create_sheet("closure"), CLUTCH, "closure", None, None,
                      "unknown sheet 'closure' (did you mean 'closures'?)"),
}


@pytest.mark.parametrize("name", list(BAD))
def test_a_bad_workbook_is_one_line_naming_sheet_row_and_column_and_nothing_is_written(name, tmp_path):
    edit, source, sheet, row, column, fragment = BAD[name]
    book = _bad_workbook(tmp_path, edit, source)
    out = tmp_path / "out.toml"
    result = run("convert", book, out)
    assert result.exit_code == 2
    line = one_line_error(result)
    assert line.startswith(f"error: {book}: ")
    assert fragment in line
    if sheet is not None and row is None:  # a problem of the whole sheet
        assert f"{book}: sheet {sheet}: " in line
    elif sheet is not None:
        found = CELL.search(line)
        assert found, line
        assert found.group(1) == sheet and found.group(2) == row and found.group(3) == column
    assert not out.exists()
    assert not list(tmp_path.glob(".out.toml.*"))  # no temporary left behind


SAME_MISTAKE = [
    # (TOML text replaced, by, sheet edit, place in the workbook)
    ("b = 0.002 }", "b = -0.002 }", _set("contributors", 7, "b", -0.002), ("contributors", "7", "b")),
    ("mean_shift = 0.2", 'mean_shift = "0.2"', _set("contributors", 2, "mean_shift", "0.2"),
     ("contributors", "2", "mean_shift")),
    ("count = 2", "count = 2.5", _set("contributors", 4, "count", 2.5), ("contributors", "4", "count")),
    ("upper = 0.35", "upper = 0.01", _set("requirements", 2, "upper", 0.01), ("requirements", "2", "upper")),
    ('distribution = "uniform"', 'distribution = "uniformm"', _set("contributors", 3, "distribution", "uniformm"),
     ("contributors", "3", "distribution")),
    ("spacer = -1", "spacer = 0", _set("requirements", 2, "chain.spacer", 0), ("requirements", "2", "chain.spacer")),
]


@pytest.mark.parametrize("old, new, edit, place", SAME_MISTAKE, ids=[m[1] for m in SAME_MISTAKE])
def test_the_workbook_gets_the_problem_text_the_case_file_gets(old, new, edit, place, tmp_path):
    field = _same_problem_in_both(GEARBOX, old, new, edit, tmp_path)
    assert CELL.search(field).groups() == place


def _same_problem_in_both(source, old, new, edit, tmp_path) -> str:
    """The same mistake made in ``source`` as TOML text and in its workbook by ``edit``: both
    are refused with the same problem text; the field (a workbook place) the book names."""
    text = source.read_text(encoding="utf-8")
    assert old in text
    with pytest.raises(CaseError) as in_toml:
        loads_case(text.replace(old, new, 1))
    book = _bad_workbook(tmp_path, edit, source)
    with pytest.raises(CaseError) as in_book:
        load_workbook_case(book)
    assert in_book.value.problem == in_toml.value.problem
    return in_book.value.field


CLUTCH_MISTAKES = [
    # (TOML text replaced, by, sheet edit, place in the workbook)
    ('equation = "offset + roller_radius * sin(phi) - ring_radius * sin(phi)"', "equation = 3.5",
     _set("closures", 2, "equation", 3.5), ("closures", "2", "equation")),
    ("guess = 5.0", 'guess = "5.0"', _set("unknowns", 3, "guess", "5.0"), ("unknowns", "3", "guess")),
    ('name = "offset"', 'name = "sin"', _set("unknowns", 3, "name", "sin"), ("unknowns", "3", "name")),
    ('- ring_radius * cos(phi)"', '- ring_radius * cos(phi) + 100"', _set(  # cos(phi) > 1: no closed position
        "closures", 3, "equation", "hub_flat + roller_radius + roller_radius * cos(phi) - ring_radius * cos(phi) "
        "+ 100"), ("closures", None, None)),
    ('expression = "phi * 180 / pi"', 'expression = "ph * 180 / pi"', _set("requirements", 2, "expression",
                                                                         "ph * 180 / pi"),
     ("requirements", "2", "expression")),
]


@pytest.mark.parametrize("old, new, edit, place", CLUTCH_MISTAKES, ids=[m[1] for m in CLUTCH_MISTAKES])
def test_a_closure_mistake_gets_the_problem_text_the_case_file_gets(old, new, edit, place, tmp_path):
    field = _same_problem_in_both(CLUTCH, old, new, edit, tmp_path)
    found = CELL.search(field)
    assert (found.groups() if found else (field.removeprefix("sheet "), None, None)) == place


def test_a_bad_case_file_writes_no_workbook(tmp_path):
    case = tmp_path / "bad.toml"
    case.write_text(GEARBOX.read_text(encoding="utf-8").replace("nominal = 61.20", "nominal = 'x'"), encoding="utf-8")
    out = tmp_path / "out.xlsx"
    result = run("convert", case, out)
    assert result.exit_code == 2 and "contributor[1] (housing_depth).nominal" in one_line_error(result)
    assert not out.exists()


def test_convert_never_overwrites_its_input(tmp_path):
    book = tmp_path / "case.xlsx"
    write_case_workbook(load_case(GEARBOX), book)
    before = book.read_bytes()
    result = run("convert", book, book)
    assert result.exit_code == 2 and "refusing to overwrite" in one_line_error(result)
    assert book.read_bytes() == before


@pytest.mark.parametrize("target", ["out.csv", "out"])
def test_convert_names_the_kinds_it_knows(target, tmp_path):
    result = run("convert", GEARBOX, tmp_path / target)
    assert result.exit_code == 2 and ".toml case file or an .xlsx workbook" in one_line_error(result)


def test_a_file_that_is_not_a_workbook_is_one_line(tmp_path):
    fake = tmp_path / "fake.xlsx"
    fake.write_text("title = 'not a workbook'\n", encoding="utf-8")
    result = run("convert", fake, tmp_path / "out.toml")
    assert result.exit_code == 2 and "not an .xlsx workbook" in one_line_error(result)


# --------------------------------------------------------------------------- --xlsx outputs


def _numeric(frame, column):
    return pd.api.types.is_numeric_dtype(frame[column])


def test_allocate_xlsx_holds_numbers_with_units_in_the_headers(tmp_path):
    book = tmp_path / "allocation.xlsx"
    result = run("allocate", GEARBOX, "--model", "worst-case", "--model", "rss", "--xlsx", book)
    assert result.exit_code == 0, result.output
    sheets = pd.read_excel(book, sheet_name=None)
    assert list(sheets) == ["summary", "tolerances", "requirements"]
    tolerances = sheets["tolerances"]
    for column in ("current [mm]", "allocated [mm]", "tightest [mm]", "loosest [mm]",
                   "unit_cost_current [EUR]", "unit_cost_allocated [EUR]", "count"):
        assert _numeric(tolerances, column), column
    assert len(tolerances) == 2 * len(load_case(GEARBOX).contributors)
    requirements = sheets["requirements"]
    for column in ("sigma [mm]", "fallout_ppm [ppm]", "shadow_upper [EUR/mm]"):
        assert _numeric(requirements, column), column
    summary = sheets["summary"].set_index("model")
    assert _numeric(sheets["summary"], "total_cost [EUR]")
    # the sheet agrees with the JSON of the same command
    import json

    doc = json.loads(run("allocate", GEARBOX, "--model", "rss", "--json").stdout)["results"][0]
    assert_same_to_16_digits(float(summary.loc["rss", "total_cost [EUR]"]), doc["total_cost"])
    rss = tolerances[tolerances["model"] == "rss"].set_index("contributor")["allocated [mm]"]
    assert_same_to_16_digits(rss.to_dict(), doc["tolerances"])


def test_frontier_xlsx_has_the_swept_value_in_its_units(tmp_path):
    book = tmp_path / "frontier.xlsx"
    result = run("frontier", GEARBOX, "--model", "worst-case", "--points", "3", "--xlsx", book, "--json")
    assert result.exit_code == 0, result.output
    frame = pd.read_excel(book, sheet_name="frontier")
    assert list(frame.columns[:3]) == ["upper [mm]", "model", "total_cost [EUR]"]
    assert _numeric(frame, "upper [mm]") and _numeric(frame, "total_cost [EUR]")
    import json

    points = json.loads(result.stdout)["points"]
    assert_same_to_16_digits([float(v) for v in frame["upper [mm]"]], [p["value"] for p in points])


def test_verify_xlsx_keeps_counts_whole_and_the_seed_exact(tmp_path):
    book = tmp_path / "verify.xlsx"
    result = run("verify", GEARBOX, "--samples", "20000", "--seed", "7", "--xlsx", book, "--json")
    assert result.exit_code == 0, result.output
    import json

    doc = json.loads(result.stdout)
    sheets = pd.read_excel(book, sheet_name=None)
    assert list(sheets) == ["verification", "tolerances", "run"]
    check = sheets["verification"].iloc[0]
    assert pd.api.types.is_integer_dtype(sheets["verification"]["samples"])
    assert check["samples"] == doc["requirements"][0]["samples"] == 20000
    assert_same_to_16_digits(float(check["fallout_ppm [ppm]"]), doc["requirements"][0]["fallout_ppm"])
    assert "lower [mm]" in sheets["verification"].columns
    assert sheets["run"].iloc[0]["seed"] == 7
    assert list(sheets["tolerances"].columns) == ["contributor", "tolerance [mm]"]


def test_a_seed_beyond_double_precision_is_written_as_exact_text(tmp_path):
    seed = 2**63 - 25
    write_workbook(tmp_path / "big.xlsx", {"run": pd.DataFrame({"seed": [seed], "x": [0.1]})})
    back = openpyxl.load_workbook(tmp_path / "big.xlsx")["run"]
    assert back["A2"].value == str(seed) and back["B2"].value == 0.1


def test_xlsx_problems_are_found_before_any_work(tmp_path):
    result = run("allocate", GEARBOX, "--xlsx", tmp_path / "no" / "such" / "a.xlsx")
    assert result.exit_code == 2 and "does not exist" in one_line_error(result)
    result = run("verify", GEARBOX, "--xlsx", tmp_path / "a.csv")
    assert result.exit_code == 2 and "writes an .xlsx workbook" in one_line_error(result)
    assert result.stdout == ""


def test_write_workbook_refuses_bad_sheet_names_and_inputs(tmp_path):
    frame = pd.DataFrame({"x": [1.0]})
    with pytest.raises(UsageError, match="must not contain"):
        write_workbook(tmp_path / "a.xlsx", {"a/b": frame})
    with pytest.raises(UsageError, match="1 to 31 characters"):
        write_workbook(tmp_path / "a.xlsx", {"x" * 32: frame})
    keep = tmp_path / "keep.xlsx"
    keep.write_bytes(b"input")
    with pytest.raises(UsageError, match="refusing to overwrite"):
        write_workbook(keep, {"s": frame}, protect=[keep])
    assert keep.read_bytes() == b"input"


# --------------------------------------------------------------------------- without openpyxl


@pytest.fixture
def no_openpyxl(monkeypatch):
    """As if the extra were not installed: ``import openpyxl`` raises ImportError."""
    monkeypatch.setitem(sys.modules, "openpyxl", None)


HINT = 'pip install "allocator[sheets]"'


def test_without_openpyxl_convert_says_what_to_install_and_writes_nothing(no_openpyxl, tmp_path):
    out = tmp_path / "case.xlsx"
    result = run("convert", GEARBOX, out)
    assert result.exit_code == 2 and HINT in one_line_error(result)
    assert not out.exists()


def test_without_openpyxl_reading_a_workbook_says_what_to_install(no_openpyxl, tmp_path):
    result = run("analyze", tmp_path / "case.xlsx")
    assert result.exit_code == 2 and HINT in one_line_error(result)


@pytest.mark.parametrize("command", ["allocate", "frontier", "verify"])
def test_without_openpyxl_xlsx_fails_before_the_work(no_openpyxl, command, tmp_path):
    out = tmp_path / "out.xlsx"
    result = run(command, GEARBOX, "--xlsx", out)
    assert result.exit_code == 2 and HINT in one_line_error(result)
    assert result.stdout == "" and not out.exists()


def test_without_openpyxl_the_case_file_commands_still_work(no_openpyxl):
    result = run("analyze", GEARBOX, "--json")
    assert result.exit_code == 0, result.output


def test_case_sheets_needs_no_openpyxl(no_openpyxl):
    sheets = case_sheets(load_case(GEARBOX))
    assert list(sheets) == list(SHEETS)


def _written_and_read(tmp_path, values):
    """``values`` through write_workbook and back, as numpy float64 and as Python float cells."""
    write_workbook(tmp_path / "x.xlsx", {"numpy": pd.DataFrame({"x": values}),
                                         "python": pd.DataFrame({"x": [float(v) for v in values]}, dtype=object)})
    book = openpyxl.load_workbook(tmp_path / "x.xlsx")
    return {sheet: [row[0] for row in book[sheet].iter_rows(min_row=2, values_only=True)]
            for sheet in ("numpy", "python")}


def test_numbers_typed_with_up_to_15_digits_come_back_exactly(tmp_path):
    rng = np.random.default_rng(5)
    digits = rng.integers(1, 16, 400)
    typed = [float(f"{int(rng.integers(10 ** (d - 1), 10 ** d))}e{int(rng.integers(-12, 12))}") for d in digits]
    values = np.array(typed + [0.1, 0.015, 61.2, 1e-3, 2.5e20, 5e-324, 1.0, 0.0, -0.035])
    for back in _written_and_read(tmp_path, values).values():
        assert back == [float(v) for v in values]


def test_a_double_needing_17_digits_comes_back_within_one_unit_in_the_16th(tmp_path):
    rng = np.random.default_rng(5)
    values = np.concatenate([rng.uniform(0, 1, 300), rng.lognormal(0, 20, 300), [1 / 3, 0.1 + 0.2]])
    for back in _written_and_read(tmp_path, values).values():
        for b, v in zip(back, values.tolist()):
            assert abs(b - v) <= one_unit_in_16th_digit(v), (b, v)


def test_a_workbook_that_unpacks_too_large_is_refused_before_it_is_parsed(tmp_path, monkeypatch):
    from allocator import sheets

    book = tmp_path / "case.xlsx"
    write_case_workbook(load_case(GEARBOX), book)
    monkeypatch.setattr(sheets, "MAX_UNPACKED_BYTES", 1000)
    parsed = []
    monkeypatch.setattr(openpyxl, "load_workbook", lambda *a, **k: parsed.append(a))
    result = run("convert", book, tmp_path / "out.toml")
    assert result.exit_code == 2 and "refusing to read it" in one_line_error(result)
    assert parsed == [] and not (tmp_path / "out.toml").exists()
