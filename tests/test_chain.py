"""Expressions: whitelist, exact sensitivities against analytic derivatives."""

import math

import numpy as np
import pytest

from allocator.chain import ExpressionError, compile_expression, linearise, evaluate_response
from allocator.model import Requirement
from helpers import contributor, make_case


def divider_case():
    cs = [
        contributor("v_ref", nominal=5.0, tolerance=0.01, limits=(0.001, 0.05)),
        contributor("r1", nominal=10_000.0, tolerance=100.0, limits=(10.0, 500.0)),
        contributor("r2", nominal=4_700.0, tolerance=47.0, limits=(4.7, 235.0)),
    ]
    req = Requirement(name="v_out", expression="v_ref * r2 / (r1 + r2)", lower=1.5, upper=1.7)
    return make_case(cs, [req])


def test_divider_sensitivities_match_analytic_derivatives():
    # V = Vref·R2/(R1+R2): ∂V/∂Vref = R2/(R1+R2), ∂V/∂R1 = −Vref·R2/(R1+R2)², ∂V/∂R2 = Vref·R1/(R1+R2)²
    case = divider_case()
    lin = linearise(case, case.requirements[0])
    v, r1, r2 = 5.0, 10_000.0, 4_700.0
    assert lin.nominal == pytest.approx(v * r2 / (r1 + r2), rel=1e-15)
    expected = [r2 / (r1 + r2), -v * r2 / (r1 + r2) ** 2, v * r1 / (r1 + r2) ** 2]
    np.testing.assert_allclose(lin.sensitivity, expected, rtol=1e-13)
    assert not lin.linear


@pytest.mark.parametrize(
    "text, x, dydx",
    [
        # analytic derivatives of elementary functions at x = 0.3
        ("sqrt(x)", 0.3, 0.5 / math.sqrt(0.3)),
        ("exp(2*x)", 0.3, 2 * math.exp(0.6)),
        ("log(x)", 0.3, 1 / 0.3),
        ("sin(x) * cos(x)", 0.3, math.cos(0.6)),
        ("tan(x)", 0.3, 1 / math.cos(0.3) ** 2),
        ("asin(x)", 0.3, 1 / math.sqrt(1 - 0.09)),
        ("acos(x)", 0.3, -1 / math.sqrt(1 - 0.09)),
        ("atan(x)", 0.3, 1 / 1.09),
        ("atan2(x, 2)", 0.3, 2 / (4 + 0.09)),
        ("atan2(1, x)", 0.3, -1 / (0.09 + 1)),
        ("x ** 3 - 1 / x", 0.3, 3 * 0.09 + 1 / 0.09),
        ("pi * x", 0.3, math.pi),
    ],
)
def test_single_variable_derivatives(text, x, dydx):
    case = make_case([contributor("x", nominal=x, tolerance=0.01, limits=(0.001, 0.1))], [Requirement(name="y", expression=text, upper=100.0)])
    lin = linearise(case, case.requirements[0])
    assert lin.sensitivity[0] == pytest.approx(dydx, rel=1e-12)


def test_count_means_sum_of_instances():
    # two shims of 1.5: the name stands for their sum (3.0) in the chain and in expressions
    cs = [contributor("shim", nominal=1.5, count=2), contributor("bore", nominal=5.0)]
    case = make_case(
        cs,
        [
            Requirement(name="gap", chain={"bore": 1, "shim": -1}, lower=0.0),
            Requirement(name="gap_expr", expression="bore - shim", lower=0.0),
        ],
    )
    a, b = (linearise(case, r) for r in case.requirements)
    assert a.nominal == pytest.approx(2.0) and b.nominal == pytest.approx(2.0)
    np.testing.assert_allclose(a.sensitivity, b.sensitivity)


def test_evaluate_response_is_exact_not_linearised():
    case = divider_case()
    values = {"v_ref": np.array([5.0, 5.1]), "r1": np.array([10_000.0, 9_000.0]), "r2": np.array([4_700.0, 5_000.0])}
    y = evaluate_response(case, case.requirements[0], values)
    np.testing.assert_allclose(y, values["v_ref"] * values["r2"] / (values["r1"] + values["r2"]), rtol=1e-15)


@pytest.mark.parametrize(
    "text, fragment",
    [
        ("__import__('os')", "not allowed"),
        ("x.real", "attribute"),
        ("(lambda: 1)()", "not allowed"),
        ("[a for a in b]", "comprehension"),
        ("9**9**9", "exponent"),
        ("x ** (2 ** 10)", "exponent"),
        ("-" * 500 + "x", "nested"),
        ("open('f')", "not allowed"),
        ("x if x else 1", "not allowed"),
        ("True + x", "not allowed"),
        ("'a' + x", "not allowed"),
        ("sqrt(x, 2)", "takes 1 argument"),
        ("sqrt", "must be called"),
        ("y + 1", "unknown name"),
        ("x[0]", "indexing"),
        ("x < 1", "comparison"),
        ("", "empty"),
        ("x +", "not valid"),
        ("x" * 20_000, "longer than"),
    ],
)
def test_unsafe_or_bad_expressions_are_refused(text, fragment):
    with pytest.raises(ExpressionError, match=fragment):
        compile_expression(text, ["x"])


def test_long_legitimate_sum_is_accepted():
    names = [f"x{i}" for i in range(150)]
    expr = compile_expression(" + ".join(names), names)
    assert expr.evaluate({n: 1.0 for n in names}) == 150.0
