"""Parts per million: the one conversion between a fraction and ppm, and the one way
tables and reports print a fallout.

Conversion: a fraction ``p`` (0 .. 1) is ``p · PER_MILLION`` ppm
(:func:`fraction_to_ppm`), and ``n`` ppm is the fraction ``n / PER_MILLION``
(:func:`ppm_to_fraction`). Every fallout the tool stores or prints is in ppm; the normal
tail and Monte Carlo counts are fractions. A fallout target is a number of ppm strictly
between 0 and :data:`PER_MILLION` (all assemblies).

Printing: plain decimal notation, never an exponent: from 0.01 ppm up in ppm, below that in parts
per billion (1 ppm = 1000 ppb), and below 0.001 ppb (one assembly in 10¹²) as
``< 0.001 ppb``: a normal tail that far out says nothing a process can be held to. The
JSON and CSV outputs keep the raw floats. See docs/methods.md, *How fallout is printed*.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # numpy is not needed at run time here
    import numpy as np

PER_MILLION = 1_000_000.0  # [ppm] in the whole: a fraction 1 is this many ppm
PPB_BELOW = 0.01  # [ppm] smaller values are printed in ppb
FLOOR_PPB = 0.001  # [ppb] smaller values are printed as "< 0.001 ppb"


def fraction_to_ppm(fraction: float | np.ndarray) -> float | np.ndarray:
    """A fraction [-] (0 .. 1) as parts per million [ppm].

    Parameters
    ----------
    fraction : float or numpy.ndarray
        Share of assemblies [-].

    Returns
    -------
    float or numpy.ndarray
        The same share [ppm].

    Examples
    --------
    >>> fraction_to_ppm(0.0027)
    2700.0
    """
    return fraction * 1e6


def ppm_to_fraction(ppm: float | np.ndarray) -> float | np.ndarray:
    """Parts per million [ppm] as a fraction [-] (0 .. 1).

    Parameters
    ----------
    ppm : float or numpy.ndarray
        Share of assemblies [ppm].

    Returns
    -------
    float or numpy.ndarray
        The same share [-].

    Examples
    --------
    >>> round(ppm_to_fraction(2700.0), 12)
    0.0027
    """
    return ppm * 1e-6


def _plain(x: float, digits: int) -> str:
    """``x`` in fixed notation with ``digits`` significant digits, trailing zeros dropped."""
    exponent = math.floor(math.log10(abs(x)))
    text = f"{x:.{max(0, digits - 1 - exponent)}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


def format_ppm(value: float | None, *, unit: bool = True, digits: int = 4, missing: str = "-") -> str:
    """A fallout [ppm] as text: plain decimals, ppb for tiny values.

    Parameters
    ----------
    value : float or None
        Fallout [ppm].
    unit : bool
        Append `` ppm``. False for a table column whose header already says [ppm]; a
        value printed in ppb always carries `` ppb``.
    digits : int
        Significant digits [-] (at most; trailing zeros are dropped).
    missing : str
        Text for None or NaN.

    Returns
    -------
    str

    Examples
    --------
    >>> format_ppm(2325.37), format_ppm(0.0221), format_ppm(100.0, unit=False)
    ('2325 ppm', '0.0221 ppm', '100')
    >>> format_ppm(0.007098), format_ppm(7.098e-07), format_ppm(0.0)
    ('7.098 ppb', '< 0.001 ppb', '0 ppm')
    """
    suffix = " ppm" if unit else ""
    if value is None:
        return missing
    x = float(value)
    if math.isnan(x):
        return missing
    if math.isinf(x):
        return ("inf" if x > 0 else "-inf") + suffix
    if x == 0:
        return "0" + suffix
    if abs(x) >= PPB_BELOW:
        return _plain(x, digits) + suffix
    ppb = x * 1000.0
    if abs(ppb) < FLOOR_PPB:
        return ("< " if x > 0 else "> -") + f"{FLOOR_PPB:g} ppb"
    return _plain(ppb, digits) + " ppb"
