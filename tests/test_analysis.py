"""Case-level stack analysis against independent computations (scipy.stats, by hand)."""

import math
from fractions import Fraction

import pytest
from scipy import stats

from allocator.analysis import analyze
from helpers import chain_requirement, contributor, make_case


def end_play_case():
    # invented: y = housing − 2·bearing − spacer, bearing counted twice
    cs = [
        contributor("housing", nominal=50.0, tolerance=0.05),
        contributor("bearing", nominal=20.0, tolerance=0.02, count=2, mean_shift=0.5),
        contributor("spacer", nominal=9.8, tolerance=0.03, distribution="uniform"),
    ]
    req = chain_requirement("end_play", {"housing": 1, "bearing": -1, "spacer": -1}, lower=0.05, upper=0.35, fallout_ppm=100)
    return make_case(cs, [req])


def test_analysis_by_hand_and_scipy():
    r = analyze(end_play_case()).requirements[0]
    # nominal: 50 − 2·20 − 9.8 = 0.2
    assert r.nominal == pytest.approx(0.2)
    # worst case: 0.05 + 2·0.02 + 0.03 = 0.12
    assert (r.worst_case_min, r.worst_case_max) == pytest.approx((0.08, 0.32))
    sigma = math.sqrt((0.05 / 3) ** 2 + 2 * (0.02 / 3) ** 2 + (0.03 / math.sqrt(3)) ** 2)
    assert r.sigma == pytest.approx(sigma, rel=1e-12)
    assert r.fallout_ppm == pytest.approx(1e6 * (stats.norm.cdf(0.05, 0.2, sigma) + stats.norm.sf(0.35, 0.2, sigma)), rel=1e-10)
    # mean shift band: 2 instances · 0.5 · 0.02 = 0.02; limits symmetric about 0.2, so either end
    assert r.mean_shift == pytest.approx(0.02)
    ms = 1e6 * (stats.norm.cdf(0.05, 0.22, sigma) + stats.norm.sf(0.35, 0.22, sigma))
    assert r.mean_shift_ppm == pytest.approx(ms, rel=1e-10)
    shares = {c.name: c.variance_share for c in r.contributions}
    assert sum(shares.values()) == pytest.approx(1.0)
    assert shares["housing"] == pytest.approx((0.05 / 3) ** 2 / sigma**2)
    assert r.cpk == pytest.approx(0.15 / (3 * sigma))


def test_fallout_ppm_is_a_target_on_a_requirement_and_the_rss_prediction_in_an_analysis():
    # docs/results.md, "What fallout_ppm means": the case's fallout_ppm is the target; the
    # analysis' fallout_ppm is the centred normal (rss) prediction, scipy.stats.norm here
    case = end_play_case()
    (req,) = case.requirements
    assert req.target_ppm == req.fallout_ppm == 100
    r = analyze(case).requirements[0]
    sigma = math.sqrt((0.05 / 3) ** 2 + 2 * (0.02 / 3) ** 2 + (0.03 / math.sqrt(3)) ** 2)
    rss = 1e6 * (stats.norm.cdf(0.05, 0.2, sigma) + stats.norm.sf(0.35, 0.2, sigma))
    assert r.rss_ppm == pytest.approx(rss, rel=1e-10)
    assert r.fallout_ppm == r.rss_ppm and r.to_dict()["fallout_ppm"] == r.rss_ppm
    assert r.target_ppm == 100 and r.to_dict()["target_ppm"] == 100
    assert "rss_ppm" not in r.to_dict()  # the JSON keeps its keys


def test_tolerance_overrides_and_frames():
    case = end_play_case()
    res = analyze(case, {"housing": 0.01})
    r = res.requirements[0]
    assert r.worst_case_max == pytest.approx(0.2 + 0.01 + 0.04 + 0.03)
    frame = res.to_frame()
    assert frame.loc["end_play", "worst_case_max"] == pytest.approx(r.worst_case_max)
    contrib = res.contributions_frame()
    assert set(contrib.index.get_level_values("contributor")) == {"housing", "bearing", "spacer"}
    # indexed by the natural names; a notebook shows the result as a table
    assert frame.index.name == "requirement" and contrib.index.names == ["requirement", "contributor"]
    assert "<table" in res._repr_html_() and "end_play" in res._repr_html_()
    d = res.to_dict()["requirements"][0]
    for key in ("name", "nominal", "worst_case_min", "worst_case_max", "sigma", "fallout_ppm"):
        assert key in d


def test_tolerances_given_as_a_pandas_series_or_any_mapping():
    """An allocation's ``tolerances`` (a pandas Series) goes straight into analyze."""
    import pandas as pd
    from types import MappingProxyType

    case = end_play_case()
    # worst case by hand: 0.02 + 2·0.02 + 0.01 = 0.07 about the nominal 0.2
    for given in (pd.Series({"housing": 0.02, "spacer": 0.01}),
                  MappingProxyType({"housing": 0.02, "spacer": 0.01})):
        r = analyze(case, given).requirements[0]
        assert (r.worst_case_min, r.worst_case_max) == pytest.approx((0.13, 0.27))
    # an empty Series changes nothing
    assert analyze(case, pd.Series(dtype=float)).requirements[0].worst_case_max == pytest.approx(0.32)


