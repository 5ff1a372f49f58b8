"""Implicit assemblies: closure equations, sensitivities through the loop, Monte Carlo per assembly.

References used below: the closed form of the one-way roller clutch's contact angle,
cos φ = (a + c)/(e − c) (Fortini, E. T. (1967). Engineering Tolerancing. Industrial Press;
Chase, K. W., Gao, J. and Magleby, S. P. (1995). General 2-D tolerance analysis of
mechanical assemblies with small kinematic adjustments. J. Design and Manufacturing 5(4),
263-274), and its derivatives by hand; the slider-crank's closed form (rod angle by the law
of sines); scipy.optimize.fsolve as an independent solver; and twin cases written once with
closure equations and once solved by hand.
"""

from __future__ import annotations

import json
import math
import re
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import optimize

from allocator.analysis import analyze
from allocator.case import load_case, loads_case
from allocator.chain import linearise
from allocator.cli.main import cli
from allocator.closure import ResponseEvaluator, loop_sensitivities
from allocator.errors import CaseError
from allocator.simulate import sample_responses, verify
from allocator.solve import allocate

ROOT = Path(__file__).resolve().parents[1]
CLUTCH = ROOT / "cases" / "roller_clutch.toml"
CLUTCH_TEXT = CLUTCH.read_text(encoding="utf-8")
EXPLICIT_ANGLE = "acos((hub_flat + roller_radius) / (ring_radius - roller_radius)) * 180 / pi"
EXPLICIT_OFFSET = "sqrt((ring_radius - roller_radius)**2 - (hub_flat + roller_radius)**2)"
DEG = 180.0 / math.pi


def explicit_twin(text: str) -> str:
    """The same clutch with the loop solved by hand: no unknowns, closed-form expressions."""
    text = re.sub(r"\[\[unknown\]\].*?(?=\[\[requirement\]\])", "", text, count=1, flags=re.S)
    text = text.replace('expression = "phi * 180 / pi"', f'expression = "{EXPLICIT_ANGLE}"')
    return text.replace('expression = "offset"', f'expression = "{EXPLICIT_OFFSET}"')


def twins(text: str = CLUTCH_TEXT):
    closure, explicit = loads_case(text), loads_case(explicit_twin(text))
    assert closure.unknowns and not explicit.unknowns
    return closure, explicit


def clutch_nominals(case):
    return tuple(case.contributor(n).nominal for n in ("hub_flat", "roller_radius", "ring_radius"))


# ----------------------------------------------------------------- twins


def test_twin_analysis_is_identical():
    closure, explicit = twins()
    a, b = analyze(closure), analyze(explicit)
    for ra, rb in zip(a.requirements, b.requirements):
        for key in ("nominal", "worst_case_min", "worst_case_max", "sigma", "fallout_ppm", "mean_shift_ppm"):
            assert getattr(ra, key) == pytest.approx(getattr(rb, key), rel=1e-9, abs=1e-12), key
        assert [c.name for c in ra.contributions] == [c.name for c in rb.contributions]
        for ca, cb in zip(ra.contributions, rb.contributions):
            assert ca.sensitivity == pytest.approx(cb.sensitivity, rel=1e-9)
    assert [u.name for u in a.unknowns] == ["phi", "offset"] and not b.unknowns


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
def test_twin_allocation_is_identical(model):
    text = CLUTCH_TEXT.replace("nominal = 27.645\n", "nominal = 27.645\nmean_shift = 0.2\n")
    closure, explicit = twins(text)
    a, b = allocate(closure, model=model), allocate(explicit, model=model)
    assert a.status == b.status == "optimal"
    assert a.total_cost == pytest.approx(b.total_cost, rel=1e-9)
    np.testing.assert_allclose(a.allocated_array(), b.allocated_array(), rtol=1e-9)


def _clutch_text(shift: bool) -> str:
    """The clutch case, with a mean shift on the ring radius when ``shift``."""
    if shift:
        return CLUTCH_TEXT.replace("nominal = 50.800\n", "nominal = 50.800\nmean_shift = 0.3\n")
    return CLUTCH_TEXT


