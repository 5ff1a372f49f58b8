"""The supplier sheet: cost of loosening one contributor, checked against closed forms.

Reference: the Lagrange-multiplier optimum for reciprocal costs ``c_i = a_i + b_i / t_i``
(Chase, K. W., Greenwood, W. H., Loosli, B. G. and Hauglund, L. F. (1990). Least cost
tolerance allocation for mechanical assemblies with automated process selection.
Manufacturing Review 3(1), 49-59):

- worst case ``Σ t_i ≤ T``: ``t_i = T √b_i / Σ √b_j`` and least cost ``Σ a + (Σ √b)² / T``;
- rss with normal contributors at cp = 1 (σ_i = t_i / 3), ``Σ t_i² ≤ R²``:
  ``t_i = R b_i^{1/3} / √(Σ b_j^{2/3})`` and least cost ``Σ a + (Σ b^{2/3})^{3/2} / R``.

Holding contributor ``k`` at ``t_k`` leaves the others the same problem with the budget
``T − t_k`` (worst case) or ``√(R² − t_k²)`` (rss), which gives the re-solve's cost in
closed form.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from allocator.case import load_case
from allocator.model import Contributor, CostCurve
from allocator.solve import allocate
from allocator.supplier import looser_tolerance, supplier_sheet
from helpers import chain_requirement, contributor, make_case, reciprocal

CASES = Path(__file__).resolve().parent.parent / "cases"
B = np.array([0.001, 0.004, 0.009])
A = np.array([0.5, 0.2, 0.1])
UPPER = 0.5  # nominal response 0.2, so the worst-case budget is T = 0.3
FALLOUT_PPM = 1000.0  # one-sided: sigma_max = (U - nominal) / z(1 - p)


def _case(models=("worst-case", "rss")):
    parts = [
        contributor(f"p{i}", nominal=n, tolerance=0.05, limits=(0.001, 1.0), cost=reciprocal(a=a, b=b))
        for i, (n, a, b) in enumerate(zip((10.0, 10.0, 19.8), A, B), start=1)
    ]
    req = chain_requirement("gap", {"p1": 1, "p2": 1, "p3": -1}, upper=UPPER, fallout_ppm=FALLOUT_PPM)
    return make_case(parts, [req], models=models)


def _worst_case_cost(t_held: float | None, k: int, budget: float) -> float:
    others = np.delete(np.sqrt(B), k)
    if t_held is None:
        return A.sum() + np.sqrt(B).sum() ** 2 / budget
    return A.sum() + B[k] / t_held + others.sum() ** 2 / (budget - t_held)


def _rss_cost(t_held: float | None, k: int, radius: float) -> float:
    if t_held is None:
        return A.sum() + (B ** (2 / 3)).sum() ** 1.5 / radius
    others = np.delete(B ** (2 / 3), k)
    return A.sum() + B[k] / t_held + others.sum() ** 1.5 / math.sqrt(radius**2 - t_held**2)


@pytest.mark.parametrize("k", [0, 1, 2])
def test_worst_case_loosening_matches_lagrange_closed_form(k):
    case = _case()
    sheet = supplier_sheet(case, "worst-case")
    assert sheet.success
    budget = UPPER - 0.2
    t_opt = budget * np.sqrt(B) / np.sqrt(B).sum()
    row = sheet[f"p{k + 1}"]
    assert row.tolerance == pytest.approx(t_opt[k], rel=1e-6)
    assert row.looser == pytest.approx(t_opt[k] * 1.1, rel=1e-9)
    expected = _worst_case_cost(row.looser, k, budget) - _worst_case_cost(None, k, budget)
    assert row.total_cost_change == pytest.approx(expected, rel=1e-5, abs=1e-9)
    own = B[k] / row.looser - B[k] / t_opt[k]
    assert row.own_change == pytest.approx(own, rel=1e-6)
    assert row.elsewhere_change == pytest.approx(expected - own, rel=1e-5)
    # every other contributor shares the smaller budget, so all of them tighten
    assert {name for name, _, _ in row.tightened} == {f"p{i + 1}" for i in range(3) if i != k}
    for name, before, after in row.tightened:
        i = int(name[1:]) - 1
        assert after == pytest.approx((budget - row.looser) * np.sqrt(B[i]) / np.delete(np.sqrt(B), k).sum(), rel=1e-6)
        assert before == pytest.approx(t_opt[i], rel=1e-6)


@pytest.mark.parametrize("k", [0, 2])
def test_rss_loosening_matches_lagrange_closed_form(k):
    case = _case()
    sheet = supplier_sheet(case, "rss")
    # sigma_max from scipy.stats (independent of the library's own root finding)
    radius = 3.0 * (UPPER - 0.2) / stats.norm.isf(FALLOUT_PPM * 1e-6)
    row = sheet[f"p{k + 1}"]
    t_opt = radius * B ** (1 / 3) / math.sqrt((B ** (2 / 3)).sum())
    assert row.tolerance == pytest.approx(t_opt[k], rel=1e-5)
    expected = _rss_cost(row.looser, k, radius) - _rss_cost(None, k, radius)
    assert row.total_cost_change == pytest.approx(expected, rel=1e-4, abs=1e-9)
    assert row.total_cost_change > 0


def test_changes_are_never_negative_on_a_demo_case():
    # the base is the least cost, so holding anything elsewhere cannot be cheaper
    case = load_case(CASES / "gearbox_end_play.toml")
    sheet = supplier_sheet(case, "rss")
    solved = [r for r in sheet.rows if r.status == "optimal"]
    assert solved
    for r in solved:
        assert r.total_cost_change >= -1e-7 * sheet.base.total_cost
        assert r.own_change < 0  # a looser tolerance is cheaper on a decreasing cost curve
        assert r.total_cost_change == pytest.approx(
            allocate(case, "rss", fix={r.contributor: r.looser}).total_cost - sheet.base.total_cost, abs=1e-12
        )
    assert sheet["bearing_width"].status == "fixed"
    frame = sheet.to_frame()
    assert list(frame.index) == list(case.names) and frame.index.name == "contributor"
    assert "<table" in sheet._repr_html_()


def test_looser_tolerance_steps_rounding_and_lists():
    part = contributor("p", limits=(0.005, 0.05))
    assert looser_tolerance(part, 0.02) == pytest.approx(0.022)
    assert looser_tolerance(part, 0.0201, rounding=0.001) == pytest.approx(0.023)  # 0.02211 -> up
    assert looser_tolerance(part, 0.048) == pytest.approx(0.05)  # clipped at the loosest
    assert looser_tolerance(part, 0.05) is None
    table = CostCurve(curve="table", between="choose", points_tolerance=(10.0, 50.0, 100.0), points_cost=(3.0, 2.0, 1.0))
    resistor = Contributor(name="r", nominal=1e4, tolerance=50.0, limits=(10.0, 100.0), cost=table)
    assert looser_tolerance(resistor, 50.0) == 100.0
    assert looser_tolerance(resistor, 100.0) is None


def test_at_loosest_and_infeasible_base():
    parts = [
        contributor("p1", limits=(0.001, 0.01), cost=reciprocal(b=0.001)),
        contributor("p2", limits=(0.001, 1.0), cost=reciprocal(b=0.004)),
    ]
    case = make_case(parts, [chain_requirement("gap", {"p1": 1, "p2": 1}, upper=20.3)])
    sheet = supplier_sheet(case, "worst-case")
    assert sheet["p1"].status == "at loosest"
    impossible = make_case(parts, [chain_requirement("gap", {"p1": 1, "p2": 1}, upper=20.0005)])
    sheet = supplier_sheet(impossible, "worst-case")
    assert sheet.status == "infeasible" and not sheet.success
    assert sheet.rows == []


def test_unknown_model_is_a_usage_error_even_with_an_allocation_given():
    from allocator.errors import UsageError

    case = _case()
    base = allocate(case, "rss")
    for given in (None, base):
        with pytest.raises(UsageError, match="unknown model 'rs' \\(did you mean 'rss'\\?\\)"):
            supplier_sheet(case, "rs", allocation=given)
    with pytest.raises(UsageError, match="step must be > 0"):
        supplier_sheet(case, "rss", allocation=base, step=0.0)


def test_an_error_in_a_re_solve_is_raised_not_written_into_a_row(monkeypatch):
    # a row once held the exception's text as its message (status 'error')
    import allocator.solve

    case = load_case(CASES / "gearbox_end_play.toml")
    base = allocate(case, "rss")

    def spoiled(*args, **kwargs):
        raise ValueError("zero-size array to reduction operation maximum which has no identity")

    monkeypatch.setattr(allocator.solve, "allocate", spoiled)
    with pytest.raises(ValueError, match="zero-size array"):
        supplier_sheet(case, "rss", allocation=base)


def _two_process_case():
    """Invented: p1, p2 as above plus p3 made by a fine process (listed first, [0.01, 0.06])
    or a coarse one ([0.05, 0.2]); worst case ``t1 + t2 + t3 ≤ 0.3``."""
    from allocator.model import Process

    parts = [contributor(f"p{i}", nominal=10.0, tolerance=0.05, limits=(0.001, 1.0), cost=reciprocal(a=a, b=b))
             for i, (a, b) in enumerate(zip(A[:2], B[:2]), start=1)]
    parts.append(Contributor(name="p3", nominal=19.8, tolerance=0.05, processes=(
        Process("fine", (0.01, 0.06), reciprocal(a=0.4, b=0.004), cp=2.0),
        Process("coarse", (0.05, 0.2), reciprocal(a=0.1, b=0.009)),
    )))
    req = chain_requirement("gap", {"p1": 1, "p2": 1, "p3": -1}, upper=UPPER, fallout_ppm=FALLOUT_PPM)
    return make_case(parts, [req], models=("worst-case",))


def test_loosening_a_part_with_processes_is_costed_by_the_process_that_makes_it():
    # closed forms of the module docstring (Chase et al. 1990). Coarse: Σ√b over p1, p2,
    # p3 gives t3 = 0.3·√0.009/Σ√b = 0.15, inside [0.05, 0.2], cost Σa + (Σ√b)²/0.3; fine
    # cannot reach its own optimum (0.12 > 0.06) and costs more anyway. Loosened to 0.165
    # only coarse makes p3: the others share 0.3 − 0.165 (regression: p3 was priced by
    # 'fine', the first process listed, which cannot make ±0.165)
    sheet = supplier_sheet(_two_process_case(), "worst-case")
    assert sheet.success
    assert sheet.base.processes["p3"] == "coarse"
    root = np.sqrt([B[0], B[1], 0.009])
    base = A[0] + A[1] + 0.1 + root.sum() ** 2 / 0.3
    assert sheet.base.total_cost == pytest.approx(base, rel=1e-9)
    row = sheet["p3"]
    assert row.tolerance == pytest.approx(0.15, rel=1e-6)
    assert row.looser == pytest.approx(0.165, rel=1e-6)
    held = A[0] + A[1] + 0.1 + 0.009 / row.looser + root[:2].sum() ** 2 / (0.3 - row.looser)
    assert row.status == "optimal"
    assert row.total_cost_change == pytest.approx(held - base, rel=1e-5, abs=1e-9)
    assert row.total_cost_change >= 0


def test_looser_tolerance_skips_the_gap_between_process_ranges():
    from allocator.model import Process

    part = Contributor(name="p", nominal=10.0, tolerance=0.008, processes=(
        Process("grinding", (0.002, 0.01), reciprocal(a=2.0, b=0.001)),
        Process("turning", (0.02, 0.1), reciprocal(a=1.0, b=0.01)),
    ))
    # 0.0095·1.1 = 0.01045 lies between the ranges: the next tolerance a process makes
    assert looser_tolerance(part, 0.0095) == pytest.approx(0.02)
    assert looser_tolerance(part, 0.005) == pytest.approx(0.0055)
    assert looser_tolerance(part, 0.1) is None


def test_sheet_and_rows_are_complete_and_frozen():
    import dataclasses

    sheet = supplier_sheet(_case(), "worst-case")
    # complete when built: one row per contributor, each re-solved and never cheaper than
    # the optimum it loosens (the optimum is the least cost, up to solver accuracy)
    assert sheet.success and [r.contributor for r in sheet.rows] == ["p1", "p2", "p3"]
    for row in sheet.rows:
        assert row.status == "optimal" and row.total_cost_change >= -1e-9 * sheet.base.total_cost
    for obj, name in ((sheet, "status"), (sheet, "rows"), (sheet, "base"),
                      (sheet.rows[0], "status"), (sheet.rows[0], "looser"), (sheet.rows[0], "total_cost_change")):
        with pytest.raises(dataclasses.FrozenInstanceError):
            setattr(obj, name, None)
