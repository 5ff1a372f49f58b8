"""Supplier offers (`allocator offer`, :func:`allocator.evaluate_offers`).

Checked against things outside the offer code:

- the closed-form Lagrange optimum for reciprocal costs ``c_i = a_i + b_i / t_i`` under
  worst case, computed here (Chase, K. W., Greenwood, W. H., Loosli, B. G. and Hauglund,
  L. F. (1990). Least cost tolerance allocation for mechanical assemblies with automated
  process selection. Manufacturing Review 3(1), 49-59): minimising ``Σ n_i b_i / t_i``
  subject to ``Σ n_i |s_i| t_i = W`` gives ``t_i = √(b_i / (λ |s_i|))`` with
  ``√λ = S / W``, ``S = Σ n_i √(b_i |s_i|)``, and the least cost ``Σ n_i a_i + S² / W``.
  Holding part ``k`` at ``T`` leaves the others the same problem with the budget
  ``W − n_k |s_k| T``. Under rss (normal, cp = 1, so σ_i = t_i / 3; one upper limit, so
  σ_max = (U − ȳ) / z(1 − p) with z from scipy.stats.norm) the same conditions give
  ``t_i ∝ (b_i / s_i²)^{1/3}`` and the least cost ``Σ n_i a_i + Q^{3/2} / (3 σ_max)``,
  ``Q = Σ n_i (b_i |s_i|)^{2/3}``; holding ``k`` leaves ``σ'² = σ_max² − n_k (s_k T / 3)²``;
- independent re-solves through the existing hold path (``allocate(case, model,
  fix={name: T})``), with the held part's curve cost taken out and the offered price put
  in by hand;
- enumeration of the processes that can make the offered tolerance;
- the worst-case range at the tightest tolerances, computed here, for the amount an
  infeasible offer misses by.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from allocator import evaluate_offers
from allocator.case import load_case, loads_case
from allocator.cli.main import cli
from allocator.errors import CaseError, UsageError
from allocator.model import Contributor, CostCurve, Offer
from allocator.offers import counter_offer, parse_offer
from allocator.solve import allocate
from helpers import chain_requirement, contributor, make_case

CASES = Path(__file__).resolve().parents[1] / "cases"
GEARBOX = CASES / "gearbox_end_play.toml"
GEAR_HUB = CASES / "gear_hub_end_play.toml"
CONTRACT_KEYS = {"contributor", "tolerance", "price", "model", "status", "total_cost", "baseline_cost", "saving",
                 "break_even_price"}

# an invented worst-case stack with reciprocal costs: y = p0 + p1 - p2 + 2 p3, p1 twice per
# assembly; limits wide enough that the Lagrange optimum is interior
A = np.array([0.4, 0.2, 0.3, 0.1])
B = np.array([0.002, 0.001, 0.004, 0.0015])
S = np.array([1.0, 1.0, -1.0, 2.0])
N = np.array([1, 2, 1, 1])
W = 0.25  # worst-case budget: upper limit minus the nominal response


FALLOUT_PPM = 500.0


def _lagrange_case():
    parts = [
        contributor(f"p{i}", nominal=10.0 + i, tolerance=0.02, limits=(1e-4, 1.0),
                    cost=CostCurve("reciprocal", a=float(A[i]), b=float(B[i])), count=int(N[i]))
        for i in range(4)
    ]
    y0 = sum(S[i] * N[i] * (10.0 + i) for i in range(4))
    req = chain_requirement("gap", {f"p{i}": float(S[i]) for i in range(4)}, upper=y0 + W, fallout_ppm=FALLOUT_PPM)
    return make_case(parts, [req], models=("worst-case",))


def _rss_lagrange_cost(keep, sigma):
    """Σ n a + Q^{3/2} / (3 σ) over the parts in ``keep`` (normal, cp = 1)."""
    q = float(np.sum(N[keep] * (B[keep] * np.abs(S[keep])) ** (2.0 / 3.0)))
    scale = 3.0 * sigma / math.sqrt(q)
    t = scale * (B[keep] / S[keep] ** 2) ** (1.0 / 3.0)
    return float(np.sum(N[keep] * A[keep])) + q**1.5 / (3.0 * sigma), t


def _lagrange_cost(keep, budget):
    """Σ n a + (Σ n √(b |s|))² / budget over the parts in ``keep``, and their tolerances."""
    s_sum = float(np.sum(N[keep] * np.sqrt(B[keep] * np.abs(S[keep]))))
    root_lambda = s_sum / budget
    t = np.sqrt(B[keep] / np.abs(S[keep])) / root_lambda
    return float(np.sum(N[keep] * A[keep])) + s_sum**2 / budget, t


# --------------------------------------------------------------------------- closed form


@pytest.mark.parametrize("k, tolerance, price", [(0, 0.05, 0.3), (1, 0.02, 0.25), (3, 0.01, 0.9)])
def test_worst_case_offer_matches_the_lagrange_closed_form(k, tolerance, price):
    case = _lagrange_case()
    everyone = np.arange(4)
    baseline, t_all = _lagrange_cost(everyone, W)
    assert np.all((t_all > 1e-4) & (t_all < 1.0))  # the closed form holds: no limit active
    others = everyone[everyone != k]
    budget = W - N[k] * abs(S[k]) * tolerance
    rest, t_rest = _lagrange_cost(others, budget)
    assert np.all((t_rest > 1e-4) & (t_rest < 1.0))

    row = evaluate_offers(case, [Offer(f"p{k}", tolerance, price)]).rows[0]
    assert row.status == "optimal"
    assert row.baseline_cost == pytest.approx(baseline, rel=1e-7)
    assert row.total_cost == pytest.approx(rest + N[k] * price, rel=1e-7)
    assert row.saving == pytest.approx(baseline - rest - N[k] * price, abs=1e-7 * baseline)
    assert row.break_even_price == pytest.approx((baseline - rest) / N[k], rel=1e-7)
    for i, t in zip(others, t_rest):
        assert row.tolerances[f"p{i}"] == pytest.approx(t, rel=1e-5)
    # holding restricts the plain problem: the break-even price never exceeds the part's own curve
    assert row.break_even_price <= A[k] + B[k] / tolerance + 1e-12


@pytest.mark.parametrize("k, tolerance, price", [(0, 0.05, 0.3), (1, 0.03, 0.25)])
def test_rss_offer_matches_the_lagrange_closed_form(k, tolerance, price):
    from scipy import stats

    case = _lagrange_case()
    sigma = W / stats.norm.isf(FALLOUT_PPM * 1e-6)
    everyone = np.arange(4)
    baseline, t_all = _rss_lagrange_cost(everyone, sigma)
    others = everyone[everyone != k]
    rest, t_rest = _rss_lagrange_cost(others, math.sqrt(sigma**2 - N[k] * (S[k] * tolerance / 3.0) ** 2))
    assert np.all((t_all > 1e-4) & (t_all < 1.0)) and np.all((t_rest > 1e-4) & (t_rest < 1.0))
    row = evaluate_offers(case, [Offer(f"p{k}", tolerance, price)], models=["rss"]).rows[0]
    assert row.status == "optimal"
    assert row.baseline_cost == pytest.approx(baseline, rel=1e-6)
    assert row.total_cost == pytest.approx(rest + N[k] * price, rel=1e-6)
    assert row.break_even_price == pytest.approx((baseline - rest) / N[k], rel=1e-5)


def test_saving_is_zero_at_the_break_even_price_and_linear_in_the_price():
    case = load_case(GEARBOX)
    first = evaluate_offers(case, ["housing_depth=0.05@5"], models=["worst-case", "rss", "mean-shift"])
    for row in first.rows:
        again = evaluate_offers(case, [Offer("housing_depth", 0.05, row.break_even_price)], models=[row.model])
        assert again.rows[0].saving == pytest.approx(0.0, abs=1e-9 * row.baseline_cost)
        dearer = evaluate_offers(case, [Offer("housing_depth", 0.05, row.break_even_price + 1.0)], models=[row.model])
        assert dearer.rows[0].saving == pytest.approx(-1.0, rel=1e-9)


# --------------------------------------------------------------------------- independent re-solves


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
@pytest.mark.parametrize("name, tolerance, price", [("spacer", 0.03, 0.6), ("gasket", 0.05, 0.1),
                                                    ("cover_spigot", 0.01, 1.2)])
def test_offer_equals_the_held_allocation_priced_by_hand(model, name, tolerance, price):
    case = load_case(GEARBOX)
    held = allocate(case, model, fix={name: tolerance})
    base = allocate(case, model)
    count = case.contributor(name).count
    by_hand = held.total_cost - count * float(held.unit_cost[name]) + count * price
    row = evaluate_offers(case, [Offer(name, tolerance, price)], models=[model]).rows[0]
    assert row.status == "optimal"
    assert row.total_cost == pytest.approx(by_hand, rel=1e-6)
    assert row.baseline_cost == pytest.approx(base.total_cost, rel=1e-9)
    assert row.saving == pytest.approx(base.total_cost - by_hand, abs=1e-6 * base.total_cost)
    assert row.curve_unit_cost == pytest.approx(float(held.unit_cost[name]), rel=1e-12)


def test_two_requirements_against_scipy_minimize():
    # conic path (two requirements): the offered part held, the rest minimised by SLSQP
    from scipy.optimize import minimize

    a, b = np.array([0.3, 0.5, 0.2, 0.4]), np.array([0.002, 0.001, 0.003, 0.0015])
    parts = [contributor(f"q{i}", nominal=10.0, limits=(0.002, 0.3),
                         cost=CostCurve("reciprocal", a=float(a[i]), b=float(b[i]))) for i in range(4)]
    reqs = [chain_requirement("first", {"q0": 1.0, "q1": 1.0, "q2": -1.0}, lower=9.85, upper=10.15),
            chain_requirement("second", {"q1": 1.0, "q2": 1.0, "q3": -1.0}, lower=9.8, upper=10.2)]
    case = make_case(parts, reqs, models=("worst-case",))
    rows = np.array([[1, 1, 1, 0], [0, 1, 1, 1]], dtype=float)
    budget = np.array([0.15, 0.2])

    def least(held):
        free = [i for i in range(4) if i not in held]

        def full(x):
            t = np.zeros(4)
            t[free] = x
            for i, v in held.items():
                t[i] = v
            return t

        cons = {"type": "ineq", "fun": lambda x: budget - rows @ full(x)}
        best = minimize(lambda x: float(np.sum(a[free] + b[free] / x)), np.full(len(free), 0.01),
                        method="SLSQP", bounds=[(0.002, 0.3)] * len(free), constraints=[cons],
                        options={"ftol": 1e-14, "maxiter": 500})
        assert best.success
        return best.fun

    baseline, rest = least({}), least({2: 0.03})
    row = evaluate_offers(case, ["q2=0.03@0.9"]).rows[0]
    assert row.status == "optimal"
    assert row.baseline_cost == pytest.approx(baseline, rel=1e-6)
    assert row.total_cost == pytest.approx(rest + 0.9, rel=1e-6)
    assert row.break_even_price == pytest.approx(baseline - rest, rel=1e-5)


def test_an_offer_for_a_part_the_case_holds_without_cost():
    # bearing_width: fixed at ±0.025, no cost curve, count 2: the rest is the plain optimum,
    # so the offer costs 2 x price and breaks even at 0
    case = load_case(GEARBOX)
    for row in evaluate_offers(case, ["bearing_width=0.025@1.5"]).rows:
        assert row.status == "optimal"
        assert row.saving == pytest.approx(-2 * 1.5, rel=1e-9)
        assert row.break_even_price == pytest.approx(0.0, abs=1e-9)
        assert row.counter_tolerance is None and "no cost curve" in row.counter_note


def test_two_offers_for_one_part_are_compared_not_combined():
    result = evaluate_offers(load_case(GEARBOX), ["spacer=0.03@0.6", "spacer=0.04@0.45"], models=["rss"])
    assert [r.contributor for r in result.rows] == ["spacer", "spacer"]
    assert "same contributor" in result.message
    assert result.rows[1].total_cost < result.rows[0].total_cost  # looser and cheaper: cheaper overall


def test_count_instances_each_pay_the_price():
    parts = [contributor("pin", nominal=5.0, limits=(0.002, 0.2), count=3,
                         cost=CostCurve("reciprocal", a=0.2, b=0.003)),
             contributor("bore", nominal=16.0, limits=(0.002, 0.2), cost=CostCurve("reciprocal", a=0.5, b=0.004))]
    req = chain_requirement("clearance", {"bore": 1.0, "pin": -1.0}, lower=0.2, upper=1.8, fallout_ppm=100.0)
    case = make_case(parts, [req], models=("worst-case", "rss"))
    for model in ("worst-case", "rss"):
        held = allocate(case, model, fix={"pin": 0.05})
        by_hand = held.total_cost - 3 * float(held.unit_cost["pin"]) + 3 * 0.4
        cheap, dear = evaluate_offers(case, ["pin=0.05@0.4", "pin=0.05@0.9"], models=[model]).rows
        assert cheap.total_cost == pytest.approx(by_hand, rel=1e-7)
        assert dear.total_cost - cheap.total_cost == pytest.approx(3 * 0.5, rel=1e-9)
        assert cheap.saving == pytest.approx(3 * (cheap.break_even_price - 0.4), rel=1e-9)


def test_several_processes_the_offer_takes_the_best_one_for_the_rest():
    # groove_position: turning [0.02, 0.15] and grinding [0.004, 0.03] (cp 1.33) both make
    # ±0.02; the offered part costs its price either way, so the least total is the better
    # of the two single-process re-solves (enumeration)
    case = load_case(GEAR_HUB)
    c = case.contributor("groove_position")
    price, t = 2.0, 0.02
    for model in ("worst-case", "rss"):
        totals = []
        for process in c.processes:
            alone = replace(case, contributors=tuple(replace(x, processes=(process,)) if x.name == c.name else x
                                                     for x in case.contributors))
            held = allocate(alone, model, fix={c.name: t})
            totals.append(held.total_cost - float(held.unit_cost[c.name]) + price)
        row = evaluate_offers(case, [Offer(c.name, t, price)], models=[model]).rows[0]
        assert row.status == "optimal"
        assert row.total_cost == pytest.approx(min(totals), rel=1e-6)


def test_offers_together_hold_every_part_at_once():
    case = load_case(GEARBOX)
    result = evaluate_offers(case, ["spacer=0.03@0.6", "housing_depth=0.05@5"], models=["rss"])
    assert [r.contributor for r in result.rows] == ["spacer", "housing_depth", "spacer + housing_depth"]
    held = allocate(case, "rss", fix={"spacer": 0.03, "housing_depth": 0.05})
    by_hand = held.total_cost - float(held.unit_cost["spacer"]) - float(held.unit_cost["housing_depth"]) + 0.6 + 5.0
    together = result.rows[-1]
    assert together.together and together.total_cost == pytest.approx(by_hand, rel=1e-6)
    assert together.break_even_price is None


# --------------------------------------------------------------------------- counter-offer


def test_counter_offer_on_a_reciprocal_curve_is_its_inverse():
    part = Contributor("p", 10.0, 0.02, (0.005, 0.05), CostCurve("reciprocal", a=1.0, b=0.01))
    for price in (1.25, 2.0, 2.9):  # a + b / t = price  ->  t = b / (price - a)
        t, note = counter_offer(part, price)
        assert t == pytest.approx(0.01 / (price - 1.0), rel=1e-10)
    # outside the curve's values over its range (1.2 at the loosest, 3 at the tightest): none, said why
    assert counter_offer(part, 1.1)[0] is None and "loosest" in counter_offer(part, 1.1)[1]
    assert counter_offer(part, 3.5)[0] is None and "tightest" in counter_offer(part, 3.5)[1]


def test_counter_offer_with_processes_is_the_tightest_root_of_any_process():
    case = load_case(GEAR_HUB)
    c = case.contributor("groove_position")  # turning 1.5 + 0.03/t on [0.02, 0.15]; grinding 4 + 0.012/t on [0.004, 0.03]
    t, note = counter_offer(c, 4.6)
    assert t == pytest.approx(0.012 / 0.6, rel=1e-10) and "grinding" in note  # grinding's root (turning's: 0.0107, out of range)
    t, note = counter_offer(c, 2.0)
    assert t == pytest.approx(0.03 / 0.5, rel=1e-10) and "turning" in note


def test_counter_offer_on_an_interpolated_table_is_the_linear_root():
    shim = load_case(CASES / "pump_shim.toml").contributor("shim")  # (0.02, 0.32) to (0.04, 0.20), linear between
    t, _ = counter_offer(shim, 0.30)
    assert t == pytest.approx(0.02 + 0.02 * (0.32 - 0.30) / (0.32 - 0.20), rel=1e-10)


def test_counter_offer_on_a_choose_table_names_the_listed_tolerance_under_the_price():
    case = load_case(GEAR_HUB)
    circlip = case.contributor("circlip")  # listed 0.01 / 0.03 / 0.06 at 0.4 / 0.15 / 0.06
    t, note = counter_offer(circlip, 0.2)
    assert t is None and "0.03" in note
    assert counter_offer(circlip, 0.15)[0] == pytest.approx(0.03)


# --------------------------------------------------------------------------- infeasible offers


def _tight_case():
    parts = [contributor(f"p{i}", nominal=10.0, limits=(0.01, 0.2)) for i in range(3)]
    req = chain_requirement("gap", {"p0": 1.0, "p1": 1.0, "p2": -1.0}, lower=9.8, upper=10.2)
    return make_case(parts, [req], models=("worst-case",))


def test_an_offer_too_loose_for_a_requirement_is_infeasible_with_the_amount_missed():
    case = _tight_case()
    result = evaluate_offers(case, ["p0=0.19@0.01"])
    row = result.rows[0]
    assert result.status == "infeasible" and not result.success
    assert row.status == "infeasible" and row.total_cost is None and row.saving is None
    # worst case at the tightest tolerances: 10 ± (0.19 + 0.01 + 0.01), limits [9.8, 10.2]
    miss = 0.19 + 0.01 + 0.01 - 0.2
    assert "'gap'" in row.message
    amounts = [float(x) for x in re.findall(r"by ([0-9.e-]+)", row.message)]
    assert amounts and all(a == pytest.approx(miss, rel=1e-3) for a in amounts)


def test_cli_exit_1_when_no_offer_is_feasible_and_0_when_one_is(tmp_path):
    path = tmp_path / "tight.toml"
    path.write_text(
        'title = "invented tight stack"\n'
        + "".join(f'[[contributor]]\nname = "p{i}"\nnominal = 10.0\ntolerance = 0.05\nlimits = [0.01, 0.2]\n'
                  'cost = { curve = "reciprocal", a = 0.0, b = 0.01 }\n' for i in range(3))
        + '[[requirement]]\nname = "gap"\nchain = { p0 = 1, p1 = 1, p2 = -1 }\nlower = 9.8\nupper = 10.2\n'
        + '[allocation]\nmodels = ["worst-case"]\n'
    )
    bad = CliRunner().invoke(cli, ["offer", str(path), "--offer", "p0=0.19@0.01"])
    assert bad.exit_code == 1 and "infeasible" in bad.output and "'gap'" in bad.output
    mixed = CliRunner().invoke(cli, ["offer", str(path), "--offer", "p0=0.19@0.01", "--offer", "p1=0.05@0.1"])
    assert mixed.exit_code == 0 and "partial" in mixed.output


# --------------------------------------------------------------------------- bad input


@pytest.mark.parametrize("text, expected", [
    ("spacr=0.03@0.6", "unknown contributor 'spacr' (did you mean 'spacer'?)"),
    ("spacer=0.3@0.6", "outside its limits [0.003, 0.08]"),
    ("spacer0.03@0.6", "expected NAME=T@PRICE"),
    ("spacer=0.03", "expected NAME=T@PRICE"),
    ("spacer=abc@0.6", "tolerance 'abc' is not a number"),
    ("spacer=0.03@-1", "price must be a number >= 0"),
    ("bearing_width=0.03@1", "differs from ±0.025"),
])
def test_bad_offers_exit_2_with_one_line_and_nothing_written(tmp_path, text, expected):
    case = tmp_path / "gearbox.toml"
    case.write_bytes(GEARBOX.read_bytes())
    before = sorted(p.name for p in tmp_path.iterdir())
    result = CliRunner().invoke(cli, ["offer", str(case), "--offer", text, "--json"])
    assert result.exit_code == 2
    assert result.stdout == ""
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: offer ") and expected in lines[0]
    assert "Traceback" not in result.output
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    assert case.read_bytes() == GEARBOX.read_bytes()


def test_library_raises_usage_errors_for_bad_offers():
    case = load_case(GEARBOX)
    with pytest.raises(UsageError, match="unknown contributor"):
        evaluate_offers(case, [Offer("nope", 0.03, 1.0)])
    with pytest.raises(UsageError, match="no offers"):
        evaluate_offers(case)
    with pytest.raises(UsageError, match="unknown model"):
        evaluate_offers(case, ["spacer=0.03@0.6"], models=["worstcase"])
    assert parse_offer(" spacer = 0.03 @ 0.6 ") == Offer("spacer", 0.03, 0.6)


# --------------------------------------------------------------------------- case file


OFFER_TABLE = '\n[[offer]]\ncontributor = "spacer"\ntolerance = 0.03\nprice = 0.6\nnote = "invented supplier"\n'


def test_case_file_offers_are_read_and_evaluated():
    case = loads_case(GEARBOX.read_text() + OFFER_TABLE)
    assert case.offers == (Offer("spacer", 0.03, 0.6, "invented supplier"),)
    from_case = evaluate_offers(case, models=["rss"]).rows[0]
    given = evaluate_offers(load_case(GEARBOX), ["spacer=0.03@0.6"], models=["rss"]).rows[0]
    assert from_case.total_cost == given.total_cost and from_case.note == "invented supplier"


@pytest.mark.parametrize("extra, expected", [
    ('[[offer]]\ncontributor = "spacr"\ntolerance = 0.03\nprice = 0.6\n',
     "offer[1].contributor: unknown contributor 'spacr' (did you mean 'spacer'?)"),
    ('[[offer]]\ncontributor = "spacer"\ntolerance = 0.3\nprice = 0.6\n',
     "offer[1] (spacer).tolerance: tolerance 0.3 is outside its limits [0.003, 0.08]"),
    ('[[offer]]\ncontributor = "spacer"\ntolerance = 0.03\n', "offer[1] (spacer).price: missing"),
    ('[[offer]]\ncontributor = "spacer"\ntolerance = 0.03\nprice = 1\nprise = 2\n',
     "offer[1]: unknown key 'prise' (did you mean 'price'?)"),
])
def test_bad_offer_tables_are_one_line_case_errors(tmp_path, extra, expected):
    path = tmp_path / "offers.toml"
    path.write_text(GEARBOX.read_text() + "\n" + extra)
    with pytest.raises(CaseError) as err:
        load_case(path)
    assert expected in str(err.value) and str(path) in str(err.value) and "\n" not in str(err.value)
    result = CliRunner().invoke(cli, ["offer", str(path)])
    assert result.exit_code == 2 and len(result.stderr.strip().splitlines()) == 1


# --------------------------------------------------------------------------- output


def test_json_has_the_contract_keys_and_the_library_numbers():
    result = CliRunner().invoke(cli, ["offer", str(GEARBOX), "--offer", "spacer=0.03@0.6",
                                      "--offer", "housing_depth=0.05@5", "--model", "rss", "--json"])
    assert result.exit_code == 0
    doc = json.loads(result.stdout)
    assert len(doc["offers"]) == 3
    for entry in doc["offers"]:
        assert CONTRACT_KEYS <= set(entry)
    library = evaluate_offers(load_case(GEARBOX), ["spacer=0.03@0.6", "housing_depth=0.05@5"], models=["rss"])
    for entry, row in zip(doc["offers"], library.rows):
        assert entry["total_cost"] == row.total_cost and entry["saving"] == row.saving
        assert entry["break_even_price"] == row.break_even_price


def test_csv_and_table_output():
    csv_out = CliRunner().invoke(cli, ["offer", str(GEARBOX), "--offer", "spacer=0.03@0.6", "--csv"])
    assert csv_out.exit_code == 0
    header = csv_out.stdout.splitlines()[0].split(",")
    assert CONTRACT_KEYS <= set(header) and len(csv_out.stdout.splitlines()) == 1 + 3
    table = CliRunner().invoke(cli, ["offer", str(GEARBOX), "--offer", "spacer=0.03@0.6", "--model", "rss"])
    row = evaluate_offers(load_case(GEARBOX), ["spacer=0.03@0.6"], models=["rss"]).rows[0]
    assert table.exit_code == 0 and f"{row.break_even_price:.4g}" in table.output
    assert f"±{row.counter_tolerance:.4g}" in table.output
    both = CliRunner().invoke(cli, ["offer", str(GEARBOX), "--offer", "spacer=0.03@0.6", "--csv", "--json"])
    assert both.exit_code == 2


def test_result_object_reads_like_the_other_results():
    result = evaluate_offers(load_case(GEARBOX), ["spacer=0.03@0.6"], models=["rss"])
    frame = result.to_frame()
    assert list(frame["contributor"]) == ["spacer"] and math.isclose(frame["saving"][0], result.rows[0].saving)
    assert result.success and result.to_dict()["offers"][0]["model"] == "rss"
    assert "spacer" in repr(result) and "Offers: optimal" in result._repr_html_()
    with pytest.raises(TypeError):
        result.rows[0].tolerances["spacer"] = 1.0  # read-only, like the Allocation's maps
    with pytest.raises(Exception):
        result.rows[0].price = 0.0  # frozen


# --------------------------------------------------------------------------- report


def test_report_shows_the_offers_under_discussion_only_when_there_are_some():
    from allocator.report import build_report

    case = loads_case(GEARBOX.read_text() + OFFER_TABLE)
    report = build_report(case, ["rss"], samples=1000, include_frontier=False)
    page = report.to_html()
    row = evaluate_offers(case, models=["rss"]).rows[0]
    part = page[page.index('id="offers"'):page.index("</section>", page.index('id="offers"'))]
    assert "Offers under discussion" in part and "invented supplier" in part
    assert f"{row.break_even_price:.4f}" in part and f"{row.total_cost:.6g}" in part
    plain = build_report(load_case(GEARBOX), ["rss"], samples=1000, include_frontier=False)
    assert plain.offers is None and "Offers under discussion" not in plain.to_html()


def test_report_with_a_bad_offer_writes_nothing(tmp_path):
    out = tmp_path / "report.html"
    result = CliRunner().invoke(cli, ["report", str(GEARBOX), "--offer", "spacer=0.3@1", "-o", str(out)])
    assert result.exit_code == 2 and "outside its limits" in result.stderr and not out.exists()
    good = CliRunner().invoke(cli, ["report", str(GEARBOX), "--offer", "spacer=0.03@0.6", "--model", "rss",
                                    "--no-frontier", "--samples", "1000", "-o", str(out)])
    assert good.exit_code == 0 and "Offers under discussion" in out.read_text()
    assert "--offer spacer=0.03@0.6" in out.read_text()  # the command that makes the same report
