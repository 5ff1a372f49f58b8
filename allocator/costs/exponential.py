"""Exponential cost curve ``a + b·exp(−c·t)``.

References
----------
.. [1] F. H. Speckhart, "Calculation of tolerance based on a minimum cost approach",
   Journal of Engineering for Industry 94(2):447-453, 1972.
"""

from __future__ import annotations

import math
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
        return lambert_w0(p["b"] * p["c"] ** 2 / q) / p["c"]

    def cvx(self, curves, t, weight):
        import cvxpy as cp

        p = self.params(curves)
        term = cp.sum(cp.multiply(weight * p["b"], cp.exp(cp.multiply(-p["c"], t))))
        return float(weight @ p["a"]), term


SMALL = 8  # up to this many values, Python floats: numpy's per-call cost is most of the time


def _w0(x: float) -> float:
    """:func:`lambert_w0` of one float: the same start and Newton steps, in Python floats."""
    if not (x > 0 and math.isfinite(x)):
        return math.inf if x > 0 else 0.0
    log_x = math.log(x)
    w = log_x - math.log(log_x) if x > math.e else math.log1p(x)
    close = False
    for _ in range(60):
        new = max(w - (w + math.log(w) - log_x) * w / (w + 1.0), 0.1 * w)
        change = abs(new - w) <= 1e-9 * abs(new)
        w = new
        if close:
            break
        close = change
    return w


def lambert_w0(x):
    """Principal branch ``W₀(x)`` of the Lambert W function for ``x ≥ 0`` (``w e^w = x``).

    Newton's method on ``w + ln w = ln x`` (no overflow for any finite ``x``), from
    ``ln(1 + x)`` below ``e`` and ``ln x − ln ln x`` above, until one step after every
    change is below 1e-9 (quadratic convergence: round-off then); vectorised. Our
    own few lines instead of ``scipy.special.lambertw``, whose import costs more than a
    whole allocation (the tests compare the two). ``x = inf`` gives inf, ``x = 0`` gives 0.
    Up to :data:`SMALL` values are taken one by one in Python floats (:func:`_w0`, the
    same steps): a bound of the branch and bound asks for one or two at a time.
    """
    x = np.asarray(x, dtype=float)
    if x.size <= SMALL:  # a few parts (a branch and bound's bound, one root): element by element
        w = np.array([_w0(float(v)) for v in x.flat]).reshape(x.shape)
        return w if w.ndim else float(w)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        log_x = np.log(x)
        big = x > math.e
        w = np.where(big, log_x - np.log(np.where(big, log_x, 1.0)), np.log1p(x))
        ok = (x > 0) & np.isfinite(x)
        w = np.where(ok, w, np.where(x > 0, np.inf, 0.0))
        close = False
        for _ in range(60):
            g = np.where(ok, w + np.log(w) - log_x, 0.0)
            step = g * w / (w + 1.0)
            new = np.where(ok, np.maximum(w - step, 0.1 * w), w)
            change = np.abs(new - w) <= 1e-9 * np.abs(new)
            w = new
            if close:
                break  # one step after a change of 1e-9: quadratic convergence, round-off
            close = bool(np.all(change))
    return w if w.ndim else float(w)
