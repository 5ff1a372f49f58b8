"""Units labels per contributor and per requirement (docs/case-file.md, "Units labels").

Every command must show each quantity with the label of what it measures (a load in N,
a spring rate in N/mm, lengths in mm), and a label must never change a number: the same
case without its labels gives the same analysis, allocation, frontier and verification.

Invented test case, not real product data: a seal pressed by a spring,
``seal_load = spring_rate · (free_length − cavity_depth)``, and a gap between the cavity
and a body, both lengths in mm.
"""

from __future__ import annotations

import csv
import io
import json

import numpy as np
import pytest
from click.testing import CliRunner

from allocator.analysis import analyze
from allocator.case import loads_case
from allocator.cli.main import cli
from allocator.report import fmt_tolerance
from allocator.simulate import verify
from allocator.solve import allocate
from allocator.sweep import frontier

SEAL = """\
# Invented test case, not real product data.
title = "Invented seal load"
units = "mm"
currency = "EUR"

[[contributor]]
name = "spring_rate"
units = "N/mm"
nominal = 20.0
tolerance = 1.0
limits = [0.2, 2.0]
cost = { curve = "reciprocal", a = 0.5, b = 0.4 }

[[contributor]]
name = "free_length"
nominal = 12.0
tolerance = 0.1
limits = [0.02, 0.3]
cost = { curve = "reciprocal", a = 0.2, b = 0.01 }

[[contributor]]
name = "cavity_depth"
nominal = 10.0
tolerance = 0.05
limits = [0.01, 0.2]
cost = { curve = "reciprocal", a = 1.0, b = 0.02 }

[[contributor]]
name = "body"
nominal = 9.5
tolerance = 0.05
limits = [0.01, 0.2]
cost = { curve = "reciprocal", a = 1.0, b = 0.02 }

[[requirement]]
name = "seal_load"
units = "N"
expression = "spring_rate * (free_length - cavity_depth)"
lower = 34.0
upper = 46.0

[[requirement]]
name = "gap"
chain = { cavity_depth = 1, body = -1 }
lower = 0.3
upper = 0.7

[allocation]
models = ["worst-case", "rss"]
"""
PLAIN = SEAL.replace('units = "N/mm"\n', "").replace('units = "N"\n', "")
MODELS = ("worst-case", "rss")


@pytest.fixture(scope="module")
def seal_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("units") / "seal.toml"
    path.write_text(SEAL, encoding="utf-8")
    return path


def _run(*args):
    result = CliRunner().invoke(cli, [str(a) for a in args])
    assert result.exit_code == 0, result.output
    return result.stdout


def test_plain_copy_has_no_own_labels():
    case = loads_case(PLAIN)
    assert all(c.units is None for c in case.contributors)
    assert all(r.units is None for r in case.requirements)


def test_seal_load_analysis_matches_the_hand_linearisation():
    # closed form, first-order Taylor expansion of F = k (L - D) at k = 20, L = 12, D = 10:
    # F = 40 N; dF/dk = L - D = 2 mm, dF/dL = k = 20 N/mm, dF/dD = -k = -20 N/mm;
    # worst case ±(2·1 + 20·0.1 + 20·0.05) = ±5 N; σ = sqrt((2/3)² + (2/3)² + (1/3)²) = 1 N
    case = loads_case(SEAL)
    load = analyze(case).requirements[0]
    assert load.units == "N"
    assert load.nominal == pytest.approx(40.0, rel=1e-12)
    assert (load.worst_case_min, load.worst_case_max) == pytest.approx((35.0, 45.0), rel=1e-12)
    assert load.sigma == pytest.approx(1.0, rel=1e-12)
    by_name = {c.name: c for c in load.contributions}
    assert by_name["spring_rate"].sensitivity == pytest.approx(2.0, rel=1e-12)
    assert by_name["free_length"].sensitivity == pytest.approx(20.0, rel=1e-12)
    assert by_name["cavity_depth"].sensitivity == pytest.approx(-20.0, rel=1e-12)
    assert (by_name["spring_rate"].units, by_name["spring_rate"].sensitivity_units) == ("N/mm", "mm")
    assert (by_name["free_length"].units, by_name["free_length"].sensitivity_units) == ("mm", "N/mm")