def test_unknown_contributor_is_a_usage_error_with_a_suggestion():
    from allocator.errors import UsageError

    case = end_play_case()
    with pytest.raises(UsageError, match="unknown contributor 'housng' \\(did you mean 'housing'\\?\\)"):
        analyze(case, {"housng": 0.1})
    with pytest.raises(ValueError, match="unknown contributor 'nope'"):  # UsageError is a ValueError
        analyze(case, {"nope": 0.1})
    with pytest.raises(UsageError, match="did you mean 'spacer'"):
        case.with_tolerances({"spacr": 0.1})


# --------------------------------------------------------------------------- verdict at a limit
# Exact decimal arithmetic (fractions.Fraction of the numbers as written) is the reference:
# it says where the worst case really is; binary floating point lands a few ulps off.


def _exact_worst_case(nominals, coefficients, tolerances):
    """Worst-case range of a linear chain in exact rational arithmetic from decimal strings."""
    y = sum(Fraction(c) * Fraction(x) for c, x in zip(coefficients, nominals))
    w = sum(abs(Fraction(c)) * Fraction(t) for c, t in zip(coefficients, tolerances))
    return y - w, y + w


def test_starter_template_analyses_as_inside():
    from allocator.case import loads_case
    from allocator.cli.init import starter_text

    case = loads_case(starter_text(), source="starter.toml")
    r = analyze(case).requirements[0]
    # exactly: 33.5 − 30 − 2·1.6 = 0.3 and 0.1 + 0.05 + 2·0.05 = 0.25, so [0.05, 0.55]
    exact_min, exact_max = _exact_worst_case(["33.5", "30.0", "1.6"], ["1", "-1", "-2"], ["0.1", "0.05", "0.05"])
    assert exact_min == Fraction("0.05") == Fraction(str(r.lower))
    assert exact_max < Fraction(str(r.upper))
    assert r.worst_case_ok
    assert r.worst_case_below == 0.0 and r.worst_case_above == 0.0
    assert r.to_dict()["worst_case_ok"] is True


def test_starter_template_through_the_cli_says_inside(tmp_path):
    from click.testing import CliRunner

    from allocator.cli.main import cli

    path = tmp_path / "starter.toml"
    runner = CliRunner()
    assert runner.invoke(cli, ["init", str(path)]).exit_code == 0
    result = runner.invoke(cli, ["analyze", str(path)])
    assert result.exit_code == 0, result.output
    assert "worst case [0.05, 0.55] inside limits" in result.output
    assert "OUTSIDE" not in result.output


@pytest.mark.parametrize(
    "nominals, side",
    [
        (("30.7", "10.2", "20.3"), "lower"),  # exactly [0.1, 0.3]; in binary the low end is 0.0999...93
        (("12.3", "4.1", "8.1"), "upper"),  # exactly [0.0, 0.2]; in binary the high end is 0.2000...14
    ],
)
def test_worst_case_exactly_at_a_limit_is_inside(nominals, side):
    tolerances = ("0.07", "0.01", "0.02")
    exact_min, exact_max = _exact_worst_case(nominals, ["1", "-1", "-1"], tolerances)
    lower, upper = float(exact_min), float(exact_max)
    assert Fraction(str(lower)) == exact_min and Fraction(str(upper)) == exact_max  # limits are the exact ends
    cs = [contributor(n, nominal=float(x), tolerance=float(t)) for n, x, t in zip("abc", nominals, tolerances)]
    case = make_case(cs, [chain_requirement("gap", {"a": 1, "b": -1, "c": -1}, lower=lower, upper=upper)])
    r = analyze(case).requirements[0]
    # the float ends pass the limit by round-off only (else this test would prove nothing)
    assert (r.worst_case_min < lower) if side == "lower" else (r.worst_case_max > upper)
    assert r.worst_case_ok, (r.worst_case_min, r.worst_case_max)


@pytest.mark.parametrize("side", ["lower", "upper"])
def test_worst_case_one_millionth_outside_is_outside(side):
    nominals, tolerances = ("30.7", "10.2", "20.3"), ("0.07", "0.01", "0.02")
    exact_min, exact_max = _exact_worst_case(nominals, ["1", "-1", "-1"], tolerances)
    lower, upper = float(exact_min), float(exact_max)
    if side == "lower":
        lower *= 1 + 1e-6
    else:
        upper *= 1 - 1e-6
    cs = [contributor(n, nominal=float(x), tolerance=float(t)) for n, x, t in zip("abc", nominals, tolerances)]
    case = make_case(cs, [chain_requirement("gap", {"a": 1, "b": -1, "c": -1}, lower=lower, upper=upper)])
    r = analyze(case).requirements[0]
    assert not r.worst_case_ok
    if side == "lower":
        assert r.worst_case_below == pytest.approx(0.1e-6, rel=1e-6) and r.worst_case_above == 0.0
    else:
        assert r.worst_case_above == pytest.approx(0.3e-6, rel=1e-6) and r.worst_case_below == 0.0


