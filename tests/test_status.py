"""One status vocabulary (allocator/status.py, documented in docs/results.md).

Each result type may use only the words documented for it; the documentation names every
word the code can produce. The numbers themselves are tested in the modules of each result.
"""

from __future__ import annotations

from pathlib import Path

import pytest

import allocator
from allocator import status

ROOT = Path(__file__).resolve().parents[1]
CASE = ROOT / "cases" / "gearbox_end_play.toml"


def test_every_status_word_is_documented():
    text = (ROOT / "docs/results.md").read_text(encoding="utf-8")
    for word in status.ALL:
        assert f"`{word}`" in text or f" {word}," in text or f" {word} " in text, word


def test_the_groups_use_only_known_words_and_solve_outcomes_come_first():
    for group in (status.SOLVE, status.SWEEP, status.FALLOUT_OPTIMUM, status.VERDICT,
                  status.LOOSENING, status.REPORT):
        assert set(group) <= set(status.ALL)
    assert status.SOLVE == ("optimal", "infeasible", "failed")
    assert not set(status.SOLVE) & set(status.VERDICT)


@pytest.fixture(scope="module")
def case():
    return allocator.load_case(CASE)


def test_results_of_a_demo_case_speak_the_documented_words(case):
    alloc = allocator.allocate(case, model="rss")
    assert alloc.status in status.SOLVE and alloc.success == (alloc.status == status.OPTIMAL)

    front = allocator.frontier(case, models=["rss"], points=3)
    assert front.status in status.SWEEP
    assert {s for row in front.statuses.values() for s in row} <= set(status.SOLVE)

    sheet = allocator.supplier_sheet(case, "rss", allocation=alloc)
    assert sheet.status == status.OPTIMAL and sheet.success
    assert {r.status for r in sheet.rows} <= set(status.LOOSENING)

    econ = allocator.fallout_economics(case, models=["rss"])
    assert econ.status in status.SOLVE
    assert {r.status for r in econ.results} <= set(status.FALLOUT_OPTIMUM)

    check = allocator.verify(case, alloc.tolerances, samples=2000, seed=1)
    assert check.status in status.VERDICT
    assert {c.status for c in check.requirements} <= set(status.VERDICT)


def test_an_allocation_refuses_an_undocumented_word():
    from allocator.solve.result import Allocation

    with pytest.raises(ValueError, match="unknown status 'solved'"):
        Allocation(model="rss", status="solved", message="", names=(), current=(), counts=(),
                   tightest=(), loosest=(), unit_cost_current=(), current_cost=0.0,
                   processes={}, solver="", iterations=0, gap=None, units="", currency="",
                   title="", held={}, requirements=())
