"""Case-level stack analysis against independent computations (scipy.stats, by hand)."""

import math

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


def test_tolerance_overrides_and_frames():
    case = end_play_case()
    res = analyze(case, {"housing": 0.01})
    r = res.requirements[0]
    assert r.worst_case_max == pytest.approx(0.2 + 0.01 + 0.04 + 0.03)
    frame = res.to_frame()
    assert frame.loc["end_play", "worst_case_max"] == pytest.approx(r.worst_case_max)
    contrib = res.contributions_frame()
    assert set(contrib.index.get_level_values("name")) == {"housing", "bearing", "spacer"}
    with pytest.raises(KeyError):
        analyze(case, {"nope": 0.1})
    d = res.to_dict()["requirements"][0]
    for key in ("name", "nominal", "worst_case_min", "worst_case_max", "sigma", "fallout_ppm"):
        assert key in d


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
