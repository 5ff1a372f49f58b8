"""The cost curve as data: a family name and its parameters.

It lives beside the registry (not in :mod:`allocator.model`) because its ``value`` and
``derivative`` ask the registry; :mod:`allocator.model` re-exports it, so the dependency
runs one way only (model -> costs), and inside the package curve -> registry -> families.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from .family import as_float_or_array
from .registry import family_of

__all__ = ["CostCurve"]


@dataclass(frozen=True)
class CostCurve:
    """Unit cost of one part as a function of its ± tolerance.

    ``curve`` is one of :data:`allocator.costs.CURVES`. Parameters not used by a curve keep
    their defaults. For ``table``, ``points_tolerance`` is strictly increasing and
    ``points_cost`` holds the cost at each point; ``between`` is ``"interpolate"``
    (piecewise linear) or ``"choose"`` (only the listed tolerances exist).
    The arithmetic lives in the curve's family (:mod:`allocator.costs.registry`).
    """

    curve: str
    a: float = 0.0
    b: float = 0.0
    c: float = 0.0
    k: float = 1.0
    points_tolerance: tuple[float, ...] = ()
    points_cost: tuple[float, ...] = ()
    between: str = "interpolate"

    @property
    def is_discrete(self) -> bool:
        """True when only listed tolerances exist (a ``choose`` table)."""
        return self.curve == "table" and self.between == "choose"

    def value(self, tolerance: ArrayLike) -> float | np.ndarray:
        """Cost at ``tolerance`` (scalar or array) [currency]; see
        :func:`allocator.costs.cost_value`."""
        return as_float_or_array(family_of(self).value_at(self, np.asarray(tolerance, dtype=float)))

    def derivative(self, tolerance: ArrayLike) -> float | np.ndarray:
        """d cost / d tolerance [currency/length]; see :func:`allocator.costs.cost_derivative`."""
        return as_float_or_array(family_of(self).derivative_at(self, np.asarray(tolerance, dtype=float)))
