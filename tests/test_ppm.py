"""How fallout is printed: plain decimals in ppm, ppb below 0.01 ppm, a floor at 0.001 ppb.

The boundaries are the ones docs/methods.md (*How fallout is printed*) states; the ppb
values are checked against the definition 1 ppm = 1000 ppb (parts per 10⁶ against parts
per 10⁹), computed here independently of the function.
"""

from __future__ import annotations

import math
import re

import pytest

from allocator.ppm import FLOOR_PPB, PPB_BELOW, format_ppm


@pytest.mark.parametrize(
    "value, text",
    [
        (0.01, "0.01 ppm"),  # the boundary itself stays in ppm
        (0.0099999, "10 ppb"),  # just below: ppb (rounded to 4 digits)
        (0.009999, "9.999 ppb"),
        (1e-6, "0.001 ppb"),  # the floor itself is printed
        (9.99e-7, "< 0.001 ppb"),  # below the floor
        (7.098e-07, "< 0.001 ppb"),  # the value a user saw as "7.098e-07 ppm"
        (0.0221, "0.0221 ppm"),
        (100.0, "100 ppm"),
        (2325.37, "2325 ppm"),
        (123456.7, "123457 ppm"),  # large values: no exponent either
        (0.0, "0 ppm"),
    ],
)
def test_boundaries_and_plain_notation(value, text):
    assert format_ppm(value) == text


def test_constants_are_the_documented_boundaries():
    assert PPB_BELOW == 0.01 and FLOOR_PPB == 0.001


@pytest.mark.parametrize("exponent", [x / 4 for x in range(-28, 25)])
def test_never_an_exponent_and_ppb_is_ppm_times_1000(exponent):
    value = 10.0**exponent
    text = format_ppm(value)
    assert not re.search(r"\d[eE][-+]?\d", text), text
    number, unit = text.removeprefix("< ").split(" ")
    if value >= 0.01:
        assert unit == "ppm" and float(number) == pytest.approx(value, rel=1e-3)
    elif value * 1000 >= 0.001:
        assert unit == "ppb" and float(number) == pytest.approx(value * 1000, rel=1e-3)
    else:
        assert text == "< 0.001 ppb"


def test_table_cells_carry_a_unit_only_when_it_differs_from_the_header():
    assert format_ppm(100.0, unit=False) == "100"
    assert format_ppm(0.005, unit=False) == "5 ppb"
    assert format_ppm(None) == "-" and format_ppm(None, missing="—") == "—"
    assert format_ppm(math.nan) == "-"
    assert format_ppm(math.inf) == "inf ppm"


def test_conversion_is_parts_per_million_both_ways():
    # definition of ppm: one part in 10⁶; the two-sided normal tail beyond ±3σ is 2700 ppm
    # to 2 significant figures (scipy.stats.norm, an independent reference)
    from scipy import stats

    from allocator.ppm import PER_MILLION, fraction_to_ppm, ppm_to_fraction

    assert PER_MILLION == 10**6
    assert fraction_to_ppm(1 / 10**6) == pytest.approx(1.0, rel=1e-15)
    assert ppm_to_fraction(1.0) == pytest.approx(1 / 10**6, rel=1e-15)
    tail = 2 * stats.norm.sf(3.0)
    assert round(fraction_to_ppm(tail), -2) == 2700.0
    assert ppm_to_fraction(fraction_to_ppm(tail)) == pytest.approx(tail, rel=1e-15)


def _ppm_conversions_outside_ppm_module() -> list[str]:
    """Places in the package that convert ppm by a bare 1e6 / 1e-6 factor."""
    import ast
    from pathlib import Path

    package = Path(__file__).resolve().parent.parent / "allocator"
    found = []
    for path in sorted(package.rglob("*.py")):
        if path.name == "ppm.py":
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if not (isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Mult, ast.Div))):
                continue
            sides = (node.left, node.right)
            numbers = [s.value for s in sides if isinstance(s, ast.Constant) and isinstance(s.value, (int, float))]
            text = ast.unparse(node).lower()
            # 1e6 only ever converts ppm; 1e-6 is also a relative tolerance, so it counts
            # only beside a fallout or a ppm quantity
            if 1e6 in numbers or (1e-6 in numbers and ("ppm" in text or "fallout" in text)):
                found.append(f"{path.relative_to(package.parent)}:{node.lineno}: {ast.unparse(node)}")
    return found


def test_ppm_conversions_use_the_one_conversion():
    # one name per concept: a fraction becomes ppm through allocator.ppm, nowhere else
    assert _ppm_conversions_outside_ppm_module() == []