def test_labels_do_not_change_any_number():
    labelled, plain = loads_case(SEAL), loads_case(PLAIN)
    numbers = ("nominal", "worst_case_min", "worst_case_max", "sigma", "fallout_ppm", "mean_shift_ppm")
    for ra, rb in zip(analyze(labelled).requirements, analyze(plain).requirements):
        assert [getattr(ra, k) for k in numbers] == [getattr(rb, k) for k in numbers]
    for model in MODELS:
        a, b = allocate(labelled, model), allocate(plain, model)
        assert a.success and b.success
        assert a.total_cost == b.total_cost
        assert np.array_equal(a.allocated_array(), b.allocated_array())
        for ra, rb in zip(a.requirements, b.requirements):
            assert (ra.shadow_lower, ra.shadow_upper, ra.sigma) == (rb.shadow_lower, rb.shadow_upper, rb.sigma)
    fa = frontier(labelled, requirement="seal_load", span=(40.0, 52.0), points=3, models=MODELS)
    fb = frontier(plain, requirement="seal_load", span=(40.0, 52.0), points=3, models=MODELS)
    assert fa.costs == fb.costs and (fa.units, fb.units) == ("N", "mm")
    va = verify(labelled, samples=2000, seed=4)
    vb = verify(plain, samples=2000, seed=4)
    assert [c.fallout_ppm for c in va.requirements] == [c.fallout_ppm for c in vb.requirements]
    assert [c.mean for c in va.requirements] == [c.mean for c in vb.requirements]


def test_analyze_labels(seal_file):
    text = _run("analyze", seal_file)
    assert "requirement seal_load [N]: limits [34, 46]" in text
    assert "requirement gap [mm]: limits [0.3, 0.7]" in text
    assert "± worst case [N]" in text and "± worst case [mm]" in text
    spring = next(line for line in text.splitlines() if line.startswith("spring_rate"))
    assert "1 N/mm" in spring and "2 mm" in spring  # tolerance, then sensitivity N per N/mm
    free = next(line for line in text.splitlines() if line.startswith("free_length"))
    assert "20 N/mm" in free and "0.1 mm" in free

    doc = json.loads(_run("analyze", seal_file, "--json"))
    load, gap = doc["requirements"]
    assert {"name", "nominal", "worst_case_min", "worst_case_max", "sigma", "fallout_ppm"} <= set(load)
    assert (load["units"], gap["units"]) == ("N", "mm")
    assert {c["name"]: (c["units"], c["sensitivity_units"]) for c in load["contributors"]} == {
        "spring_rate": ("N/mm", "mm"), "free_length": ("mm", "N/mm"), "cavity_depth": ("mm", "N/mm"),
    }

    rows = list(csv.DictReader(io.StringIO(_run("analyze", seal_file, "--csv"))))
    spring = next(r for r in rows if r["name"] == "spring_rate")
    assert (spring["units"], spring["sensitivity_units"], spring["requirement_units"]) == ("N/mm", "mm", "N")
    assert {r["requirement_units"] for r in rows if r["requirement"] == "gap"} == {"mm"}