@pytest.mark.parametrize("shift", [False, True])
def test_twin_monte_carlo_counts_are_identical(shift):
    # wide tolerances: some assemblies leave the limits and some cannot close at all
    # (the roller no longer fits: (a + c) > (e − c))
    closure, explicit = twins(_clutch_text(shift))
    wide = {"hub_flat": 0.3, "roller_radius": 0.1, "ring_radius": 0.3}
    a = verify(closure.with_tolerances(wide), samples=30_000, seed=11)
    b = verify(explicit.with_tolerances(wide), samples=30_000, seed=11)
    for ca, cb in zip(a.requirements, b.requirements):
        assert (ca.below, ca.above) == (cb.below, cb.above)
        assert ca.below + ca.above > 0
        # the explicit form is undefined (acos of more than 1) exactly where the loop cannot close
        assert ca.not_closed == cb.undefined > 0
        assert ca.undefined == 0 and ca.through_loop and not cb.through_loop
        assert ca.failures == cb.failures
        assert ca.fallout_ppm == cb.fallout_ppm
        assert ca.mean == pytest.approx(cb.mean, rel=1e-12)
        assert ca.to_dict()["not_closed"] == ca.not_closed


def test_sampled_responses_match_the_closed_form():
    closure, explicit = twins()
    a = sample_responses(closure, samples=5000, seed=2)
    b = sample_responses(explicit, samples=5000, seed=2)
    for name in a:
        np.testing.assert_allclose(a[name], b[name], rtol=1e-12)


# ----------------------------------------------------------------- published closed form


def test_roller_clutch_sensitivities_match_the_closed_form():
    # Fortini (1967); Chase, Gao & Magleby (1995): cos φ = (a + c)/(e − c). The sizes in
    # cases/roller_clutch.toml (a = 27.645, c = 11.43, e = 50.8 mm, φ ≈ 7.02°) are of the
    # order used for this example in that literature, recalled from memory; the check
    # holds for any sizes. Derivatives by hand, with k = e − c and s = sin φ:
    # ∂φ/∂a = −1/(k s), ∂φ/∂c = −(a + e)/(k² s), ∂φ/∂e = (a + c)/(k² s).
    case = load_case(CLUTCH)
    a, c, e = clutch_nominals(case)
    k = e - c
    phi = math.acos((a + c) / k)
    s = math.sin(phi)
    lin = linearise(case, case.requirement("contact_angle"))
    assert lin.nominal == pytest.approx(phi * DEG, rel=1e-13)
    expected = {"hub_flat": -1 / (k * s), "roller_radius": -(a + e) / (k**2 * s), "ring_radius": (a + c) / (k**2 * s)}
    for name, d in expected.items():
        assert lin.sensitivity[case.index(name)] == pytest.approx(d * DEG, rel=1e-10)
    # the roller's contact along the flat: b = (e − c) sin φ = sqrt(k² − (a + c)²)
    b = math.sqrt(k**2 - (a + c) ** 2)
    lin = linearise(case, case.requirement("roller_offset"))
    assert lin.nominal == pytest.approx(b, rel=1e-13)
    expected = {"hub_flat": -(a + c) / b, "roller_radius": -(k + a + c) / b, "ring_radius": k / b}
    for name, d in expected.items():
        assert lin.sensitivity[case.index(name)] == pytest.approx(d, rel=1e-10)


def test_nominal_solution_matches_scipy_fsolve():
    case = load_case(CLUTCH)
    a, c, e = clutch_nominals(case)

    def loop(v):
        phi, offset = v
        return [offset + c * math.sin(phi) - e * math.sin(phi), a + c + c * math.cos(phi) - e * math.cos(phi)]

    reference = optimize.fsolve(loop, [0.1, 5.0], xtol=1e-14)
    np.testing.assert_allclose(case.loop.values, reference, rtol=1e-10)
    assert np.all(np.abs(case.loop.residual) <= 1e-13 * case.loop.scale)  # round-off, not 1e-9


def test_analysis_splits_direct_and_through_loop():
    case = load_case(CLUTCH)
    result = analyze(case)
    angle = result.requirements[0]
    assert angle.through_loop == ("phi",)
    for c in angle.contributions:  # φ·180/π names no contributor: everything goes through the loop
        assert c.direct_sensitivity == 0.0
        assert c.loop_sensitivity == c.sensitivity
    split = loop_sensitivities(case, case.requirement("contact_angle"))
    np.testing.assert_allclose(split.direct + split.through_loop, linearise(case, case.requirement("contact_angle")).sensitivity)


