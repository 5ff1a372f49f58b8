"""The registry of cost-curve families: the one place that lists them.

Everything that depends on a curve's family (the case-file schema, the checks, the
arithmetic, the solvers' vectorised forms, the report's formula text) looks the family
up here by its name. Adding a family is one :class:`~allocator.costs.family.CurveFamily`
subclass and one line below.
"""

from __future__ import annotations

from .exponential import Exponential
from .family import CurveFamily, CurveSpec
from .power import Reciprocal, ReciprocalPower
from .table import Table

__all__ = ["FAMILIES", "CURVES", "family", "family_of"]

FAMILIES: dict[str, CurveFamily] = {
    f.name: f for f in (Reciprocal(), ReciprocalPower(), Exponential(), Table())
}
CURVES: tuple[str, ...] = tuple(FAMILIES)


def family(name: str) -> CurveFamily:
    """The family called ``name``; ValueError naming the known ones otherwise.

    Examples
    --------
    >>> family("reciprocal").formula
    'a + b/t'
    """
    try:
        return FAMILIES[name]
    except (KeyError, TypeError):
        raise ValueError(
            f"unknown cost curve {name!r} (expected one of {', '.join(CURVES)})"
        ) from None


def family_of(curve: CurveSpec) -> CurveFamily:
    """The family of a :class:`~allocator.costs.curve.CostCurve`."""
    return family(curve.curve)
