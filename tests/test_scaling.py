"""Numerical robustness: the answer must not depend on the units or the currency.

- Lengths: the same invented case written in mm, in m (×1e-3) and in μm (×1e3) -- and,
  to show that this is the solvers' internal scaling and not luck, in km (×1e-6) and nm
  (×1e6) -- gives the same allocation, scaled (1e-6 relative), the same total cost
  (1e-9 relative), the same status and a certified gap within the one 'optimal'
  requires, for all three models, on the exact single-requirement paths and on the
  conic multi-requirement path. Which solver attempt answered is not compared: it can
  change with the last bit of the data (docs/allocation.md).
- The formulation itself: the arrays handed to Clarabel for the conic cases are the same
  in every unit and currency to 1e-12 relative, also for a requirement whose limits are
  removed (checked without solving).
- Money: parts whose costs range from 1e-3 to 1e4 per part, all multiplied by one
  constant, give the same tolerances (the argmin of Σ n·C_i(t_i) is invariant under
  C → k·C for k > 0) and a total cost multiplied by that constant.

The rescaled cases are built here from the contract: a length scale ``s`` maps
``t → s·t``, nominals and limits likewise, and the curve parameters so that the cost of
each part is unchanged: reciprocal ``b → s·b``; reciprocal-power ``b → s^k·b``;
exponential ``c → c/s``; table tolerances ``→ s·t``. Cost tables are replaced by
reciprocal curves where tolerances are compared, since a piecewise-linear cost can have
many optima. Every answer is also re-checked with the independent code of
tests/helpers.py.
"""

from __future__ import annotations

import zlib
from dataclasses import replace

import numpy as np
import pytest

from allocator.model import Case, Contributor, CostCurve, Requirement
from allocator.solve import allocate
from allocator.solve.continuous import GAP_RTOL, CompiledAllocation

from helpers import Reference, build_case, rtol_for

MODELS = ("worst-case", "rss", "mean-shift")
LENGTH_SCALES = {"m": 1e-3, "um": 1e3, "km": 1e-6, "nm": 1e6}


def scale_curve_lengths(curve: CostCurve | None, s: float) -> CostCurve | None:
    if curve is None:
        return None
    if curve.curve == "reciprocal":
        return replace(curve, b=curve.b * s)
    if curve.curve == "reciprocal-power":
        return replace(curve, b=curve.b * s**curve.k)
    if curve.curve == "exponential":
        return replace(curve, c=curve.c / s)
    return replace(curve, points_tolerance=tuple(x * s for x in curve.points_tolerance))


def scale_lengths(case: Case, s: float, units: str) -> Case:
    """The same case with every length multiplied by ``s`` (costs per part unchanged).

    Chains are linear and expressions used here homogeneous of degree 1, so the
    sensitivities do not change; limits and nominal responses scale with ``s``.
    """
    people = tuple(
        replace(
            c,
            nominal=c.nominal * s,
            tolerance=c.tolerance * s,
            limits=None if c.limits is None else (c.limits[0] * s, c.limits[1] * s),
            cost=scale_curve_lengths(c.cost, s),
        )
        for c in case.contributors
    )
    requirements = tuple(
        replace(r, lower=None if r.lower is None else r.lower * s, upper=None if r.upper is None else r.upper * s)
        for r in case.requirements
    )
    return replace(case, contributors=people, requirements=requirements, units=units)


def scale_costs(case: Case, k: float) -> Case:
    """The same case with every part's cost multiplied by ``k``."""

    def scaled(curve):
        if curve is None:
            return None
        if curve.curve == "table":
            return replace(curve, points_cost=tuple(y * k for y in curve.points_cost))
        return replace(curve, a=curve.a * k, b=curve.b * k)

    return replace(case, contributors=tuple(replace(c, cost=scaled(c.cost)) for c in case.contributors))


def without_tables(case: Case) -> Case:
    """Tables -> a reciprocal curve through their end points (strictly convex: one optimum)."""

    def smooth(curve):
        if curve is None or curve.curve != "table":
            return curve
        (t0, t1), (y0, y1) = curve.points_tolerance[::len(curve.points_tolerance) - 1], (
            curve.points_cost[0], curve.points_cost[-1])
        b = max((y0 - y1) / (1 / t0 - 1 / t1), 1e-12 * (y0 + 1e-300))
        return CostCurve("reciprocal", a=max(y1 - b / t1, 0.0), b=b)

    return replace(case, contributors=tuple(replace(c, cost=smooth(c.cost)) for c in case.contributors))


def spread_cost_magnitudes(case: Case, rng) -> Case:
    """Each part's cost multiplied by its own factor, so parts cost 1e-3 .. 1e4."""
    people = []
    for c in case.contributors:
        factor = 10.0 ** rng.uniform(-3.0, 4.0)
        people.append(scale_costs(replace(case, contributors=(c,)), factor).contributors[0])
    return replace(case, contributors=tuple(people))