def test_direct_and_loop_parts_add_up_for_a_mixed_response():
    # y = offset + hub_flat: a direct part (1) and a part through the loop (∂b/∂a)
    text = CLUTCH_TEXT.replace('expression = "offset"', 'expression = "offset + hub_flat"')
    case = loads_case(text)
    a, c, e = clutch_nominals(case)
    b = math.sqrt((e - c) ** 2 - (a + c) ** 2)
    row = {x.name: x for x in analyze(case).requirements[1].contributions}["hub_flat"]
    assert row.direct_sensitivity == 1.0
    assert row.loop_sensitivity == pytest.approx(-(a + c) / b, rel=1e-10)
    assert row.sensitivity == pytest.approx(1.0 - (a + c) / b, rel=1e-10)


# ----------------------------------------------------------------- the evaluator for sampling code


def test_response_evaluator_marks_assemblies_that_cannot_close():
    case = load_case(CLUTCH)
    evaluate = ResponseEvaluator(case)
    x = np.array([[27.645, 11.43, 50.80], [27.70, 11.40, 50.75], [27.95, 11.43, 50.80], [27.645, 11.43, 50.83]])
    y, closed = evaluate("contact_angle", x)
    assert closed.tolist() == [True, True, False, True]
    a, c, e = x.T
    with np.errstate(invalid="ignore"):
        expected = np.arccos((a + c) / (e - c)) * DEG
    np.testing.assert_allclose(y[closed], expected[closed], rtol=1e-12)
    assert np.isnan(y[2]) and np.isnan(expected[2])
    # position or name; a requirement given by its position gives the same
    y2, closed2 = evaluate(1, x)
    with np.errstate(invalid="ignore"):
        expected = np.sqrt((e - c) ** 2 - (a + c) ** 2)
    np.testing.assert_allclose(y2[closed2], expected[closed2], rtol=1e-12)


# ----------------------------------------------------------------- Newton robustness


def slider_crank(r: float, rod: float, theta: float, beta_guess: float, slider_guess: float) -> str:
    """An invented slider-crank: crank r at angle θ, rod at angle β, slider at s on the x-axis."""
    return f"""
title = "Invented slider-crank"
[[contributor]]
name = "crank"
nominal = {r!r}
tolerance = 0.01
fixed = true
[[contributor]]
name = "rod"
nominal = {rod!r}
tolerance = 0.01
fixed = true
[[contributor]]
name = "crank_angle"
nominal = {theta!r}
tolerance = 0.001
fixed = true
[[unknown]]
name = "beta"
guess = {beta_guess!r}
[[unknown]]
name = "slider"
guess = {slider_guess!r}
[[closure]]
equation = "crank * cos(crank_angle) + rod * cos(beta) - slider"
[[closure]]
equation = "crank * sin(crank_angle) - rod * sin(beta)"
[[requirement]]
name = "stroke"
expression = "slider"
lower = -1000
upper = 1000
"""


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    r=st.floats(1.0, 50.0),
    ratio=st.floats(1.5, 6.0),
    theta=st.floats(-math.pi, math.pi),
    d_beta=st.floats(-0.3, 0.3),
    d_slider=st.floats(-0.2, 0.2),
)
def test_random_slider_cranks_solve_from_perturbed_guesses(r, ratio, theta, d_beta, d_slider):
    # closed form: r sin θ = L sin β (law of sines); s = r cos θ + L cos β
    rod = ratio * r
    beta = math.asin(r * math.sin(theta) / rod)
    root = math.sqrt(rod**2 - (r * math.sin(theta)) ** 2)
    s = r * math.cos(theta) + root
    case = loads_case(slider_crank(r, rod, theta, beta + d_beta, s + d_slider * rod))
    np.testing.assert_allclose(case.loop.values, [beta, s], rtol=1e-9, atol=1e-12 * rod)
    # ∂s/∂r = cos θ − r sin²θ / root, ∂s/∂L = L / root, ∂s/∂θ = −r sin θ − r² sin θ cos θ / root
    expected = [
        math.cos(theta) - r * math.sin(theta) ** 2 / root,
        rod / root,
        -r * math.sin(theta) - r**2 * math.sin(theta) * math.cos(theta) / root,
    ]
    a = linearise(case, case.requirements[0]).sensitivity
    np.testing.assert_allclose(a, expected, rtol=1e-8, atol=1e-10 * max(1.0, r))


