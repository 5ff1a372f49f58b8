"""TOML out (allocator.tomlout) and a case written back (allocator.caseout).

The reference is the standard library's TOML reader: whatever ``dumps`` writes,
``tomllib.loads`` must read back as the same data; and a case written by ``dumps_case``
or ``write_case`` must load (through the one case loader) to a case equal to the one
written, for every demo case, invented random cases and cases with every optional section.
"""

from __future__ import annotations

import datetime as dt
import math
import tomllib
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from allocator import caseout
from allocator.case import case_from_dict, load_case, loads_case
from allocator.caseout import case_to_dict, dumps_case, write_case
from allocator.errors import CaseError, InternalError, UsageError
from allocator.model import Offer
from allocator.tomlout import dumps
from helpers import build_case, with_offers

ROOT = Path(__file__).resolve().parents[1]
GEARBOX = ROOT / "cases" / "gearbox_end_play.toml"

# --------------------------------------------------------------------------- dumps

KEYS = st.text(min_size=0, max_size=8)
SCALARS = (
    st.booleans()
    | st.integers(min_value=-(2**63), max_value=2**63 - 1)
    | st.floats(allow_nan=False)
    | st.text(max_size=20)
    | st.dates()
    | st.datetimes()
    | st.times()
)
VALUES = st.recursive(
    SCALARS,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(KEYS, inner, max_size=4),
    max_leaves=20,
)


@settings(max_examples=200, deadline=None, derandomize=True, database=None)
@given(st.dictionaries(KEYS, VALUES, max_size=6))
def test_tomllib_reads_back_what_dumps_writes(data):
    assert tomllib.loads(dumps(data)) == data


def test_nan_infinities_and_awkward_text_read_back():
    data = {
        "quote \" and \\ and 'x'": "line\nbreak\ttab \x00 nul \x1f \x7f del é ✓",
        "": [float("inf"), float("-inf"), -0.0, 5e-324, 1e300, 0.1 + 0.2],
        "a.b": {"c d": [{"x": 1}, {"y": [1, "two", 3.0]}]},
        "t": [1e-05, 2.5e20, 1e16, 123456789.0],
        "list": [{"name": "a b", "inline": {"odd key": True, "x": 3}}],
    }
    text = dumps({**data, "nan": float("nan")})
    back = tomllib.loads(text)
    assert math.isnan(back.pop("nan"))
    assert back == data
    assert math.copysign(1.0, back[""][2]) == -1.0


def test_arrays_of_tables_are_headers_and_small_tables_are_inline():
    text = dumps({"title": "t", "contributor": [{"name": "a", "cost": {"curve": "reciprocal", "b": 0.5},
                                                  "process": [{"name": "p"}]}], "allocation": {"models": ["rss"]}})
    assert text.splitlines() == [
        'title = "t"', "", "[[contributor]]", 'name = "a"', 'cost = { curve = "reciprocal", b = 0.5 }',
        "", "[[contributor.process]]", 'name = "p"', "", "[allocation]", 'models = ["rss"]',
    ]


@pytest.mark.parametrize("bad, where", [
    ({"a": None}, "a"),
    ({"t": {"u": [1, None]}}, "t.u.2"),
    ({"s": {1, 2}}, "s"),
    ({"d": {1: "x"}}, "d"),
])
def test_what_toml_cannot_hold_is_a_type_error_naming_the_key(bad, where):
    with pytest.raises(TypeError, match=rf"^{where}: "):
        dumps(bad)


def test_numpy_numbers_are_written_as_the_plain_numbers_they_hold():
    """numpy's repr of a float64 is ``np.float64(0.1)`` (numpy 2), which is not TOML."""
    data = {"x": np.float64(0.1), "n": np.int64(-3), "v": [np.float64(1 / 3), np.int32(7)],
            "t": {"b": np.float64(2.5e-7)}}
    assert tomllib.loads(dumps(data)) == {"x": 0.1, "n": -3, "v": [1 / 3, 7], "t": {"b": 2.5e-7}}


def test_a_timezone_aware_datetime_keeps_its_offset():
    stamp = dt.datetime(2026, 12, 2, 16, 0, tzinfo=dt.timezone(dt.timedelta(hours=1)))
    assert tomllib.loads(dumps({"at": stamp})) == {"at": stamp}


# --------------------------------------------------------------------------- cases


def bare(case):
    return replace(case, path=None, sha256=None)


@pytest.mark.parametrize("path", sorted((ROOT / "cases").glob("*.toml")), ids=lambda p: p.stem)
def test_every_demo_case_written_back_loads_to_the_same_case(path):
    case = load_case(path)
    assert bare(loads_case(dumps_case(case))) == bare(case)


def test_random_invented_cases_written_back_load_to_the_same_case():
    rng = np.random.default_rng(7)
    for i in range(40):
        case = build_case(rng, ("worst-case", "rss", "mean-shift")[i % 3], size=6, count=2, broken=None).case
        case = with_offers(rng, case)
        assert bare(loads_case(dumps_case(case))) == bare(case)


OFFERS = (Offer("spacer", 0.03, 0.6, 'invented supplier "B", quote 7'), Offer("spacer", 0.05, 0.45),
          Offer("gasket", 0.04, 0.0, "free sample\nsecond line"))