def expression_case() -> Case:
    """An invented bracket with a non-linear, degree-1 homogeneous response."""
    people = (
        Contributor("a", nominal=40.0, tolerance=0.02, limits=(0.004, 0.1), cost=CostCurve("reciprocal", a=0.5, b=0.01)),
        Contributor("b", nominal=10.0, tolerance=0.02, limits=(0.002, 0.05),
                    cost=CostCurve("reciprocal-power", a=0.2, b=1e-5, k=2.0), mean_shift=0.2),
        Contributor("c", nominal=15.0, tolerance=0.03, limits=(0.005, 0.2), cost=CostCurve("exponential", a=0.1, b=2.0, c=30.0)),
        Contributor("d", nominal=4.0, tolerance=0.01, fixed=True),
    )
    requirements = (
        Requirement("gap", expression="sqrt(a * b) - c - d", lower=0.6, upper=1.4, fallout_ppm=100.0),
        Requirement("span", chain={"a": 1.0, "c": -1.0}, lower=24.8, upper=25.3, fallout_ppm=500.0),
    )
    return Case(title="Scaling check (invented)", contributors=people, requirements=requirements)


def cases():
    """(id, case, model): generated chains (one and several requirements) and the expression case."""
    out = []
    for model in MODELS:
        for seed, (size, count) in enumerate([(2, 1), (9, 1), (25, 1), (4, 2), (8, 3), (12, 5)]):
            rng = np.random.default_rng(1000 * seed + MODELS.index(model))
            invented = build_case(rng, model, size, count, None)
            out.append((f"{model}-{size}x{count}", without_tables(invented.case), model))
        out.append((f"{model}-expression", expression_case(), model))
    return out


CASES = cases()

# Known shortfalls of the multi-requirement conic path (allocator/solve/continuous.py),
# strict xfail per case id; none at present. (An unrefined interior-point answer leaves the
# tolerances of parts that barely move the total cost undetermined beyond ~1e-5..1e-1, so
# these tests fail whenever the KKT refinement does not apply.)
UNITS_XFAIL: dict[str, str] = {}
COSTS_XFAIL: dict[str, str] = {}


# the five-requirement shape runs in CI only; 4x2 and 8x3 keep the conic path in the fast loop
SLOW_SHAPES = ("-12x5",)


def params(known: dict):
    return [
        pytest.param(*c, id=c[0], marks=([pytest.mark.xfail(strict=True, reason=known[c[0]])] if c[0] in known else [])
                     + ([pytest.mark.slow] if c[0].endswith(SLOW_SHAPES) else []))
        for c in CASES
    ]


def assert_met(case: Case, model: str, result) -> None:
    """Independent check of a chain-only case (the expression case is checked linearised
    by the project; its scaling is what is tested here)."""
    if any(r.expression for r in case.requirements):
        return
    t = result.allocated_array()
    ref = Reference(case, model)
    assert ref.within_limits(t)
    assert np.all(ref.excess(t)[0] <= rtol_for(model))


def solve_in_units(case: Case, model: str):
    base = allocate(case, model)
    assert base.status == "optimal", base.message
    assert_met(case, model, base)
    out = {}
    for units, s in LENGTH_SCALES.items():
        scaled = scale_lengths(case, s, units)
        result = allocate(scaled, model)
        assert result.status == "optimal", (units, result.message)
        assert_met(scaled, model, result)
        out[units] = (s, result)
    return base, out


@pytest.mark.parametrize("label, case, model", params({}))
def test_units_do_not_change_the_status_the_cost_or_the_certificate(label, case, model):
    """Same status and total cost in every unit, each answer re-checked independently
    (:func:`solve_in_units`) and certified within the gap 'optimal' requires
    (docs/allocation.md). Which solver attempt answered is not part of the contract."""
    base, scaled = solve_in_units(case, model)
    for result in [base] + [r for _, r in scaled.values()]:
        assert result.gap is not None and 0.0 <= result.gap <= GAP_RTOL, (result.units, result.gap)
    for units, (s, result) in scaled.items():
        assert result.status == base.status, units
        assert result.total_cost == pytest.approx(base.total_cost, rel=1e-8), units


@pytest.mark.parametrize("label, case, model", params(UNITS_XFAIL))
def test_units_do_not_change_the_allocation(label, case, model):
    base, scaled = solve_in_units(case, model)
    for units, (s, result) in scaled.items():
        np.testing.assert_allclose(result.allocated_array() / s, base.allocated_array(), rtol=1e-6,
                                   err_msg=f"{label} in {units} ({result.solver}: {result.message})")
        assert result.total_cost == pytest.approx(base.total_cost, rel=1e-9), units


