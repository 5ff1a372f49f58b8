"""Exponential cost curve ``a + b·exp(−c·t)``.

References
----------
.. [1] F. H. Speckhart, "Calculation of tolerance based on a minimum cost approach",
   Journal of Engineering for Industry 94(2):447-453, 1972.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
from .family import Parameter, SmoothFamily
from .power import A, B

__all__ = ["Exponential"]


class Exponential(SmoothFamily):
    """``C(t) = a + b e^{-ct}`` (a >= 0, b > 0, c > 0).

    .. math::

        C' = -b c e^{-ct},\\quad C'' = b c^2 e^{-ct},\\quad
        C'^{-1}(-s) = \\ln(b c / s) / c,\\quad
        \\arg\\min_t C(t) + q t^2/2 = W_0(b c^2 / q) / c

    (:math:`W_0`: the principal branch of Lambert's W.)
    """

    name = "exponential"
    formula = "a + b·exp(−c·t)"
    parameters = (A, B, Parameter("c", meaning="decay rate [1/length]"))
    case_keys = ("a", "b", "c")

    def scaled(self, curve, length, cost):
        return replace(curve, a=curve.a / cost, b=curve.b / cost, c=curve.c * length)

    def value(self, p, t):
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            return np.where(t > 0, p["a"] + p["b"] * np.exp(-p["c"] * t), np.nan)

    def derivative(self, p, t):
        return -p["b"] * p["c"] * np.exp(-p["c"] * t)

    def curvature(self, p, t):
        return p["b"] * p["c"] ** 2 * np.exp(-p["c"] * t)

    def slope_root(self, p, s):
        return np.log(p["b"] * p["c"] / s) / p["c"]

    def quadratic_root(self, p, q):
        from scipy import special  # only the mean-shift and rss duals need Lambert W

        return special.lambertw(p["b"] * p["c"] ** 2 / q).real / p["c"]

    def cvx(self, curves, t, weight):
        import cvxpy as cp

        p = self.params(curves)
        term = cp.sum(cp.multiply(weight * p["b"], cp.exp(cp.multiply(-p["c"], t))))
        return float(weight @ p["a"]), term
