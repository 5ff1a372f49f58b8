"""Capability from measured parts (allocator/measured.py, `allocator capability`).

References: the worked example of the NIST/SEMATECH e-Handbook of Statistical Methods,
section 6.1.6 (numbers from memory, marked so); the chi-square interval of Cp (Montgomery,
Introduction to Statistical Quality Control, section 8.3) and Bissell's interval of Cpk
(A. F. Bissell, "How reliable is your capability index?", Applied Statistics 39(3), 1990)
written out here with scipy.stats; scipy.stats.anderson and its tables of critical values
(Stephens 1974) for the normality test; the stack formulas of the case contract for the
written case.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import stats

import allocator
from allocator.case import load_case, loads_case
from allocator.cli.main import cli
from allocator.errors import CaseError, UsageError
from allocator.measured import (
    ad_pvalue,
    anderson_darling_normal,
    capability,
    cp_interval,
    cpk_interval,
)

ROOT = Path(__file__).resolve().parents[1]
GEARBOX = ROOT / "cases" / "gearbox_end_play.toml"
MEASUREMENTS = ROOT / "cases" / "gearbox_measurements.csv"

NIST_CASE = """
title = "capability example"
[[contributor]]
name = "x"
nominal = 14.0
tolerance = 6.0
limits = [1.0, 10.0]
cost = { curve = "reciprocal", a = 1.0, b = 1.0 }
[[requirement]]
name = "r"
chain = { x = 1 }
upper = 30.0
"""


def _exact_sample(mean, std, n, seed=0):
    """n values whose sample mean and sample standard deviation (n - 1) are exactly these."""
    z = np.random.default_rng(seed).standard_normal(n)
    z = (z - z.mean()) / z.std(ddof=1)
    return mean + std * z


def test_nist_handbook_example():
    # NIST/SEMATECH e-Handbook of Statistical Methods, 6.1.6 (from memory): USL = 20,
    # LSL = 8, mean 16, s = 2 give Cp = 1.0, k = |m - mean|/((USL - LSL)/2) = 1/3 and
    # Cpk = Cp (1 - k) = 0.6667. Our nominal 14 ± 6 is that specification.
    case = loads_case(NIST_CASE)
    x = _exact_sample(16.0, 2.0, 50)
    r = capability(case, {"x": x})["x"]
    assert r.cp == pytest.approx(1.0, rel=1e-12)
    assert r.mean_shift == pytest.approx(1 / 3, rel=1e-12)
    assert r.cpk == pytest.approx(0.6667, abs=5e-5)
    assert r.cpk == pytest.approx(r.cp * (1 - r.mean_shift), rel=1e-12)


@pytest.mark.parametrize("n, confidence", [(10, 0.95), (30, 0.9), (125, 0.99)])
def test_cp_interval_is_the_chi_square_interval(n, confidence):
    # Montgomery, section 8.3: Cp sqrt(chi2_{a/2, n-1}/(n-1)) <= Cp <= Cp sqrt(chi2_{1-a/2, n-1}/(n-1))
    alpha = 1 - confidence
    low, high = cp_interval(1.33, n, confidence)
    assert low == pytest.approx(1.33 * math.sqrt(stats.chi2.ppf(alpha / 2, n - 1) / (n - 1)), rel=1e-12)
    assert high == pytest.approx(1.33 * math.sqrt(stats.chi2.isf(alpha / 2, n - 1) / (n - 1)), rel=1e-12)


def test_cp_interval_covers_the_true_cp_as_often_as_it_says():
    # exact for normal data: 4000 simulated samples of 20, coverage within 3 binomial sigma
    rng = np.random.default_rng(7)
    sigma, t, n, reps = 0.5, 2.0, 20, 4000
    true_cp = t / (3 * sigma)
    s = rng.normal(0.0, sigma, (reps, n)).std(axis=1, ddof=1)
    hits = 0
    for cp_hat in t / (3 * s):
        low, high = cp_interval(cp_hat, n, 0.95)
        hits += low <= true_cp <= high
    assert abs(hits / reps - 0.95) < 3 * math.sqrt(0.95 * 0.05 / reps)


@pytest.mark.parametrize("cpk, n", [(1.0, 30), (1.33, 50), (0.6, 12)])
def test_cpk_interval_is_bissells(cpk, n):
    # Bissell (1990): Cpk [1 -+ z sqrt(1/(9 n Cpk^2) + 1/(2(n-1)))]
    z = stats.norm.ppf(0.975)
    half = z * math.sqrt(1 / (9 * n * cpk**2) + 1 / (2 * (n - 1)))
    low, high = cpk_interval(cpk, n, 0.95)
    assert low == pytest.approx(cpk * (1 - half), rel=1e-12)
    assert high == pytest.approx(cpk * (1 + half), rel=1e-12)


def test_cpk_interval_is_defined_and_ordered_at_and_below_zero():
    for cpk in (0.0, -0.4):
        low, high = cpk_interval(cpk, 30)
        assert low < cpk < high


def test_anderson_darling_statistic_is_scipys_and_the_pvalue_matches_its_tables():
    import warnings

    x = np.random.default_rng(3).normal(5.0, 0.2, 60)
    statistic, _ = anderson_darling_normal(x)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scipy >= 1.17 asks for a p-value method
        reference = stats.anderson(x, dist="norm")
    assert statistic == pytest.approx(reference.statistic, rel=1e-12)
    # at scipy's critical values (Stephens 1974) the p-value is the significance level
    for critical, level in zip(reference.critical_values, reference.significance_level):
        assert ad_pvalue(critical, x.size) == pytest.approx(level / 100, rel=0.05)


@pytest.mark.parametrize("shape", ["uniform", "triangular"])
def test_rejected_normality_suggests_the_shape_the_parts_came_from(shape):
    rng = np.random.default_rng(11)
    values = (rng.uniform(-0.02, 0.02, 300) if shape == "uniform"
              else rng.triangular(-0.03, 0.0, 0.03, 1500))
    case = load_case(GEARBOX)
    r = capability(case, {"spacer": 20.0 + values})["spacer"]
    assert r.normal_rejected and r.suggested == shape
    assert any("rejects the normal distribution" in w for w in r.warnings)


def test_normal_parts_are_not_flagged():
    case = load_case(GEARBOX)
    r = capability(case, {"spacer": 20.0 + np.random.default_rng(5).normal(0, 0.004, 200)})["spacer"]
    assert not r.normal_rejected and r.suggested is None


# --------------------------------------------------------------------------- warnings


def test_warnings_few_parts_parts_outside_and_a_constant_column():
    case = load_case(GEARBOX)  # spacer 20 ± 0.015; retaining_ring 1.5 ± 0.01
    study = capability(case, {"spacer": [20.0, 20.02, 19.99, 20.001, 19.998],
                              "retaining_ring": [1.5, 1.5, 1.5]})
    spacer, ring = study["spacer"], study["retaining_ring"]
    assert spacer.outside == 1
    text = " ".join(spacer.warnings)
    assert "only 5 parts" in text and "fewer than 30" in text and "1 of 5 parts outside" in text
    assert ring.std == 0 and math.isinf(ring.cp)
    assert any("every value is the same" in w for w in ring.warnings)
    # the constant column keeps the case's values in a written case
    assert study.apply().contributor("retaining_ring") == case.contributor("retaining_ring")


# --------------------------------------------------------------------------- the written case


def _reference_sigma_and_shift(case, data):
    """σ and mean-shift band of end_play by the contract formulas, from the raw data."""
    r = case.requirement("end_play")
    var, band = 0.0, 0.0
    for name, coeff in r.chain.items():
        c = case.contributor(name)
        if name in data:
            x = np.asarray(data[name], dtype=float)
            sigma, offset = x.std(ddof=1), abs(x.mean() - c.nominal)
        else:
            sigma = {"normal": c.tolerance / (3 * c.cp), "uniform": c.tolerance / math.sqrt(3),
                     "triangular": c.tolerance / math.sqrt(6)}[c.distribution]
            offset = c.mean_shift * c.tolerance
        var += c.count * (coeff * sigma) ** 2
        band += c.count * abs(coeff) * offset
    return math.sqrt(var), band


def _read_demo_columns():
    import csv

    lines = [ln for ln in MEASUREMENTS.read_text().splitlines() if ln and not ln.startswith("#")]
    rows = list(csv.reader(lines))
    return {name: [float(row[i]) for row in rows[1:] if row[i]] for i, name in enumerate(rows[0])}


def test_the_written_case_analyses_to_the_measured_spread():
    case = load_case(GEARBOX)
    data = _read_demo_columns()
    written = capability(case, MEASUREMENTS).apply()
    analysis = allocator.analyze(written).requirements[0]
    sigma, band = _reference_sigma_and_shift(case, data)
    assert analysis.sigma == pytest.approx(sigma, rel=1e-12)
    assert analysis.mean_shift == pytest.approx(band, rel=1e-12)
    # unmeasured contributors keep their values
    for name in ("bearing_width", "retaining_ring"):
        assert written.contributor(name) == case.contributor(name)


def test_conservative_writes_the_confidence_bounds():
    case = load_case(GEARBOX)
    data = _read_demo_columns()
    written = capability(case, MEASUREMENTS, confidence=0.9).apply(conservative=True)
    x = np.asarray(data["spacer"])
    n, s, c = x.size, x.std(ddof=1), case.contributor("spacer")
    cp_low = c.tolerance / (3 * s) * math.sqrt(stats.chi2.ppf(0.05, n - 1) / (n - 1))
    offset_high = abs(x.mean() - c.nominal) + stats.t.ppf(0.95, n - 1) * s / math.sqrt(n)
    assert written.contributor("spacer").cp == pytest.approx(cp_low, rel=1e-12)
    assert written.contributor("spacer").mean_shift == pytest.approx(offset_high / c.tolerance, rel=1e-12)


def test_a_mean_outside_the_band_cannot_be_written(tmp_path):
    path = tmp_path / "m.csv"
    path.write_text("spacer\n20.03\n20.031\n20.029\n")  # 20 ± 0.015: the mean is 0.03 off
    study = capability(load_case(GEARBOX), path)
    with pytest.raises(CaseError, match=r"column spacer: mean_shift 2 > 1"):
        study.apply()
    out = tmp_path / "out.toml"
    result = CliRunner().invoke(cli, ["capability", str(GEARBOX), str(path), "--write", str(out)])
    assert result.exit_code == 2 and not out.exists()


# --------------------------------------------------------------------------- bad input


BAD = {
    "unknown column": ("spacer,gaskit\n20.0,0.5\n20.01,0.51\n",
                       "row 1, column gaskit: 'gaskit' is not a contributor of the case (did you mean 'gasket'?)"),
    "text in a cell": ("spacer\n20.0\n20.01\ntwenty\n", "row 4, column spacer: 'twenty' is not a number"),
    "fewer than 2 values": ("spacer,gasket\n20.0,0.5\n20.01,\n", "column gasket: 1 value: a capability needs at least 2"),
    "duplicate column": ("spacer,spacer\n20.0,20.0\n20.01,20.0\n", "row 1, column spacer: appears twice"),
    "empty header cell": ("spacer,\n20.0,1\n20.01,2\n", "row 1: column 2 has no name"),
    "not finite": ("spacer\n20.0\nnan\n", "row 3, column spacer: must be a finite number"),
}


@pytest.mark.parametrize("key", sorted(BAD))
def test_bad_measurements_are_one_line_naming_file_row_and_column(tmp_path, key):
    text, expected = BAD[key]
    path = tmp_path / "m.csv"
    path.write_text(text)
    with pytest.raises(CaseError) as err:
        capability(load_case(GEARBOX), path)
    assert str(err.value).startswith(f"{path}: {expected}")
    out = tmp_path / "out.toml"
    result = CliRunner().invoke(cli, ["capability", str(GEARBOX), str(path), "--write", str(out)])
    assert result.exit_code == 2
    assert result.stderr.count("\n") == 1 and result.stderr.startswith(f"error: {path}: ")
    assert not out.exists()


def test_bad_options_exit_2(tmp_path):
    with pytest.raises(UsageError):
        capability(load_case(GEARBOX), MEASUREMENTS, confidence=1.5)
    runner = CliRunner()
    assert runner.invoke(cli, ["capability", str(GEARBOX), str(MEASUREMENTS), "--confidence", "0"]).exit_code == 2
    assert runner.invoke(cli, ["capability", str(GEARBOX), str(MEASUREMENTS), "--conservative"]).exit_code == 2
    case = tmp_path / "case.toml"
    case.write_bytes(GEARBOX.read_bytes())
    before = case.read_bytes()
    result = runner.invoke(cli, ["capability", str(case), str(MEASUREMENTS), "--write", str(case)])
    assert result.exit_code == 2 and "refusing to overwrite" in result.stderr
    assert case.read_bytes() == before


# --------------------------------------------------------------------------- command line


def test_cli_json_keeps_the_contract_keys_and_writes_a_case(tmp_path):
    out = tmp_path / "measured.toml"
    result = CliRunner().invoke(cli, ["capability", str(GEARBOX), str(MEASUREMENTS), "--json",
                                      "--write", str(out), "--conservative"])
    assert result.exit_code == 0, result.output
    doc = json.loads(result.stdout)
    keys = {"name", "n", "mean", "std", "cp", "cpk", "cp_ci_low", "cp_ci_high", "cpk_ci_low",
            "cpk_ci_high", "mean_shift"}
    assert [c["name"] for c in doc["contributors"]] == ["housing_depth", "spacer", "gasket", "cover_spigot"]
    assert all(keys <= set(c) for c in doc["contributors"])
    written = load_case(out)
    assert written.contributor("gasket").distribution == "normal"
    by_name = {c["name"]: c for c in doc["contributors"]}
    assert written.contributor("spacer").cp == pytest.approx(by_name["spacer"]["cp_ci_low"], rel=1e-12)
    assert allocator.allocate(written, model="mean-shift").status == "optimal"


def test_cli_table_shows_the_cautions():
    result = CliRunner().invoke(cli, ["capability", str(GEARBOX), str(MEASUREMENTS)])
    assert result.exit_code == 0
    assert "stable process" in result.stdout and "warning: gasket: only 24 parts" in result.stdout


def test_library_result_renders_as_a_table():
    study = allocator.capability(load_case(GEARBOX), MEASUREMENTS)
    frame = study.to_frame()
    assert list(frame.index) == ["housing_depth", "spacer", "gasket", "cover_spigot"]
    assert study.success and "<table" in study._repr_html_()


def test_data_files_are_read_with_limits_and_numbered_rows(tmp_path, monkeypatch):
    from allocator import datafile

    path = tmp_path / "m.csv"
    path.write_text("# invented\nspacer\n20.0\n\n20.01\n20.02\n")
    table = datafile.read_csv(path)
    assert table.header_row == 2 and [row for row, _ in table.rows] == [3, 5, 6]
    monkeypatch.setattr(datafile, "MAX_ROWS", 2)
    with pytest.raises(CaseError, match=r"row 6: more than 2 data rows"):
        datafile.read_csv(path)
    path.write_bytes(b"spacer\n20.0\n\xff\n")
    with pytest.raises(CaseError, match=r"row 3: not UTF-8 text"):
        datafile.read_csv(path)
    with pytest.raises(CaseError, match="file not found"):
        datafile.read_csv(tmp_path / "missing.csv")


def test_a_contributor_made_by_processes_gets_the_cp_on_the_process_making_its_tolerance():
    case = load_case(ROOT / "cases" / "pump_shim.toml")  # body_depth ±0.03: turning makes it cheapest
    x = 40.0 + 0.002 + 0.006 * np.random.default_rng(1).standard_normal(40)
    written = capability(case, {"body_depth": x}).apply()
    body = written.contributor("body_depth")
    cp = {p.name: p.cp for p in body.processes}
    assert cp["turning"] == pytest.approx(0.03 / (3 * x.std(ddof=1)), rel=1e-12)
    assert cp["grinding"] == 1.33 and cp["fine boring"] is None  # the others keep theirs
    # the analysis of the written case sees the measured σ: rss of the contract's σ's
    analysis = allocator.analyze(written).requirements[0]
    others = {"impeller_hub": 0.02 / 3, "shim": 0.01 / 3, "wear_plate": 0.03 / math.sqrt(6)}
    expected = math.sqrt(x.std(ddof=1) ** 2 + sum(s**2 for s in others.values()))
    assert analysis.sigma == pytest.approx(expected, rel=1e-12)


def test_a_written_case_keeps_its_unknowns_and_closure_equations(tmp_path):
    """The clutch's loop survives `capability --write`; the measured σ is the parts' own."""
    clutch = ROOT / "cases" / "roller_clutch.toml"
    case = load_case(clutch)
    rng = np.random.default_rng(20261202)  # invented parts
    parts = {"hub_flat": 27.645 + 0.001 + 0.0025 * rng.standard_normal(30),
             "roller_radius": 11.430 + 0.0012 * rng.standard_normal(30),
             "ring_radius": 50.800 - 0.002 + 0.003 * rng.standard_normal(30)}
    path = tmp_path / "clutch_parts.csv"
    path.write_text(",".join(parts) + "\n" + "".join(
        ",".join(repr(float(parts[n][i])) for n in parts) + "\n" for i in range(30)))
    out = tmp_path / "measured.toml"
    result = CliRunner().invoke(cli, ["capability", str(clutch), str(path), "--write", str(out)])
    assert result.exit_code == 0, result.output
    written = load_case(out)
    assert written.unknowns == case.unknowns and written.closures == case.closures
    assert written.requirements == case.requirements
    for name, x in parts.items():
        c = case.contributor(name)
        # Cp = (USL - LSL) / 6σ with σ the sample standard deviation (Montgomery, section 8.3)
        assert written.contributor(name).cp == pytest.approx(c.tolerance / (3 * x.std(ddof=1)), rel=1e-12)
        assert written.contributor(name).mean_shift == pytest.approx(abs(x.mean() - c.nominal) / c.tolerance,
                                                                     rel=1e-12)
    # the loop still closes where the clutch's closed form puts it (docs/closure.md):
    # cos(phi) = (hub_flat + roller_radius) / (ring_radius - roller_radius)
    a, c, e = (case.contributor(n).nominal for n in ("hub_flat", "roller_radius", "ring_radius"))
    assert written.loop.values[0] == pytest.approx(math.acos((a + c) / (e - c)), rel=1e-12)