def solve_with_cost_factors(label: str, case: Case, model: str):
    spread = spread_cost_magnitudes(case, np.random.default_rng(zlib.crc32(label.encode())))
    base = allocate(spread, model)
    assert base.status == "optimal", base.message
    out = {}
    for k in (1e-4, 1e-2, 1e2, 1e4):
        result = allocate(scale_costs(spread, k), model)
        assert result.status == "optimal", (k, result.message)
        out[k] = result
    return base, out


@pytest.mark.parametrize("label, case, model", params({}))
def test_multiplying_every_cost_multiplies_the_total(label, case, model):
    base, scaled = solve_with_cost_factors(label, case, model)
    for k, result in scaled.items():
        assert result.total_cost == pytest.approx(k * base.total_cost, rel=1e-7), k


@pytest.mark.parametrize("label, case, model", params(COSTS_XFAIL))
def test_multiplying_every_cost_keeps_the_tolerances(label, case, model):
    base, scaled = solve_with_cost_factors(label, case, model)
    for k, result in scaled.items():
        np.testing.assert_allclose(result.allocated_array(), base.allocated_array(), rtol=1e-6,
                                   err_msg=f"{label}, costs × {k:g} ({result.solver}: {result.message})")
        assert result.total_cost == pytest.approx(k * base.total_cost, rel=1e-9)


def test_the_scaled_cases_really_are_the_same_case():
    """Guard on the builders: every part costs the same at corresponding tolerances, and
    every requirement has the same nominal response (scaled)."""
    from allocator.chain import linearise

    for _, case, _ in CASES[:7]:
        for s in LENGTH_SCALES.values():
            scaled = scale_lengths(case, s, "x")
            for c, d in zip(case.contributors, scaled.contributors):
                if c.cost is None:
                    continue
                t = np.linspace(*c.limits, 5)
                np.testing.assert_allclose(d.cost.value(t * s), c.cost.value(t), rtol=1e-12)
            for r, q in zip(case.requirements, scaled.requirements):
                assert linearise(scaled, q).nominal == pytest.approx(s * linearise(case, r).nominal, rel=1e-12)


# --------------------------------------------------------------------------- what the solver sees

# the cases that go through the conic solver (several requirements, or an expression)
CONIC = [c for c in CASES if not c[0].endswith("x1")]


def solver_arrays(case: Case, model: str, overrides=None) -> dict[str, np.ndarray]:
    """``A``, ``b``, ``c`` handed to Clarabel in the first solve (dense)."""
    data = CompiledAllocation(case, model).solver_data(overrides)
    return {key: np.asarray(data[key].todense() if hasattr(data[key], "todense") else data[key], dtype=float)
            for key in ("A", "b", "c")}


def limits_removed(case: Case) -> dict:
    """Overrides that take both limits off the first requirement (an API-only case)."""
    return {case.requirements[0].name: {"lower": None, "upper": None}}


def assert_same_arrays(base: dict, other: dict, rtol: float, what: str) -> None:
    for key in base:
        assert other[key].shape == base[key].shape, (what, key)
        size = max(float(np.max(np.abs(base[key]), initial=0.0)), 1e-300)
        error = float(np.max(np.abs(other[key] - base[key]), initial=0.0)) / size
        assert error <= rtol, f"{what}: {key} differs by {error:.1e} (relative to its largest entry)"


@pytest.mark.parametrize("label, case, model", [pytest.param(*c, id=c[0]) for c in CONIC])
# the unlimited variant caught the unit-dependent right-hand side; the other runs in the whole suite
@pytest.mark.parametrize("overrides", [pytest.param(False, marks=pytest.mark.slow), True],
                         ids=["case-limits", "first-unlimited"])
def test_the_solver_is_handed_the_same_numbers_in_every_unit(label, case, model, overrides):
    """The scaled formulation does not depend on the length unit or the currency: the
    arrays Clarabel gets for the case in m, um, km and nm (or with every cost × 1e±4)
    equal those in mm to 1e-12 relative. The rescaled case carries its own round-off
    (limits and nominals are rounded separately, and the room ``U - y`` amplifies that
    by ``|y|/room``): measured up to 1.5e-13 here. Checked without solving, so it holds
    whichever solver attempt would succeed. With both limits of a requirement removed
    (overrides, API only) the never-binding right-hand side once carried an absolute
    ``+1`` (500 times the largest entry of b in m, 1e6 times too large in km)."""
    change = limits_removed(case) if overrides else None
    base = solver_arrays(case, model, change)
    for units, s in LENGTH_SCALES.items():
        other = solver_arrays(scale_lengths(case, s, units), model, change)
        assert_same_arrays(base, other, 1e-12, f"{label} in {units}")
    for k in (1e-4, 1e4):  # and the currency: costs are divided by a cost scale
        other = solver_arrays(scale_costs(case, k), model, change)
        assert_same_arrays(base, other, 1e-12, f"{label}, costs x {k:g}")
