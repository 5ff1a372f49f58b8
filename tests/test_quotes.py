"""Cost curves from supplier quotes (allocator/quotes.py, `allocator fit-costs`).

Checks against outside references: parameter recovery on noiseless quotes (the generating
curve is known exactly); scipy.optimize.curve_fit as an independent solver of the same
weighted least squares (sigma = quoted cost makes its residuals the relative ones); the
AICc of Hurvich & Tsai (1989) written out here; bad input, exit codes and the written case.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

import allocator
from allocator.case import load_case
from allocator.cli.main import cli
from allocator.costs import FAMILIES, CostCurve
from allocator.errors import CaseError, UsageError
from allocator.quotes import FITTED_CURVES, aicc, choose, fit_costs, fit_curve

ROOT = Path(__file__).resolve().parents[1]
GEARBOX = ROOT / "cases" / "gearbox_end_play.toml"
QUOTES = ROOT / "cases" / "gearbox_quotes.csv"

# invented curves, one per family, with parameters well inside their bounds
TRUE = {
    "reciprocal": dict(a=0.8, b=0.004),
    "reciprocal-power": dict(a=2.0, b=0.0004, k=1.6),
    "exponential": dict(a=0.5, b=6.0, c=40.0),
}
TOLERANCES = np.array([0.005, 0.01, 0.02, 0.04, 0.06, 0.08])


def test_every_formula_family_of_the_registry_is_fitted():
    assert set(FITTED_CURVES) == {n for n, f in FAMILIES.items() if not f.piecewise}
    assert set(TRUE) == set(FITTED_CURVES)


@pytest.mark.parametrize("curve", sorted(TRUE))
def test_noiseless_quotes_give_back_the_curve_that_made_them(curve):
    cost = CostCurve(curve, **TRUE[curve]).value(TOLERANCES)
    fit = fit_curve(TOLERANCES, cost, curve)
    assert fit.success
    for name, value in TRUE[curve].items():
        assert fit.params[name] == pytest.approx(value, rel=1e-6, abs=1e-9), name
    assert fit.rms_relative < 1e-8


@pytest.mark.parametrize("curve", sorted(TRUE))
def test_six_noiseless_quotes_choose_the_family_that_made_them(curve):
    cost = CostCurve(curve, **TRUE[curve]).value(TOLERANCES)
    fits = fit_costs({"contributor": ["p"] * 6, "tolerance": TOLERANCES, "cost": cost})
    assert fits["p"].curve == curve
    assert fits["p"].params == pytest.approx(TRUE[curve], rel=1e-6)


def _relative_rss(curve, params, t, c):
    r = CostCurve(curve, **params).value(t) / c - 1.0
    return float(r @ r)


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("curve", sorted(TRUE))
def test_a_noisy_fit_is_no_worse_than_scipy_curve_fit_on_the_same_residuals(curve, seed):
    from scipy import optimize

    rng = np.random.default_rng(seed)
    t = TOLERANCES
    c = CostCurve(curve, **TRUE[curve]).value(t) * (1 + 0.05 * rng.standard_normal(t.size))
    names = [q.name for q in FAMILIES[curve].parameters]
    fam = FAMILIES[curve]

    def model(x, *theta):
        p = fam.one(CostCurve(curve, **dict(zip(names, theta))))
        return fam.value(p, x)

    # independent solver: weighted least squares with sigma = the quote, started at the truth
    # and at a second point, within the registry's bounds
    best = math.inf
    for start in (TRUE[curve], {k: 2.0 * v for k, v in TRUE[curve].items()}):
        try:
            popt, _ = optimize.curve_fit(model, t, c, p0=[start[n] for n in names], sigma=c,
                                         bounds=([0.0] * len(names), [np.inf] * len(names)),
                                         maxfev=20000)
        except RuntimeError:
            continue
        best = min(best, _relative_rss(curve, dict(zip(names, popt)), t, c))
    ours = fit_curve(t, c, curve)
    assert math.isfinite(best)
    assert ours.rms_relative**2 * t.size <= best * (1 + 1e-7) + 1e-15


def test_aicc_is_the_hurvich_tsai_formula():
    # Hurvich & Tsai (1989), "Regression and time series model selection in small samples",
    # Biometrika 76(2): AIC + 2p(p+1)/(n-p-1), AIC = n ln(RSS/n) + 2p
    for rss, n, p in ((0.02, 6, 2), (0.003, 7, 3), (1.5, 10, 3)):
        assert aicc(rss, n, p) == pytest.approx(n * math.log(rss / n) + 2 * p + 2 * p * (p + 1) / (n - p - 1))
    assert aicc(0.01, 4, 3) == math.inf  # n - p - 1 = 0: not defined


def test_a_tie_goes_to_the_family_with_fewer_parameters():
    # noiseless reciprocal quotes: reciprocal-power fits them as well with k = 1
    cost = CostCurve("reciprocal", a=1.0, b=0.02).value(TOLERANCES)
    fits = [fit_curve(TOLERANCES, cost, name) for name in FITTED_CURVES]
    by_name = {f.curve: f for f in fits}
    assert by_name["reciprocal-power"].rms_relative < 1e-8
    assert choose(fits).curve == "reciprocal"


def test_too_few_quotes_for_any_criterion_choose_the_fewest_parameters():
    t = np.array([0.01, 0.03, 0.06])
    cost = CostCurve("exponential", a=0.5, b=6.0, c=40.0).value(t)
    fits = fit_costs({"contributor": ["p"] * 3, "tolerance": t, "cost": cost})
    assert fits["p"].curve == "reciprocal"
    assert all(math.isinf(f.criterion) for f in fits["p"].families)


# --------------------------------------------------------------------------- warnings


def test_warnings_fewer_quotes_than_parameters_plus_one():
    t = np.array([0.01, 0.03, 0.06])
    cost = CostCurve("reciprocal-power", a=1.0, b=0.001, k=1.3).value(t)
    fits = fit_costs({"contributor": ["p"] * 3, "tolerance": t, "cost": cost}, curve="reciprocal-power")
    assert any("3 quotes for the 3 parameters" in w for w in fits["p"].warnings)


def test_warnings_a_quote_far_off_the_fit_names_its_row():
    t = TOLERANCES
    cost = CostCurve("reciprocal", a=1.0, b=0.02).value(t)
    cost[3] *= 1.4  # fifth line of the file: header is row 1
    fits = fit_costs({"contributor": ["p"] * 6, "tolerance": t, "cost": cost}, curve="reciprocal")
    text = " ".join(fits["p"].warnings)
    assert "(row 5)" in text and "above the fit" in text and "ask the supplier" in text


def test_warnings_flat_quotes_give_a_curve_that_does_not_fall():
    fits = fit_costs({"contributor": ["p"] * 4, "tolerance": [0.01, 0.02, 0.04, 0.08],
                      "cost": [3.0, 3.0, 3.0, 3.0]}, curve="reciprocal")
    assert any("does not fall" in w for w in fits["p"].warnings)


def test_warnings_a_case_tolerance_far_outside_the_quotes():
    case = load_case(GEARBOX)  # spacer: tolerance 0.015, limits [0.003, 0.08]
    t = np.array([0.03, 0.05, 0.07])
    cost = CostCurve("reciprocal", a=0.4, b=0.002).value(t)
    fits = fit_costs({"contributor": ["spacer"] * 3, "tolerance": t, "cost": cost}, case=case)
    text = " ".join(fits["spacer"].warnings)
    assert "tolerance ±0.015 lies far outside" in text and "tightest limit ±0.003" in text
    # the written limits hold the quoted range and the current tolerance
    assert fits["spacer"].limits == (0.015, 0.07)


# --------------------------------------------------------------------------- writing


def test_one_supplier_writes_its_curve_and_the_quoted_range_several_write_processes():
    case = load_case(GEARBOX)
    fits = fit_costs(QUOTES, case=case)
    new = fits.apply()
    spacer = new.contributor("spacer")
    assert spacer.cost == fits["spacer"].cost_curve
    assert spacer.limits == (0.003, 0.08) == fits["spacer"].quoted_range
    housing = new.contributor("housing_depth")
    assert housing.limits is None and housing.cost is None
    assert [p.name for p in housing.processes] == ["Castings Nord", "Werk Sued"]
    for p in housing.processes:
        g = fits[("housing_depth", p.name)]
        assert p.cost == g.cost_curve and p.limits == g.quoted_range
    # untouched contributors keep everything
    assert new.contributor("retaining_ring") == case.contributor("retaining_ring")
    assert new.contributor("bearing_width") == case.contributor("bearing_width")
    # and the allocation runs on it, choosing a supplier for the housing
    result = allocator.allocate(new, model="rss")
    assert result.status == "optimal"
    assert result.processes["housing_depth"] in ("Castings Nord", "Werk Sued")


def test_apply_without_a_case_is_a_usage_error():
    fits = fit_costs({"contributor": ["p"] * 2, "tolerance": [0.01, 0.02], "cost": [2.0, 1.5]})
    with pytest.raises(UsageError, match="no case"):
        fits.apply()


# --------------------------------------------------------------------------- bad input


def _quotes(tmp_path, text, name="q.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


HEADER = "contributor,supplier,tolerance,cost\n"
BAD = {
    "missing column": ("contributor,supplier,tolerance\nspacer,,0.01,\n", "row 1: missing column 'cost'"),
    "unknown column": ("contributor,suplier,tolerance,cost\nspacer,,0.01,2\n",
                       "row 1, column suplier: unknown column 'suplier' (did you mean 'supplier'?)"),
    "non-numeric cell": (HEADER + "spacer,,0.01,2\nspacer,,0.02,abc\n", "row 3, column cost: 'abc' is not a number"),
    "tolerance zero": (HEADER + "spacer,,0.01,2\nspacer,,0,1.5\n", "row 3, column tolerance: a ± tolerance must be > 0"),
    "tolerance negative": (HEADER + "spacer,,-0.01,2\nspacer,,0.02,1.5\n", "row 2, column tolerance: a ± tolerance must be > 0"),
    "cost zero": (HEADER + "spacer,,0.01,0\nspacer,,0.02,1.5\n", "row 2, column cost: a quoted cost must be > 0"),
    "one point only": (HEADER + "spacer,,0.01,2\nspacer,,0.02,1.5\ngasket,,0.02,1.5\n",
                       "row 4, column tolerance: 'gasket' has one quote only"),
    "one tolerance only": (HEADER + "spacer,A,0.01,2\nspacer,A,0.01,2.1\n",
                           "row 2, column tolerance: 'spacer' from 'A' has quotes at one tolerance only"),
    "empty contributor": (HEADER + ",,0.01,2\n", "row 2, column contributor: empty"),
    "empty file": ("# only a comment\n", "is empty"),
    "extra cell": (HEADER + "spacer,,0.01,2,9\n", "row 2: 5 cells but the header has 4 columns"),
    "column twice": ("contributor,cost,tolerance,cost\n", "row 1, column cost: column 'cost' appears twice"),
}


@pytest.mark.parametrize("key", sorted(BAD))
def test_bad_quotes_are_one_line_naming_file_row_and_column(tmp_path, key):
    text, expected = BAD[key]
    path = _quotes(tmp_path, text)
    with pytest.raises(CaseError) as err:
        fit_costs(path)
    assert str(err.value) == f"{path}: {expected}" or str(err.value).startswith(f"{path}: {expected}")
    result = CliRunner().invoke(cli, ["fit-costs", str(path)])
    assert result.exit_code == 2
    assert result.stderr.count("\n") == 1 and result.stderr.startswith(f"error: {path}: ")
    assert "Traceback" not in result.output + result.stderr


def test_a_contributor_not_in_the_case_is_bad_input_and_nothing_is_written(tmp_path):
    path = _quotes(tmp_path, HEADER + "spacer,,0.01,2\nspacer,,0.02,1.5\nspaser,,0.01,2\nspaser,,0.02,1\n")
    out = tmp_path / "out.toml"
    result = CliRunner().invoke(cli, ["fit-costs", str(path), "--write", str(GEARBOX), str(out)])
    assert result.exit_code == 2
    assert result.stderr.strip() == (
        f"error: {path}: row 4, column contributor: 'spaser' is not a contributor of the case "
        "(did you mean 'spacer'?)"
    )
    assert not out.exists()


def test_the_input_case_is_never_overwritten(tmp_path):
    case = tmp_path / "case.toml"
    case.write_bytes(GEARBOX.read_bytes())
    before = case.read_bytes()
    result = CliRunner().invoke(cli, ["fit-costs", str(QUOTES), "--write", str(case), str(case)])
    assert result.exit_code == 2 and "refusing to overwrite" in result.stderr
    assert case.read_bytes() == before


def test_an_unknown_curve_is_a_usage_error():
    with pytest.raises(UsageError, match="did you mean 'reciprocal'"):
        fit_costs(QUOTES, curve="reciprocl")
    result = CliRunner().invoke(cli, ["fit-costs", str(QUOTES), "--curve", "table"])
    assert result.exit_code == 2


# --------------------------------------------------------------------------- command line


def test_cli_json_keeps_the_contract_keys():
    result = CliRunner().invoke(cli, ["fit-costs", str(QUOTES), "--json"])
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    assert doc["fits"]
    for fit in doc["fits"]:
        assert {"contributor", "supplier", "curve", "a", "b", "rms_relative", "points"} <= set(fit)
        extra = {"reciprocal": set(), "reciprocal-power": {"k"}, "exponential": {"c"}}[fit["curve"]]
        assert extra <= set(fit) and not ({"k", "c"} - extra) & set(fit)


def test_cli_writes_a_case_that_loads_and_a_plot(tmp_path):
    out, plot = tmp_path / "fitted.toml", tmp_path / "quotes.png"
    result = CliRunner().invoke(cli, ["fit-costs", str(QUOTES), "--curve", "reciprocal",
                                      "--write", str(GEARBOX), str(out), "--plot", str(plot)])
    assert result.exit_code == 0, result.output
    written = load_case(out)
    assert written.contributor("spacer").cost.curve == "reciprocal"
    assert plot.read_bytes().startswith(b"\x89PNG")
    assert out.read_text().startswith("# Written by allocator fit-costs")


def test_library_result_renders_as_a_table():
    fits = allocator.fit_costs(QUOTES)
    frame = fits.to_frame()
    assert list(frame.index.names) == ["contributor", "supplier"]
    assert len(frame) == len(fits.fits) == 5
    assert fits.success and "<table" in fits._repr_html_()


@pytest.mark.parametrize("seed", range(20))
def test_the_closed_form_bounded_pair_matches_scipy_lsq_linear(seed):
    from scipy import optimize

    from allocator.quotes import nonnegative_pair

    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 7))
    u = rng.uniform(0.1, 2.0, n)
    w = rng.normal(0.0, 1.0, n) * 10.0 ** rng.uniform(-3, 3)
    ours = np.array(nonnegative_pair(u, w))
    ref = optimize.lsq_linear(np.column_stack([u, w]), np.ones(n), bounds=(0.0, np.inf), tol=1e-14).x

    def rss(x):
        r = x[0] * u + x[1] * w - 1.0
        return float(r @ r)

    assert np.all(ours >= 0)
    assert rss(ours) <= rss(ref) * (1 + 1e-9) + 1e-14


def test_several_suppliers_widen_only_the_nearest_range_to_hold_the_tolerance():
    case = load_case(GEARBOX)  # spacer: tolerance 0.015
    t_a, t_b = np.array([0.03, 0.05, 0.08]), np.array([0.002, 0.004, 0.008])
    curve = CostCurve("reciprocal", a=0.4, b=0.002)
    quotes = {"contributor": ["spacer"] * 6, "supplier": ["A"] * 3 + ["B"] * 3,
              "tolerance": np.r_[t_a, t_b], "cost": curve.value(np.r_[t_a, t_b])}
    fits = fit_costs(quotes, case=case)
    # 0.015 / 0.008 < 0.03 / 0.015: B's range is the nearer one
    assert fits[("spacer", "A")].limits == (0.03, 0.08)
    assert fits[("spacer", "B")].limits == (0.002, 0.015)
    # one range already holding the tolerance: nothing widens
    quotes["tolerance"] = np.r_[t_a, [0.002, 0.01, 0.02]]
    fits = fit_costs(quotes, case=case)
    assert fits[("spacer", "B")].limits == (0.002, 0.02) and fits[("spacer", "A")].limits == (0.03, 0.08)
    assert allocator.allocate(fits.apply(), model="rss").status == "optimal"


def test_a_fit_that_fails_exits_1_and_writes_nothing(tmp_path, monkeypatch):
    import allocator.quotes as quotes

    def broken(tolerance, cost, curve):
        n = len(tolerance)
        return quotes.FamilyFit(curve=curve, params={"a": math.nan, "b": math.nan}, rms_relative=math.inf,
                                max_relative=math.inf, residuals=(math.nan,) * n, criterion=math.inf,
                                success=False, message="no convergence")

    monkeypatch.setattr(quotes, "fit_curve", broken)
    out = tmp_path / "out.toml"
    result = CliRunner().invoke(cli, ["fit-costs", str(QUOTES), "--curve", "reciprocal",
                                      "--write", str(GEARBOX), str(out)])
    assert result.exit_code == 1
    assert result.stderr.startswith("error: no usable fit for housing_depth")
    assert not out.exists()


@pytest.mark.parametrize("curve", sorted(TRUE))
def test_quotes_that_never_get_cheaper_cannot_be_written(tmp_path, curve):
    path = _quotes(tmp_path, HEADER + "spacer,,0.01,1.0\nspacer,,0.02,1.2\nspacer,,0.04,1.5\nspacer,,0.06,1.6\n")
    fits = fit_costs(path, curve=curve, case=load_case(GEARBOX))
    assert any("does not fall" in w for w in fits["spacer"].warnings)
    out = tmp_path / "out.toml"
    result = CliRunner().invoke(cli, ["fit-costs", str(path), "--curve", curve,
                                      "--write", str(GEARBOX), str(out)])
    assert result.exit_code == 2
    assert result.stderr.startswith(f"error: {path}: row 2, column cost: the {curve} curve fitted to spacer "
                                    "is flat")
    assert "do not get cheaper" in result.stderr
    assert not out.exists()


def test_a_written_case_keeps_its_unknowns_and_closure_equations(tmp_path):
    """The clutch's loop survives `fit-costs --write`; noiseless quotes give back their curve."""
    clutch = ROOT / "cases" / "roller_clutch.toml"
    case = load_case(clutch)
    true = {"hub_flat": dict(a=0.7, b=0.005), "ring_radius": dict(a=1.1, b=0.008)}  # invented
    tolerances = np.array([0.004, 0.008, 0.015, 0.03, 0.05])
    rows = "".join(f"{name},invented,{t!r},{c!r}\n" for name, params in true.items()
                   for t, c in zip(tolerances.tolist(), CostCurve("reciprocal", **params).value(tolerances).tolist()))
    path = _quotes(tmp_path, HEADER + rows, "clutch_quotes.csv")
    out = tmp_path / "fitted.toml"
    result = CliRunner().invoke(cli, ["fit-costs", str(path), "--curve", "reciprocal",
                                      "--write", str(clutch), str(out)])
    assert result.exit_code == 0, result.output
    written = load_case(out)
    assert written.unknowns == case.unknowns and written.closures == case.closures
    assert written.requirements == case.requirements
    for name, params in true.items():
        cost = written.contributor(name).cost
        assert (cost.a, cost.b) == pytest.approx((params["a"], params["b"]), rel=1e-6)
    assert written.contributor("roller_radius") == case.contributor("roller_radius")
