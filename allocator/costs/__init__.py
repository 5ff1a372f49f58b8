"""Cost-versus-tolerance curves: value, slope, inverse slope and convex-solver form.

One family per published model, each one object in :mod:`allocator.costs.registry` that
holds its parameters and checks, value, slope, curvature, inverse slope, per-part
minimisers, scaling and convex-solver form side by side (:mod:`allocator.costs.family`).
Every family is convex and decreasing in the ± tolerance ``t`` on ``t > 0`` (tables: when
:func:`table_is_convex_decreasing` holds), which is what makes the least-cost allocation
a convex problem.

==================== ================================ ==========================================
curve                cost(t) [currency]               source
==================== ================================ ==========================================
``reciprocal``       ``a + b/t``                      Chase, Greenwood, Loosli & Hauglund (1990)
``reciprocal-power`` ``a + b/t**k``                   Sutherland & Roth (1975); k = 2: Spotts (1973)
``exponential``      ``a + b*exp(-c*t)``              Speckhart (1972)
``table``            piecewise linear through points  measured shop data
==================== ================================ ==========================================

The functions below take one :class:`CostCurve` and dispatch to its family; the solvers
use the families' vectorised methods directly (:class:`allocator.solve.problem.CurveSet`).
This package imports nothing else of allocator (``allocator.model`` imports from it).
cvxpy is imported lazily, inside the functions that build solver expressions.
"""

from __future__ import annotations

from .curve import CostCurve
from .evaluate import (
    check_curve,
    cost_derivative,
    cost_value,
    cvx_cost,
    cvx_costs,
    inverse_derivative,
    table_is_convex_decreasing,
)
from .family import CurveFamily, Parameter, SmoothFamily
from .registry import CURVES, FAMILIES, family, family_of
from .table import table_problem

__all__ = [
    "CostCurve",
    "CURVES",
    "FAMILIES",
    "CurveFamily",
    "SmoothFamily",
    "Parameter",
    "family",
    "family_of",
    "cost_value",
    "cost_derivative",
    "inverse_derivative",
    "table_is_convex_decreasing",
    "table_problem",
    "check_curve",
    "cvx_cost",
    "cvx_costs",
]
