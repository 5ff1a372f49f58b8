"""The cost curve as data: a family name and its parameters.

It lives beside the registry (not in :mod:`allocator.model`) because its ``value`` and
``derivative`` ask the registry; :mod:`allocator.model` re-exports it, so the dependency
runs one way only (model -> costs).
"""

from __future__ import annotations

from dataclasses import dataclass

from .evaluate import cost_derivative, cost_value

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

    def value(self, tolerance):
        """Cost at ``tolerance`` (scalar or array) [currency]."""
        return cost_value(self, tolerance)

    def derivative(self, tolerance):
        """d cost / d tolerance [currency/length]."""
        return cost_derivative(self, tolerance)
