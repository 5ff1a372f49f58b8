"""Reciprocal and reciprocal-power cost curves: ``a + b/t`` and ``a + b/t^k``.

References
----------
.. [1] K. W. Chase, W. H. Greenwood, B. G. Loosli and L. F. Hauglund, "Least cost
   tolerance allocation for mechanical assemblies with automated process selection",
   Manufacturing Review 3(1):49-59, 1990 (reciprocal).
.. [2] G. H. Sutherland and B. Roth, "Mechanism design: accounting for manufacturing
   tolerances and costs in function generating problems", Journal of Engineering for
   Industry 97(1):283-286, 1975 (reciprocal-power).
.. [3] M. F. Spotts, "Allocation of tolerances to minimize cost of assembly", Journal of
   Engineering for Industry 95(3):762-764, 1973 (k = 2).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from .family import Parameter, SmoothFamily

__all__ = ["ReciprocalPower", "Reciprocal"]

A = Parameter("a", 0.0, strict=False, default=0.0, meaning="fixed cost [currency]")
B = Parameter("b", meaning="cost of precision [currency·length^k]")
K = Parameter("k", meaning="exponent [-]")


class ReciprocalPower(SmoothFamily):
    """``C(t) = a + b/t^k`` (a >= 0, b > 0, k > 0).

    .. math::

        C' = -k b t^{-k-1},\\quad C'' = k(k+1) b t^{-k-2},\\quad
        C'^{-1}(-s) = (k b / s)^{1/(k+1)},\\quad
        \\arg\\min_t C(t) + q t^2/2 = (k b / q)^{1/(k+2)}
    """

    name = "reciprocal-power"
    formula = "a + b/t^k"
    parameters = (A, B, K)
    case_keys = ("a", "b", "k")

    def scaled(self, curve, length, cost):
        k = self.one(curve)["k"]
        return replace(curve, a=curve.a / cost, b=curve.b / (cost * length**k))

    def value(self, p, t):
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            return np.where(t > 0, p["a"] + p["b"] * t ** (-p["k"]), np.nan)

    def derivative(self, p, t):
        return -p["k"] * p["b"] * t ** (-p["k"] - 1.0)

    def curvature(self, p, t):
        return p["k"] * (p["k"] + 1.0) * p["b"] * t ** (-p["k"] - 2.0)

    def slope_root(self, p, s):
        return (p["k"] * p["b"] / s) ** (1.0 / (p["k"] + 1.0))

    def quadratic_root(self, p, q):
        return (p["k"] * p["b"] / q) ** (1.0 / (p["k"] + 2.0))

    def cvx_key(self, curve):
        return (self.name, float(curve.k))

    def cvx(self, curves, t, weight):
        import cvxpy as cp

        p = self.params(curves)
        k = float(p["k"][0])  # one exponent per group (cvxpy's power takes a scalar)
        term = cp.sum(cp.multiply(weight * p["b"], cp.power(t, -k, approx=False)))
        return float(weight @ p["a"]), term


class Reciprocal(ReciprocalPower):
    """``C(t) = a + b/t`` (a >= 0, b > 0): the reciprocal-power curve with ``k = 1``."""

    name = "reciprocal"
    formula = "a + b/t"
    parameters = (A, B)
    case_keys = ("a", "b")

    def params(self, curves):
        p = super().params(curves)
        p["k"] = np.ones(len(curves))
        return p

    def one(self, curve):
        return {**super().one(curve), "k": 1.0}

    def cvx_key(self, curve):
        return (self.name,)

    def cvx(self, curves, t, weight):
        import cvxpy as cp

        p = self.params(curves)
        term = cp.sum(cp.multiply(weight * p["b"], cp.inv_pos(t)))
        return float(weight @ p["a"]), term
