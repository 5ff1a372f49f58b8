"""Practical tolerance values: the candidates that ``[allocation].rounding`` allows.

Rounding is part of the optimisation, not a step after it: every free contributor may
only take the rounded values inside its limits (per process), and the mixed-integer
solver (:mod:`allocator.solve.discrete`) picks the cheapest combination of them that meets
every requirement. This module only lists those values.

- a step ``s`` [length]: the multiples ``n·s`` inside ``[tightest, loosest]``
  (:func:`allocator.grades.candidates_on_step`);
- ``"iso286"``: ± IT/2 of the standard tolerance grades IT5 ... IT14 for the
  contributor's nominal size ``|nominal|`` in the case's units
  (:func:`allocator.grades.iso286_tolerances`), inside ``[tightest, loosest]``.

A ``between = "choose"`` table already lists the values that exist (the shop's classes);
they are offered as they are, not rounded. Held contributors (``fixed`` or ``fix``) keep
their tolerance.
"""

from __future__ import annotations

import numpy as np

from .. import grades

__all__ = ["ISO286_GRADES", "describe", "step_values", "iso286_values", "no_value_problem"]

# IT5 (fine grinding) to IT14 (rough turning, general lengths): the grades a length in a
# stack is commonly drawn with (common practice); IT14 is not used up to 1 mm (ISO 286-1).
ISO286_GRADES = tuple(range(5, 15))

_SLACK = 1e-9  # relative: a grade equal to a limit up to float noise is inside


def describe(rounding) -> str:
    """Human name of a rounding setting: ``'multiples of 0.001'`` or ``'ISO 286 grades ...'``."""
    if rounding == "iso286":
        return f"ISO 286 grades IT{ISO286_GRADES[0]}-IT{ISO286_GRADES[-1]} (±IT/2)"
    return f"multiples of {float(rounding):g}"


def step_values(lo: float, hi: float, step: float) -> tuple[np.ndarray, tuple[str, ...]]:
    """Multiples of ``step`` inside ``[lo, hi]`` and empty labels.

    Parameters
    ----------
    lo, hi : float
        Tightest and loosest ± tolerance [length].
    step : float
        Rounding step, > 0 [length].

    Returns
    -------
    (numpy.ndarray, tuple of str)
        Increasing ± tolerances [length] (may be empty) and one ``''`` label each.

    References
    ----------
    .. [1] D. Goldberg, "What every computer scientist should know about floating-point
       arithmetic", ACM Computing Surveys 23(1):5-48, 1991 (the 1e-9 slack at the ends).

    Examples
    --------
    >>> step_values(0.004, 0.012, 0.004)[0]
    array([0.004, 0.008, 0.012])
    """
    values = grades.candidates_on_step(lo, hi, step)
    return values, ("",) * values.size


def iso286_values(size: float, units: str, lo: float, hi: float,
                  grade_list=ISO286_GRADES) -> tuple[np.ndarray, tuple[str, ...]]:
    """± IT/2 of standard grades at a nominal size that lie inside ``[lo, hi]``.

    Parameters
    ----------
    size : float
        Nominal size of the contributor in ``units``; ``|size|`` is used [length].
    units : str
        Case length unit (``mm``, ``m``, ``um``, ``in``).
    lo, hi : float
        Tightest and loosest ± tolerance [length].
    grade_list : iterable of int
        Grades to offer (default IT5 ... IT14).

    Returns
    -------
    (numpy.ndarray, tuple of str)
        ± tolerances IT/2 [length] in increasing order and their grade labels ``'IT7'``.

    Raises
    ------
    ValueError
        Unknown unit, a size of 0 or above 3150 mm (from :mod:`allocator.grades`).

    Notes
    -----
    A zone of width IT centred on the nominal is ± IT/2. Grades that ISO 286-1 does not
    use at this size (IT14 up to 1 mm) are left out.

    References
    ----------
    .. [1] ISO 286-1:2010, Geometrical product specifications (GPS) - ISO code system for
       tolerances on linear sizes - Part 1: Basis of tolerances, deviations and fits,
       Table 1.

    Examples
    --------
    >>> values, labels = iso286_values(25.0, "mm", 0.005, 0.02)
    >>> values, labels
    (array([0.0065, 0.0105, 0.0165]), ('IT6', 'IT7', 'IT8'))
    """
    values, labels = [], []
    grades.iso286_tolerances(size, units, grades=[grade_list[0]])  # unit / size errors
    for g in grade_list:
        try:
            (value,) = grades.iso286_tolerances(size, units, grades=[g])
        except ValueError:
            continue  # a grade not used at this size
        if lo * (1 - _SLACK) <= value <= hi * (1 + _SLACK):
            values.append(float(value))
            labels.append(f"IT{g}")
    return np.array(values, dtype=float), tuple(labels)


def no_value_problem(rounding, size: float, units: str, ranges) -> str:
    """Message for a contributor whose limits hold no rounded value.

    ``ranges`` lists ``(process name, (lo, hi))``; the name is ``''`` without processes.
    """
    shown = ", ".join(
        (f"{name} " if name else "") + f"[{lo:g}, {hi:g}]" for name, (lo, hi) in ranges
    )
    where = "within limits" if len(ranges) == 1 and not ranges[0][0] else "within the limits of any process:"
    if rounding == "iso286":
        return (
            f"no ISO 286 grade IT{ISO286_GRADES[0]}-IT{ISO286_GRADES[-1]} "
            f"(±IT/2 at size {abs(size):g} {units}) {where} {shown}"
        )
    return f"no multiple of {float(rounding):g} {where} {shown}"
