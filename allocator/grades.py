"""ISO 286-1 standard tolerance grades (IT grades) and rounding of tolerances to steps.

Rounding ``"iso286"`` turns each allocated ± tolerance into ± IT/2 of a standard grade for
the contributor's nominal size (see docs/iso286.md). Sizes are in millimetres inside this
module; :func:`iso286_tolerances` converts from and to a case's length units.

Two sources of IT values are kept side by side:

- :func:`it_tolerance_um` returns the tabulated value of ISO 286-1:2010, Table 1 (the value a
  drawing or a fit table uses). The table below was typed **from memory** of that table; each
  cell is cross-checked in tests/reference/test_iso286.py against the standard's formula
  (:func:`it_formula_um`) to within one rounding step, apart from a short, named list of
  cells where the published table itself departs from its formula.
- :func:`it_formula_um` evaluates the formula the table was built from, with its rounding.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable

import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "SIZE_LIMITS_MM",
    "GRADES",
    "size_range_mm",
    "tolerance_factor_um",
    "it_formula_um",
    "it_tolerance_um",
    "mm_per_unit",
    "iso286_tolerances",
    "round_down_to_step",
    "candidates_on_step",
]

# Upper limits of the nominal size ranges [mm]; a range is (previous, this], the first 0 < D <= 3.
SIZE_LIMITS_MM = (
    3, 6, 10, 18, 30, 50, 80, 120, 180, 250, 315, 400, 500,
    630, 800, 1000, 1250, 1600, 2000, 2500, 3150,
)  # fmt: skip
_UPPER = np.array(SIZE_LIMITS_MM, dtype=float)
_LOWER = np.concatenate([[0.0], _UPPER[:-1]])

GRADES = ("IT01", "IT0") + tuple(f"IT{g}" for g in range(1, 19))

# ISO 286-1:2010, Table 1, standard tolerance values IT1..IT11 [um], one row per size range
# above. All values from memory of the published table (not copied from a file); the test
# module checks each against the formula within one rounding step.
_TABLE_IT1_IT11_UM = np.array([
    # IT1  IT2  IT3  IT4  IT5  IT6  IT7  IT8  IT9 IT10  IT11      size range [mm]
    [0.8, 1.2,   2,   3,   4,   6,  10,  14,  25,  40,   60],  # 0-3
    [1,   1.5, 2.5,   4,   5,   8,  12,  18,  30,  48,   75],  # 3-6
    [1,   1.5, 2.5,   4,   6,   9,  15,  22,  36,  58,   90],  # 6-10
    [1.2,   2,   3,   5,   8,  11,  18,  27,  43,  70,  110],  # 10-18
    [1.5, 2.5,   4,   6,   9,  13,  21,  33,  52,  84,  130],  # 18-30
    [1.5, 2.5,   4,   7,  11,  16,  25,  39,  62, 100,  160],  # 30-50
    [2,     3,   5,   8,  13,  19,  30,  46,  74, 120,  190],  # 50-80
    [2.5,   4,   6,  10,  15,  22,  35,  54,  87, 140,  220],  # 80-120
    [3.5,   5,   8,  12,  18,  25,  40,  63, 100, 160,  250],  # 120-180
    [4.5,   7,  10,  14,  20,  29,  46,  72, 115, 185,  290],  # 180-250
    [6,     8,  12,  16,  23,  32,  52,  81, 130, 210,  320],  # 250-315
    [7,     9,  13,  18,  25,  36,  57,  89, 140, 230,  360],  # 315-400
    [8,    10,  15,  20,  27,  40,  63,  97, 155, 250,  400],  # 400-500
    [9,    11,  16,  22,  32,  44,  70, 110, 175, 280,  440],  # 500-630
    [10,   13,  18,  25,  36,  50,  80, 125, 200, 320,  500],  # 630-800
    [11,   15,  21,  28,  40,  56,  90, 140, 230, 360,  560],  # 800-1000
    [13,   18,  24,  33,  47,  66, 105, 165, 260, 420,  660],  # 1000-1250
    [15,   21,  29,  39,  55,  78, 125, 195, 310, 500,  780],  # 1250-1600
    [18,   25,  35,  46,  65,  92, 150, 230, 370, 600,  920],  # 1600-2000
    [22,   30,  41,  55,  78, 110, 175, 280, 440, 700, 1100],  # 2000-2500
    [26,   36,  50,  68,  96, 135, 210, 330, 540, 860, 1350],  # 2500-3150
])  # fmt: skip

# IT01 and IT0 [um], sizes up to 500 mm only (the standard lists them separately and not
# above 500 mm). From memory of ISO 286-1:2010.
_TABLE_IT01_UM = np.array([0.3, 0.4, 0.4, 0.5, 0.6, 0.6, 0.8, 1, 1.2, 2, 2.5, 3, 4])
_TABLE_IT0_UM = np.array([0.5, 0.6, 0.6, 0.8, 1, 1, 1.2, 1.5, 2, 3, 4, 5, 6])

# Multipliers of the standard tolerance factor i (or I above 500 mm) for IT5..IT18.
_MULTIPLIER = {5: 7, 6: 10, 7: 16, 8: 25, 9: 40, 10: 64, 11: 100,
               12: 160, 13: 250, 14: 400, 15: 640, 16: 1000, 17: 1600, 18: 2500}  # fmt: skip

_MM_PER_UNIT = {"mm": 1.0, "m": 1000.0, "um": 1e-3, "μm": 1e-3, "µm": 1e-3, "in": 25.4}

# Relative slack for sizes and step multiples that should be exact but went through floats.
_EPS = 1e-9

_REFERENCE = (
    "ISO 286-1:2010, Geometrical product specifications (GPS) - ISO code system for "
    "tolerances on linear sizes - Part 1: Basis of tolerances, deviations and fits"
)


def _grade_key(grade) -> str:
    """Normalise 7, "7", "IT7", "it 7", "IT01", "01" to "IT7" / "IT01"."""
    if isinstance(grade, (int, np.integer)) and not isinstance(grade, bool):
        text = str(int(grade))
    elif isinstance(grade, str):
        text = re.sub(r"^IT\s*", "", grade.strip(), flags=re.IGNORECASE)
    else:
        raise ValueError(f"IT grade must be an int or a string like 'IT7' (got {grade!r})")
    key = f"IT{text}"
    if key not in GRADES:
        raise ValueError(f"unknown IT grade {grade!r} (ISO 286-1 has IT01, IT0, IT1 ... IT18)")
    return key


def _range_index(size_mm: float) -> int:
    size = float(size_mm)
    if not math.isfinite(size) or size <= 0 or size > _UPPER[-1] * (1 + _EPS):
        raise ValueError(
            f"nominal size {size:g} mm is outside ISO 286-1 (0 < size <= 3150 mm)"
        )
    # a size that is a range limit up to round-off (e.g. 0.03 m -> 30.000000000000004 mm)
    # belongs to the range it closes
    near = np.abs(_UPPER - size) <= _EPS * _UPPER
    if near.any():
        return int(np.flatnonzero(near)[0])
    return int(np.searchsorted(_UPPER, size, side="left"))


def size_range_mm(size_mm: float) -> tuple[float, float]:
    """Nominal size range of ISO 286-1 that holds ``size_mm``.

    Parameters
    ----------
    size_mm : float
        Nominal size, ``0 < size_mm <= 3150`` [mm].

    Returns
    -------
    (float, float)
        Lower (exclusive; 0 for the first range) and upper (inclusive) limit [mm].

    Raises
    ------
    ValueError
        Size outside ``(0, 3150]`` mm.

    Notes
    -----
    Ranges are :math:`0 < D \\le 3`, then :math:`D_{lo} < D \\le D_{hi}` over the limits
    3, 6, 10, 18, 30, 50, 80, 120, 180, 250, 315, 400, 500, 630, 800, 1000, 1250, 1600,
    2000, 2500, 3150 mm. A size within 1e-9 (relative) of a limit is taken to be on it.

    References
    ----------
    .. [1] ISO 286-1:2010, Geometrical product specifications (GPS) - ISO code system for
       tolerances on linear sizes - Part 1: Basis of tolerances, deviations and fits,
       Table 1.

    Examples
    --------
    >>> size_range_mm(30.0)
    (18.0, 30.0)
    >>> size_range_mm(30.001)
    (30.0, 50.0)
    """
    j = _range_index(size_mm)
    return float(_LOWER[j]), float(_UPPER[j])


def _geometric_mean_mm(j: int) -> float:
    # the first range uses 1 mm as its lower limit (its true lower limit is 0)
    lo = _LOWER[j] if j > 0 else 1.0
    return math.sqrt(lo * _UPPER[j])


def tolerance_factor_um(size_mm: float) -> float:
    """Standard tolerance factor ``i`` (up to 500 mm) or ``I`` (500 to 3150 mm).

    Parameters
    ----------
    size_mm : float
        Nominal size, ``0 < size_mm <= 3150`` [mm]; only its size range matters.

    Returns
    -------
    float
        i or I [um].

    Notes
    -----
    With :math:`D` the geometric mean of the range limits [mm] (1 mm and 3 mm for the first
    range):

    .. math::

        i = 0.45\\,\\sqrt[3]{D} + 0.001\\,D \\quad (D \\le 500), \\qquad
        I = 0.004\\,D + 2.1 \\quad (500 < D \\le 3150)

    References
    ----------
    .. [1] ISO 286-1:2010, Geometrical product specifications (GPS) - ISO code system for
       tolerances on linear sizes - Part 1: Basis of tolerances, deviations and fits.

    Examples
    --------
    >>> round(tolerance_factor_um(25.0), 4)
    1.3074
    """
    d = _geometric_mean_mm(_range_index(size_mm))
    if _UPPER[_range_index(size_mm)] <= 500:
        return 0.45 * d ** (1 / 3) + 0.001 * d
    return 0.004 * d + 2.1


def _rounding_step_um(value_um: float, grade: int, size_mm: float) -> float:
    """Step to which a computed IT value is rounded [um]."""
    if grade <= 4:
        # IT01..IT4: our choice of steps (the published values of these grades are used
        # by it_tolerance_um; the formula is only a cross-check for them)
        return 0.1 if value_um <= 1 else 0.5 if value_um <= 5 else 1.0
    # IT5..IT18: the standard's rounding of computed values (from memory of ISO 286-1)
    if value_um <= 60:
        return 1.0
    if value_um <= 100:
        return 1.0 if _UPPER[_range_index(size_mm)] <= 500 else 2.0
    for limit, step in ((200, 5), (500, 10), (1000, 20), (2000, 50), (5000, 100),
                        (10000, 200), (20000, 500)):  # fmt: skip
        if value_um <= limit:
            return float(step)
    return 1000.0


def it_formula_um(grade: int | str, size_mm: float, rounded: bool = True) -> float:
    """Standard tolerance of an IT grade computed from the ISO 286-1 formulas.

    Parameters
    ----------
    grade : int or str
        ``7``, ``"IT7"``, ``"IT01"``, ``"IT0"`` ... ``"IT18"``.
    size_mm : float
        Nominal size, ``0 < size_mm <= 3150`` [mm].
    rounded : bool
        Round to the standard's step (default) or return the raw formula value.

    Returns
    -------
    float
        Standard tolerance IT (the full width of the zone, not the ± half-width) [um].

    Raises
    ------
    ValueError
        Unknown grade, size out of range, or IT01/IT0 above 500 mm.

    Notes
    -----
    With the tolerance factor :math:`i` (:func:`tolerance_factor_um`):

    .. math::

        IT_n = m_n\\,i,\\quad m_{5..18} = 7, 10, 16, 25, 40, 64, 100, 160, 250, 400, 640,
        1000, 1600, 2500

    :math:`IT01 = 0.3 + 0.008D`, :math:`IT0 = 0.5 + 0.012D`, :math:`IT1 = 0.8 + 0.020D`
    (up to 500 mm; :math:`IT1 = 2I` above), and IT2, IT3, IT4 are spaced geometrically
    between IT1 and IT5: :math:`IT_n = IT1\\,(IT5/IT1)^{(n-1)/4}`.

    Rounding of IT5..IT18 (from memory of the standard's rule): to 1 um up to 60 um; to 1 um
    (up to 500 mm) or 2 um (above) from 60 to 100 um; then 5, 10, 20, 50, 100, 200, 500 um up
    to 200, 500, 1000, 2000, 5000, 10000, 20000 um, and 1000 um above. IT01..IT4 are rounded
    to 0.1 um up to 1 um, 0.5 um up to 5 um and 1 um above (our choice). The published table
    departs from this computation in a few cells (see :func:`it_tolerance_um`).

    References
    ----------
    .. [1] ISO 286-1:2010, Geometrical product specifications (GPS) - ISO code system for
       tolerances on linear sizes - Part 1: Basis of tolerances, deviations and fits.

    Examples
    --------
    >>> it_formula_um("IT7", 25.0)
    21.0
    >>> round(it_formula_um(7, 25.0, rounded=False), 3)
    20.918
    """
    key = _grade_key(grade)
    j = _range_index(size_mm)
    d = _geometric_mean_mm(j)
    large = _UPPER[j] > 500
    factor = tolerance_factor_um(size_mm)
    if key in ("IT01", "IT0"):
        if large:
            raise ValueError(f"{key} is defined only up to 500 mm (got {size_mm:g} mm)")
        value = 0.3 + 0.008 * d if key == "IT01" else 0.5 + 0.012 * d
        n = 0
    else:
        n = int(key[2:])
        if n >= 5:
            value = _MULTIPLIER[n] * factor
        else:
            it1 = 2.0 * factor if large else 0.8 + 0.020 * d
            value = it1 * (_MULTIPLIER[5] * factor / it1) ** ((n - 1) / 4)
    if not rounded:
        return float(value)
    step = _rounding_step_um(value, n, size_mm)
    return _clean(round(value / step) * step, step)


def it_tolerance_um(grade: int | str, size_mm: float) -> float:
    """Standard tolerance value of an IT grade at a nominal size (ISO 286-1 table).

    Parameters
    ----------
    grade : int or str
        ``7``, ``"IT7"``, ``"IT01"``, ``"IT0"`` ... ``"IT18"``.
    size_mm : float
        Nominal size, ``0 < size_mm <= 3150`` [mm] (IT01 and IT0: up to 500 mm).

    Returns
    -------
    float
        Standard tolerance IT, the full width of the tolerance zone [um]. The ± half-width
        used in a case is IT/2.

    Raises
    ------
    ValueError
        Unknown grade, size out of range, IT01/IT0 above 500 mm, or IT14..IT18 at sizes up
        to 1 mm.

    Notes
    -----
    Values of IT1..IT11 (all sizes) and IT01, IT0 (up to 500 mm) are the tabulated values,
    typed from memory of ISO 286-1:2010 Table 1. IT12..IT18 follow the table's own
    pattern of a factor 10 every five grades:

    .. math:: IT_{n+5} = 10\\,IT_n \\quad (n \\ge 7)

    (IT12 = 10 IT7 ... IT16 = 10 IT11, IT17 = 100 IT7, IT18 = 100 IT8). The formula
    multipliers have exactly this ratio (160/16 = ... = 1000/100 = 10), and the published
    table keeps it in every cell (from memory of the table).

    ISO 286-1 does not use IT14..IT18 for nominal sizes up to 1 mm (a note to Table 1,
    from memory); those combinations raise.

    References
    ----------
    .. [1] ISO 286-1:2010, Geometrical product specifications (GPS) - ISO code system for
       tolerances on linear sizes - Part 1: Basis of tolerances, deviations and fits,
       Table 1.

    Examples
    --------
    >>> it_tolerance_um("IT7", 25.0)
    21.0
    >>> it_tolerance_um(12, 40.0)
    250.0
    """
    key = _grade_key(grade)
    j = _range_index(size_mm)
    if key in ("IT01", "IT0"):
        if _UPPER[j] > 500:
            raise ValueError(f"{key} is defined only up to 500 mm (got {float(size_mm):g} mm)")
        return float((_TABLE_IT01_UM if key == "IT01" else _TABLE_IT0_UM)[j])
    n = int(key[2:])
    if n >= 14 and float(size_mm) <= 1.0:
        raise ValueError(f"{key} is not used for nominal sizes up to 1 mm (ISO 286-1)")
    if n <= 11:
        return float(_TABLE_IT1_IT11_UM[j, n - 1])
    # IT12..IT16 = 10 x IT7..IT11, IT17/IT18 = 100 x IT7/IT8
    return float(_TABLE_IT1_IT11_UM[j, n - 6] * 10) if n <= 16 else float(
        _TABLE_IT1_IT11_UM[j, n - 11] * 100
    )


def mm_per_unit(units: str) -> float:
    """Millimetres per length unit of a case.

    Parameters
    ----------
    units : {'mm', 'm', 'um', 'μm', 'µm', 'in'}
        Length unit label of a case.

    Returns
    -------
    float
        Length of one unit [mm].

    Raises
    ------
    ValueError
        Any other label.

    Notes
    -----
    :math:`1\\,\\text{in} = 25.4\\,\\text{mm}` exactly (international inch, 1959).

    References
    ----------
    .. [1] BIPM, The International System of Units (SI), 9th edition, 2019.

    Examples
    --------
    >>> mm_per_unit("in")
    25.4
    """
    key = str(units).strip()
    if key not in _MM_PER_UNIT:
        raise ValueError(
            f"unknown length unit {units!r} for ISO 286 rounding "
            f"(expected one of {', '.join(_MM_PER_UNIT)})"
        )
    return _MM_PER_UNIT[key]


def iso286_tolerances(size: float, units: str = "mm", grades: Iterable[int | str] = range(5, 13)) -> np.ndarray:
    """± half-widths of standard IT grades at a nominal size, in a case's units.

    Parameters
    ----------
    size : float
        Nominal size of the contributor, in ``units``; its absolute value is used
        [length].
    units : {'mm', 'm', 'um', 'μm', 'µm', 'in'}
        Length unit of ``size`` and of the result.
    grades : iterable of int or str
        IT grades to offer, default IT5 ... IT12.

    Returns
    -------
    numpy.ndarray
        IT/2 for each grade, in the order given [length, ``units``].

    Raises
    ------
    ValueError
        Unknown unit or grade; ``|size|`` equal to 0 or above 3150 mm.

    Notes
    -----
    A ± tolerance ``t`` on a size is a zone of width ``2t``, so a grade offers

    .. math:: t = IT(\\text{grade}, D) / 2,

    with IT from :func:`it_tolerance_um` for the size range holding :math:`D = |size|`.

    References
    ----------
    .. [1] ISO 286-1:2010, Geometrical product specifications (GPS) - ISO code system for
       tolerances on linear sizes - Part 1: Basis of tolerances, deviations and fits,
       Table 1.

    Examples
    --------
    >>> iso286_tolerances(25.0, "mm", grades=[6, 7, 8])
    array([0.0065, 0.0105, 0.0165])
    """
    per_unit = mm_per_unit(units)
    size_mm = abs(float(size)) * per_unit
    if size_mm == 0:
        raise ValueError(f"nominal size 0 {units} has no ISO 286 grade (needs 0 < size <= 3150 mm)")
    if not size_mm <= 3150 * (1 + _EPS):
        raise ValueError(
            f"nominal size {abs(float(size)):g} {units} ({size_mm:g} mm) is above the ISO 286-1 "
            "range (up to 3150 mm)"
        )
    it_um = np.array([it_tolerance_um(g, size_mm) for g in grades], dtype=float)
    return it_um / 2.0 / 1000.0 / per_unit


# --------------------------------------------------------------------------- steps


def _decimals(step: float) -> int:
    # enough decimals to show multiples of step exactly, so 3 * 0.1 gives 0.3
    return int(min(15, max(0, 10 - math.floor(math.log10(step)))))


def _clean(values, step: float):
    cleaned = np.round(values, _decimals(step))
    return float(cleaned) if np.ndim(cleaned) == 0 else cleaned


def _check_step(step: float) -> float:
    step = float(step)
    if not (math.isfinite(step) and step > 0):
        raise ValueError(f"rounding step must be > 0 (got {step:g})")
    return step


def round_down_to_step(t: ArrayLike, step: float) -> float | np.ndarray:
    """Largest multiple of ``step`` not above ``t`` (round a tolerance down to a step).

    Parameters
    ----------
    t : float or array_like
        ± tolerance [length].
    step : float
        Rounding step, > 0 [length].

    Returns
    -------
    float or numpy.ndarray
        :math:`\\lfloor t/\\text{step} \\rfloor \\cdot \\text{step}` [length]; a float for a
        scalar ``t``. Can be 0 when ``t < step``.

    Notes
    -----
    Rounding a tolerance **down** keeps every requirement met (it only tightens). A ``t``
    that is a multiple of ``step`` up to float noise (e.g. ``0.3 / 0.1 = 2.9999999999999996``)
    stays where it is: with :math:`\\varepsilon = 10^{-9}`,

    .. math:: n = \\lfloor t/\\text{step} + \\varepsilon \\rfloor,\\qquad t' = n\\,\\text{step}.

    References
    ----------
    .. [1] D. Goldberg, "What every computer scientist should know about floating-point
       arithmetic", ACM Computing Surveys 23(1):5-48, 1991.

    Examples
    --------
    >>> round_down_to_step(0.3, 0.1)
    0.3
    >>> round_down_to_step([0.0457, 0.05, 0.0049], 0.005)
    array([0.045, 0.05 , 0.   ])
    """
    step = _check_step(step)
    n = np.floor(np.asarray(t, dtype=float) / step + _EPS)
    return _clean(n * step, step)


def candidates_on_step(lo: float, hi: float, step: float) -> np.ndarray:
    """All multiples of ``step`` inside ``[lo, hi]``.

    Parameters
    ----------
    lo, hi : float
        Tightest and loosest ± tolerance, ``lo <= hi`` [length].
    step : float
        Rounding step, > 0 [length].

    Returns
    -------
    numpy.ndarray
        Increasing multiples ``n·step`` with ``lo <= n·step <= hi`` (ends included up to
        float noise); empty when none fits [length].

    Notes
    -----
    .. math::

        n_{lo} = \\lceil lo/\\text{step} - \\varepsilon \\rceil,\\quad
        n_{hi} = \\lfloor hi/\\text{step} + \\varepsilon \\rfloor,\\quad
        \\varepsilon = 10^{-9}

    References
    ----------
    .. [1] D. Goldberg, "What every computer scientist should know about floating-point
       arithmetic", ACM Computing Surveys 23(1):5-48, 1991.

    Examples
    --------
    >>> candidates_on_step(0.005, 0.02, 0.005)
    array([0.005, 0.01 , 0.015, 0.02 ])
    """
    step = _check_step(step)
    lo, hi = float(lo), float(hi)
    if not lo <= hi:
        raise ValueError(f"need lo <= hi (got [{lo:g}, {hi:g}])")
    first = math.ceil(lo / step - _EPS)
    last = math.floor(hi / step + _EPS)
    return np.atleast_1d(_clean(np.arange(first, last + 1, dtype=float) * step, step))