def test_offers_are_written_as_offer_tables_and_read_back():
    case = replace(load_case(GEARBOX), offers=OFFERS)
    text = dumps_case(case)
    raw = tomllib.loads(text)
    assert [(o["contributor"], o["tolerance"], o["price"], o.get("note", "")) for o in raw["offer"]] == \
        [(o.contributor, o.tolerance, o.price, o.note) for o in OFFERS]
    assert "note" not in raw["offer"][1]  # the default is left out
    assert loads_case(text).offers == OFFERS
    assert "offer" not in case_to_dict(load_case(GEARBOX))  # no offers: no tables


def test_every_field_of_the_case_model_is_written():
    """A field added to the case format must be added to caseout (and the workbook) too."""
    from dataclasses import fields

    from allocator import model
    from allocator.caseout import WRITTEN_FIELDS

    for name, written in WRITTEN_FIELDS.items():
        assert {f.name for f in fields(getattr(model, name))} == set(written), name
    assert set(WRITTEN_FIELDS) >= {"Case", "Contributor", "Process", "Requirement", "CostCurve"}


def test_case_from_dict_gives_the_loaders_errors():
    data = case_to_dict(load_case(ROOT / "cases" / "gearbox_end_play.toml"))
    data["contributor"][4]["cost"]["k"] = -2.0
    text = dumps(data)
    with pytest.raises(CaseError) as from_text:
        loads_case(text, source="x.toml")
    with pytest.raises(CaseError) as from_dict:
        case_from_dict(data, source="x.toml")
    assert str(from_dict.value) == str(from_text.value)
    assert from_dict.value.field == "contributor[5] (spacer).cost.k"


# --------------------------------------------------------------------------- write_case


def test_write_case_puts_the_comment_first_and_the_file_reads_back(tmp_path):
    case = load_case(GEARBOX)
    out = write_case(case, tmp_path / "copy.toml", comment="Written by a test.\nSecond line.")
    text = out.read_text(encoding="utf-8")
    assert text.startswith("# Written by a test.\n# Second line.\n\n")
    assert bare(load_case(out)) == bare(case)
    assert not list(tmp_path.glob(".copy.toml.*"))  # no temporary left behind


def test_a_table_cost_read_from_a_csv_file_is_written_inline(tmp_path):
    case = load_case(ROOT / "cases" / "pump_shim.toml")  # the shim's cost is a CSV table
    out = write_case(case, tmp_path / "copy.toml")  # another folder: the CSV is not there
    assert "file =" not in out.read_text()
    assert bare(load_case(out)) == bare(case)


def test_write_case_never_overwrites_a_protected_input(tmp_path):
    source = tmp_path / "case.toml"
    source.write_bytes(GEARBOX.read_bytes())
    before = source.read_bytes()
    with pytest.raises(UsageError, match="refusing to overwrite"):
        write_case(load_case(source), source, protect=[source])
    assert source.read_bytes() == before


@pytest.mark.parametrize("damage", ["drop the last offer", "invalid text"])
def test_write_case_reads_the_text_back_and_writes_nothing_when_it_differs(damage, tmp_path, monkeypatch):
    """The safety check before the atomic write: a writer that loses or breaks something is caught."""
    real = caseout.case_to_dict

    def lossy(case):
        data = real(case)
        if damage == "drop the last offer":
            data["offer"] = data["offer"][:-1]
        else:
            data["contributor"][0]["tolerance"] = -1.0
        return data

    monkeypatch.setattr(caseout, "case_to_dict", lossy)
    out = tmp_path / "out.toml"
    with pytest.raises(InternalError, match="writing the case"):
        write_case(replace(load_case(GEARBOX), offers=OFFERS), out)
    assert not out.exists() and not list(tmp_path.iterdir())


# --------------------------------------------------------------------------- closure equations

CLUTCH = ROOT / "cases" / "roller_clutch.toml"


def test_unknowns_and_closures_are_written_as_the_file_has_them_before_the_requirements():
    """Compared with tomllib's reading of the hand-written demo file."""
    case = load_case(CLUTCH)
    text = dumps_case(case)
    raw, again = tomllib.loads(CLUTCH.read_text(encoding="utf-8")), tomllib.loads(text)
    assert again["unknown"] == raw["unknown"] and again["closure"] == raw["closure"]
    assert list(again).index("closure") < list(again).index("requirement")  # phi is named after it is declared
    assert text.index("[[closure]]") < text.index("[[requirement]]")
    assert "unknown" not in case_to_dict(load_case(GEARBOX)) and "closure" not in case_to_dict(load_case(GEARBOX))


def test_a_closure_without_a_name_and_an_unknown_without_a_description_leave_them_out():
    case = load_case(CLUTCH)
    plain = replace(case, unknowns=tuple(replace(u, description="") for u in case.unknowns),
                    closures=tuple(replace(c, name="") for c in case.closures))
    raw = tomllib.loads(dumps_case(plain))
    assert [set(u) for u in raw["unknown"]] == [{"name", "guess"}] * 2
    assert [set(c) for c in raw["closure"]] == [{"equation"}] * 2
    assert bare(loads_case(dumps_case(plain))) == bare(plain)