@pytest.mark.parametrize("gap", [1e-2, 1e-4, 1e-6, 1e-8, 1e-9, 1e-11, 1e-13, 0.0])
def test_near_dead_point_is_reported_or_solved_right(gap):
    # the roller just fits: a + c = (e − c) − gap; at gap 0 the contact angle is 0 and the
    # loop is at a dead point (∂F/∂u singular). Either the angle is right (closed form,
    # from the exact gap of the binary inputs: 1 − cos φ = gap/k, φ = 2·asin(√(gap/2k)))
    # or the loop is reported; never a wrong angle.
    a = 50.8 - 2 * 11.43 - gap
    text = CLUTCH_TEXT.replace("nominal = 27.645", f"nominal = {a!r}")
    k = 50.8 - 11.43
    exact_gap = float(Fraction(50.8) - 2 * Fraction(11.43) - Fraction(a))
    try:
        case = loads_case(text)
    except CaseError as err:
        assert "the loop does not close at the nominals" in str(err)
        assert "singular" in str(err) and "loop_y" in str(err) and "phi" in str(err)
        assert gap < 1e-4  # a clear configuration is solved
        return
    assert gap > 1e-11  # at the dead point and next to it: reported
    phi = 2 * math.asin(math.sqrt(exact_gap / (2 * k)))
    # near a double root round-off costs accuracy (about cond²·eps); far from it, none
    assert case.loop.values[0] == pytest.approx(phi, rel=1e-9 if gap >= 1e-4 else 1e-6)
    s = math.sin(phi)
    lin = linearise(case, case.requirement("contact_angle"))
    assert lin.sensitivity[case.index("hub_flat")] == pytest.approx(-DEG / (k * s), rel=1e-9 if gap >= 1e-4 else 1e-6)


def test_structurally_singular_equations_name_equations_and_unknowns():
    text = """
title = "Invented: two equations that say the same"
[[contributor]]
name = "a"
nominal = 3.0
tolerance = 0.01
fixed = true
[[unknown]]
name = "u"
guess = 1.0
[[unknown]]
name = "v"
guess = 1.0
[[closure]]
name = "sum"
equation = "u + v - a"
[[closure]]
name = "twice"
equation = "2 * u + 2 * v - 2 * a"
[[requirement]]
name = "y"
expression = "u"
upper = 10
"""
    with pytest.raises(CaseError) as info:
        loads_case(text, source="twice.toml")
    message = str(info.value)
    assert message.startswith("twice.toml: closure: the loop does not close at the nominals:")
    assert "sum, twice" in message and "u, v" in message and "\n" not in message


# ----------------------------------------------------------------- bad input and the command line


CLOSURE_CORPUS = [
    "closure_count_mismatch", "unknown_shadows_contributor", "unknown_unused", "chain_names_unknown",
    "closure_unknown_name", "closure_names_no_unknown", "closure_no_solution", "closure_dead_point",
    "unknown_missing_guess", "closure_unknown_key", "requirement_names_unknown_typo",
    "closure_duplicate_unknown", "closure_undefined_at_guess",
]


@pytest.mark.parametrize("name", CLOSURE_CORPUS)
def test_closure_errors_exit_2_with_one_named_line(name):
    # the corpus test (test_bad_input.py) checks every file's expected message; here each
    # closure error is known to be in the corpus and to exit 2 through the command line
    path = ROOT / "tests" / "bad_cases" / f"{name}.toml"
    expected = path.read_text(encoding="utf-8").split("\n", 1)[0].removeprefix("# expect: ")
    done = CliRunner().invoke(cli, ["analyze", str(path)])
    assert done.exit_code == 2
    assert expected in done.output and done.output.count("\n") == 1


def test_analyze_json_shows_unknowns_and_loop_sensitivities():
    done = CliRunner().invoke(cli, ["analyze", str(CLUTCH), "--json"])
    assert done.exit_code == 0
    doc = json.loads(done.stdout)
    a, c, e = 27.645, 11.43, 50.8
    unknowns = {u["name"]: u["nominal"] for u in doc["unknowns"]}
    assert unknowns["phi"] == pytest.approx(math.acos((a + c) / (e - c)), rel=1e-13)
    angle = doc["requirements"][0]
    assert angle["through_loop"] == ["phi"]
    for row in angle["contributors"]:
        assert row["direct_sensitivity"] + row["loop_sensitivity"] == pytest.approx(row["sensitivity"])
    text = CliRunner().invoke(cli, ["analyze", str(CLUTCH)]).stdout
    assert "closure equations solved at the nominals" in text and "through loop" in text


