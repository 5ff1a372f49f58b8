"""TOML out (allocator.tomlout) and a case written back (allocator.caseout).

The reference is the standard library's TOML reader: whatever ``dumps`` writes,
``tomllib.loads`` must read back as the same data; and a case written by ``dumps_case``
must load (through the one case loader) to a case equal to the one written.
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

from allocator.case import case_from_dict, load_case, loads_case
from allocator.caseout import case_to_dict, dumps_case
from allocator.errors import CaseError
from allocator.tomlout import dumps
from helpers import build_case

ROOT = Path(__file__).resolve().parents[1]

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
        assert bare(loads_case(dumps_case(case))) == bare(case)


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