def test_cli_names_the_amount_past_the_limit(tmp_path):
    # a printed end of 0.05 (six digits) must not sit beside an unexplained OUTSIDE
    from click.testing import CliRunner

    from allocator.cli.init import starter_text
    from allocator.cli.main import cli

    path = tmp_path / "just_outside.toml"
    path.write_text(starter_text().replace("lower = 0.05 ", "lower = 0.05000005 "), encoding="utf-8")
    result = CliRunner().invoke(cli, ["analyze", str(path)])
    assert result.exit_code == 0, result.output
    assert "OUTSIDE limits: 5e-08 below lower 0.05" in result.output


def test_room_to_the_limits_by_hand():
    import numpy as np

    from allocator import stack

    # values that are exact binary fractions, so the hand results are exact
    assert stack.room(10.0, 9.5, 10.25) == (0.5, 0.25)  # two-sided
    assert stack.room(10.0, upper=10.25) == (math.inf, 0.25)  # one-sided, upper
    assert stack.room(10.0, lower=9.5) == (0.5, math.inf)  # one-sided, lower
    assert stack.room(10.0) == (math.inf, math.inf)  # no limit
    assert stack.room(10.0, 9.5, 10.25, delta=0.125) == (0.375, 0.125)  # mean band ȳ ± δ
    assert stack.room(10.0, 9.5, 10.25, delta=0.25) == (0.25, 0.0)  # the band reaches U
    assert stack.room(10.0, 9.5, 10.25, delta=0.5) == (0.0, -0.25)  # reaches L, passes U
    assert stack.room(10.5, 9.5, 10.25) == (1.0, -0.25)  # nominal beyond U: negative room
    # decimal inputs: the same bits as ȳ − L and U − ȳ written out (here ȳ − L is 0.25000000000000006)
    y, lower, upper = 0.1 + 0.2, 0.05, 0.6
    assert stack.room(y, lower, upper) == (y - lower, upper - y)
    assert stack.room(y, lower, upper, delta=0.05) == ((y - 0.05) - lower, (upper - y) - 0.05)
    # arrays with ±inf for a missing side (the Monte Carlo tally's form)
    below, above = stack.room(np.array([10.0, 10.0]), np.array([9.5, -np.inf]), np.array([np.inf, 10.25]))
    assert below.tolist() == [0.5, math.inf] and above.tolist() == [math.inf, 0.25]


def test_zero_spread_response_on_its_limit_has_no_fallout():
    from allocator import stack

    # 0.1 + 0.2 is 0.30000000000000004 in binary: on the limit 0.3, not beyond it
    assert stack.normal_fallout(0.1 + 0.2, 0.0, upper=0.3) == (0.0, 0.0)
    assert stack.normal_fallout(0.3 - 0.2, 0.0, lower=0.1) == (0.0, 0.0)
    assert stack.normal_fallout(0.3 * (1 + 1e-6), 0.0, upper=0.3) == (0.0, 1.0)


def test_cli_prints_tiny_fallout_in_ppb_without_exponents():
    # the gear hub demo's upper tail is far below 0.01 ppm: the table says it in ppb
    import re
    from pathlib import Path

    from click.testing import CliRunner

    from allocator.case import load_case
    from allocator.cli.main import cli
    from allocator.ppm import format_ppm

    path = Path(__file__).resolve().parents[1] / "cases" / "gear_hub_end_play.toml"
    result = CliRunner().invoke(cli, ["analyze", str(path)])
    assert result.exit_code == 0, result.output
    r = analyze(load_case(path)).requirements[0]
    assert r.fallout_above_ppm < 0.01
    assert f"above {format_ppm(r.fallout_above_ppm)}" in result.stdout
    assert format_ppm(r.fallout_above_ppm).endswith(" ppb")
    for line in result.stdout.splitlines():
        if "fallout" in line:
            assert not re.search(r"\d[eE][-+]\d", line), line


def test_csv_of_the_command_line_keeps_its_column_names(tmp_path):
    """The library frame is indexed by contributor; the CLI's CSV header stays as it was."""
    from click.testing import CliRunner

    from allocator.cli.main import cli

    from pathlib import Path

    case_file = Path(__file__).resolve().parent.parent / "cases" / "gearbox_end_play.toml"
    out = CliRunner().invoke(cli, ["analyze", str(case_file), "--csv"])
    assert out.exit_code == 0, out.output
    assert out.output.splitlines()[0].startswith("requirement,name,sensitivity,")