def test_verify_cli_reports_unclosed_loops(tmp_path):
    wide = tmp_path / "tolerances.json"
    wide.write_text(json.dumps({"hub_flat": 0.3, "roller_radius": 0.1, "ring_radius": 0.3}))
    done = CliRunner().invoke(
        cli, ["verify", str(CLUTCH), "--tolerances", str(wide), "--samples", "20000", "--seed", "5", "--json"]
    )
    assert done.exit_code in (0, 1)
    doc = json.loads(done.stdout)
    checks = doc["requirements"]
    assert all(c["not_closed"] > 0 for c in checks)
    text = CliRunner().invoke(
        cli, ["verify", str(CLUTCH), "--tolerances", str(wide), "--samples", "20000", "--seed", "5"]
    ).stdout
    assert "whose loop cannot close" in text


def test_chord_start_and_plain_newton_agree_with_the_closed_form():
    # solve_samples with the nominal Jacobian (chord steps first) and without (Newton only)
    from allocator.closure import compile_loop, solve_samples

    case = load_case(CLUTCH)
    rng = np.random.default_rng(4)
    x = np.array(clutch_nominals(case)) + rng.normal(0.0, [0.1, 0.03, 0.1], size=(4000, 3))
    loop, solution = compile_loop(case), case.loop
    u1, closed1 = solve_samples(loop, x, solution.values, solution.scale, solution.jacobian)
    u2, closed2 = solve_samples(loop, x, solution.values, solution.scale)
    a, c, e = x.T
    with np.errstate(invalid="ignore"):
        phi = np.arccos((a + c) / (e - c))
    assert np.array_equal(closed1, closed2) and np.array_equal(closed1, np.isfinite(phi))
    assert 0 < np.count_nonzero(~closed1) < 4000
    # near the dead point (φ → 0) the angle is ill-conditioned in its inputs, for the closed
    # form as for the loop: compare to 1e-11 rad there, to 1e-12 relative elsewhere
    np.testing.assert_allclose(u1[closed1, 0], phi[closed1], rtol=1e-12, atol=1e-11)
    np.testing.assert_allclose(u2[closed2, 0], phi[closed2], rtol=1e-12, atol=1e-11)


def test_monte_carlo_through_the_loop_does_not_depend_on_the_chunk_size():
    case = load_case(CLUTCH).with_tolerances({"hub_flat": 0.3, "roller_radius": 0.1, "ring_radius": 0.3})
    whole = verify(case, samples=150_000, seed=9)
    pieces = verify(case, samples=150_000, seed=9, chunk_size=2**16)
    assert pieces.chunk_size < whole.chunk_size
    for a, b in zip(whole.requirements, pieces.requirements):
        assert (a.below, a.above, a.undefined, a.not_closed) == (b.below, b.above, b.undefined, b.not_closed)
        assert a.not_closed > 0


@pytest.mark.parametrize(
    "equation, fragment",
    [
        ("phi ** 1000 - hub_flat", "exponent is too large"),
        ("phi.real - hub_flat", "attribute access"),
        ("__import__('os') - phi", "not allowed"),
        ("(" * 300 + "phi" + ")" * 300, "nested"),
    ],
)
def test_closure_equations_keep_the_expression_safety_limits(equation, fragment):
    text = CLUTCH_TEXT.replace(
        'equation = "offset + roller_radius * sin(phi) - ring_radius * sin(phi)"', f"equation = {json.dumps(equation)}"
    )
    with pytest.raises(CaseError) as info:
        loads_case(text, source="hostile.toml")
    assert str(info.value).startswith("hostile.toml: closure[1] (loop_x).equation: ")
    assert fragment in str(info.value)


@pytest.mark.parametrize("shift", [False, True])
def test_importance_sampling_through_the_loop_equals_its_explicit_twin(shift):
    # importance sampling (allocator.importance) solves the loop per sampled assembly; the
    # twin with the loop solved by hand (closed form cos φ = (a + c)/(e − c), Fortini 1967)
    # must give the same estimate for the same seed: the same draws, the same responses
    from allocator.importance import verify_importance

    closure, explicit = twins(_clutch_text(shift))
    a = verify_importance(closure, samples=20_000, seed=5)
    b = verify_importance(explicit, samples=20_000, seed=5)
    for ca, cb in zip(a.requirements, b.requirements):
        assert ca.fallout_ppm > 0
        assert ca.fallout_ppm == pytest.approx(cb.fallout_ppm, rel=1e-9)
        assert ca.ci_high_ppm == pytest.approx(cb.ci_high_ppm, rel=1e-9)