def test_allocate_labels(seal_file):
    text = _run("allocate", seal_file)
    assert "requirement seal_load [N]: limits [34, 46]" in text
    assert "EUR/N per lower" in text and "EUR/N per upper" in text  # shadow price per N of load
    assert "EUR/mm per lower" in text  # and per mm of gap
    spring = next(line for line in text.splitlines() if line.startswith("spring_rate"))
    assert spring.count("N/mm") == 2  # current and allocated
    assert "current [mm]" not in text  # the columns mix N/mm and mm: no single header label

    doc = json.loads(_run("allocate", seal_file, "--json"))
    for entry in doc["results"]:
        assert {"model", "status", "total_cost", "tolerances"} <= set(entry)
        assert {r["contributor"]: r["units"] for r in entry["contributors"]} == {
            "spring_rate": "N/mm", "free_length": "mm", "cavity_depth": "mm", "body": "mm",
        }
        assert [r["units"] for r in entry["requirements"]] == ["N", "mm"]

    rows = list(csv.DictReader(io.StringIO(_run("allocate", seal_file, "--csv"))))
    assert {(r["contributor"], r["units"]) for r in rows} == {
        ("spring_rate", "N/mm"), ("free_length", "mm"), ("cavity_depth", "mm"), ("body", "mm"),
    }


def test_frontier_labels(seal_file, tmp_path):
    plot = tmp_path / "front.svg"
    args = ("frontier", seal_file, "--requirement", "seal_load", "--range", 40, 52, "--points", 3)
    text = _run(*args, "--plot", plot)
    assert "upper [N]" in text and "current design: upper 46 N" in text
    assert "upper limit of seal_load [N]" in plot.read_text(encoding="utf-8")
    assert json.loads(_run(*args, "--json"))["units"] == "N"
    rows = list(csv.DictReader(io.StringIO(_run(*args, "--csv"))))
    assert {r["value_units"] for r in rows} == {"N"}
    gap = json.loads(_run("frontier", seal_file, "--requirement", "gap", "--range", 0.6, 0.8,
                          "--points", 2, "--json"))
    assert gap["units"] == "mm"


def test_verify_labels(seal_file, tmp_path):
    plot = tmp_path / "mc.svg"
    text = _run("verify", seal_file, "--samples", 2000, "--seed", 1, "--plot", plot)
    assert "[34, 46] N" in text and "[0.3, 0.7] mm" in text
    svg = plot.read_text(encoding="utf-8")
    assert "seal_load [N]" in svg and "gap [mm]" in svg  # histogram axes
    doc = json.loads(_run("verify", seal_file, "--samples", 2000, "--seed", 1, "--json"))
    assert [r["units"] for r in doc["requirements"]] == ["N", "mm"]


def test_report_labels(seal_file, tmp_path):
    out = tmp_path / "seal.html"
    result = CliRunner().invoke(cli, ["report", str(seal_file), "-o", str(out), "--samples", "1000",
                                      "--seed", "2", "--frontier-points", "3"])
    assert result.exit_code in (0, 1), result.output
    html = out.read_text(encoding="utf-8")
    assert "in their own units: spring_rate [N/mm], seal_load [N]" in html  # summary
    assert "34&nbsp;N" in html and "0.3&nbsp;mm" in html  # limits of each requirement
    assert "20&nbsp;N/mm" in html  # nominal rate, and the load's sensitivity to a length
    assert "Upper limit [N]" in html  # frontier table: the swept requirement's units
    assert "EUR/N" in html and "EUR/mm" in html  # shadow prices per unit of each limit
    assert "Lower limit [mm]" not in html and "Current ± [mm]" not in html  # no false shared label
    for model in MODELS:  # every allocated rate, with its label after it
        t = allocate(loads_case(SEAL), model).tolerances["spring_rate"]
        assert f"{fmt_tolerance(t)}&nbsp;N/mm" in html


def test_a_label_is_plain_text_in_plots_never_mathtext():
    # '$\bad{$' would be a mathtext parse error if a plot read the label as math
    case = loads_case(SEAL.replace('units = "N"\n', 'units = "$\\\\bad{$"\n'))
    assert case.requirement_units("seal_load") == "$\\bad{$"
    from allocator.plots import render_frontier_plot
    from allocator.simulate import render_verification_plot

    front = frontier(case, requirement="seal_load", span=(40.0, 52.0), points=2, models=("rss",))
    assert b"$\\bad{$" in render_frontier_plot(front, "svg")
    assert b"bad{" in render_verification_plot(verify(case, samples=1000, seed=1), "svg")
