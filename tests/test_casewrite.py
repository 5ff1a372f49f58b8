"""Writing a case back to TOML (allocator/casewrite.py).

The reference is the case loader itself together with tomllib (standard library): what is
written must read back as an equal case, for every demo case and for text that needs
escaping.
"""

from __future__ import annotations

import tomllib
from dataclasses import replace
from pathlib import Path

import pytest

from allocator.case import load_case, loads_case
from allocator.casewrite import case_to_toml, dumps_toml, write_case
from allocator.errors import UsageError

ROOT = Path(__file__).resolve().parents[1]
DEMOS = sorted((ROOT / "cases").glob("*.toml"))


def _bare(case):
    return replace(case, path=None, sha256=None)


@pytest.mark.parametrize("path", DEMOS, ids=lambda p: p.name)
def test_every_demo_case_reads_back_equal(path):
    case = load_case(path)
    assert _bare(loads_case(case_to_toml(case))) == _bare(case)


def test_text_that_needs_escaping_survives():
    data = {"title": 'quote " back\\slash\ttab\nnew line \x01', "t": [1e-05, 2.5e20, -0.0],
            "list": [{"name": "a b", "inline": {"odd key": True, "x": 3}}]}
    assert tomllib.loads(dumps_toml(data)) == data


def test_a_table_cost_read_from_a_csv_file_is_written_inline(tmp_path):
    case = load_case(ROOT / "cases" / "pump_shim.toml")  # the shim's cost is a CSV table
    out = write_case(case, tmp_path / "copy.toml")  # another folder: the CSV is not there
    assert "file =" not in out.read_text()
    assert _bare(load_case(out)) == _bare(case)


def test_write_case_never_overwrites_a_protected_input(tmp_path):
    source = tmp_path / "case.toml"
    source.write_bytes((ROOT / "cases" / "gearbox_end_play.toml").read_bytes())
    before = source.read_bytes()
    with pytest.raises(UsageError, match="refusing to overwrite"):
        write_case(load_case(source), source, protect=[source])
    assert source.read_bytes() == before
