"""Process capability from measured parts: Cp, Cpk, their confidence intervals, normality.

A case's ``cp`` and ``mean_shift`` are usually guesses. :func:`capability` computes them
from measured parts (a wide CSV: one column per measured contributor, one part per row)
with the case's contract formulas, per contributor with ``n`` values, mean ``m``, sample
standard deviation ``s`` (``n − 1``), nominal ``x₀`` and ± tolerance ``t``::

    mean_shift = |m − x₀| / t      cp = t / (3 s)      cpk = (t − |m − x₀|) / (3 s)

(the tolerance band ``x₀ ± t`` as specification limits), with

- the chi-square confidence interval of Cp (Montgomery): :func:`cp_interval`;
- Bissell's normal-approximation interval of Cpk: :func:`cpk_interval`;
- the Anderson–Darling normality statistic (:func:`scipy.stats.anderson`) and its p-value
  (D'Agostino & Stephens): :func:`anderson_darling_normal`;
- the parts outside ``x₀ ± t``, and where normality is rejected the closer of a uniform
  and a symmetric triangular distribution with the same mean and spread
  (Kolmogorov–Smirnov distance, :func:`scipy.stats.kstest`).

:meth:`CapabilityStudy.apply` gives a copy of the case with ``cp`` and ``mean_shift`` from
the data (or, ``conservative=True``, the lower confidence bound of Cp and the upper
confidence bound of the offset), so that allocation runs on the measured capability.

Every figure assumes a stable process (in statistical control) and independent parts.

References
----------
.. [1] D. C. Montgomery, Introduction to Statistical Quality Control, 6th ed., Wiley,
   2009, section 8.3 (confidence interval of Cp).
.. [2] A. F. Bissell, "How reliable is your capability index?", Applied Statistics
   39(3):331-340, 1990 (interval of Cpk).
.. [3] NIST/SEMATECH e-Handbook of Statistical Methods, section 6.1.6, "What is process
   capability?" (Cp, Cpk, k = |m − x₀| / t and both intervals).
.. [4] R. B. D'Agostino and M. A. Stephens, Goodness-of-Fit Techniques, Marcel Dekker,
   1986, table 4.9 (p-value of the Anderson–Darling statistic for the normal with
   estimated mean and variance).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Mapping

import numpy as np

from . import status as _status
from .datafile import DataTable, from_columns, number, read_csv
from .errors import CaseError, UsageError, did_you_mean

if TYPE_CHECKING:
    import pandas as pd
    from numpy.typing import ArrayLike

    from .model import Case

__all__ = [
    "DEFAULT_CONFIDENCE",
    "FEW_PARTS",
    "MeasuredCapability",
    "CapabilityStudy",
    "capability",
    "cp_interval",
    "cpk_interval",
    "offset_upper_bound",
    "anderson_darling_normal",
]

DEFAULT_CONFIDENCE = 0.95
FEW_PARTS = 30  # common practice: a capability from fewer parts is unreliable
# a part counts as outside when it passes x0 ± t by more than this (relative to t): round-off
OUTSIDE_RTOL = 1e-12


# --------------------------------------------------------------------------- formulas


def _alpha(confidence: float) -> float:
    if not isinstance(confidence, (int, float)) or isinstance(confidence, bool) or not 0 < confidence < 1:
        raise UsageError(f"--confidence: must be a number between 0 and 1, e.g. 0.95 (got {confidence!r})")
    return 1.0 - float(confidence)


def cp_interval(cp: float, n: int, confidence: float = DEFAULT_CONFIDENCE) -> tuple[float, float]:
    """Two-sided chi-square confidence interval of Cp.

    Parameters
    ----------
    cp : float
        Estimated Cp from ``n`` parts [-].
    n : int
        Number of parts (≥ 2).
    confidence : float
        Confidence level, e.g. 0.95 [-].

    Returns
    -------
    (low, high) : tuple of float

    Notes
    -----
    With :math:`\\nu = n - 1` and :math:`\\chi^2_{q,\\nu}` the lower ``q`` quantile,

    .. math:: \\hat C_p \\sqrt{\\chi^2_{\\alpha/2,\\nu}/\\nu} \\le C_p \\le
              \\hat C_p \\sqrt{\\chi^2_{1-\\alpha/2,\\nu}/\\nu}

    (normal data: :math:`\\nu s^2/\\sigma^2` is chi-square with ν degrees of freedom).

    References
    ----------
    D. C. Montgomery, Introduction to Statistical Quality Control, 6th ed., Wiley, 2009,
    section 8.3; NIST/SEMATECH e-Handbook of Statistical Methods, section 6.1.6.

    Examples
    --------
    >>> low, high = cp_interval(1.0, 30)
    >>> round(low, 4), round(high, 4)
    (0.7439, 1.2556)
    """
    from scipy import stats

    alpha = _alpha(confidence)
    nu = n - 1
    return (cp * math.sqrt(float(stats.chi2.ppf(alpha / 2, nu)) / nu),
            cp * math.sqrt(float(stats.chi2.ppf(1 - alpha / 2, nu)) / nu))


def cpk_interval(cpk: float, n: int, confidence: float = DEFAULT_CONFIDENCE) -> tuple[float, float]:
    """Bissell's (1990) approximate two-sided confidence interval of Cpk.

    Parameters
    ----------
    cpk : float
        Estimated Cpk from ``n`` parts [-].
    n : int
        Number of parts (≥ 2).
    confidence : float
        Confidence level [-].

    Returns
    -------
    (low, high) : tuple of float

    Notes
    -----
    .. math:: \\hat C_{pk} \\pm z_{1-\\alpha/2}
              \\sqrt{\\frac{1}{9n} + \\frac{\\hat C_{pk}^2}{2(n-1)}}

    which is Bissell's :math:`\\hat C_{pk}[1 \\pm z\\sqrt{1/(9n\\hat C_{pk}^2) + 1/(2(n-1))}]`
    written so that it stays defined at :math:`\\hat C_{pk} \\le 0`.

    References
    ----------
    A. F. Bissell, "How reliable is your capability index?", Applied Statistics
    39(3):331-340, 1990; NIST/SEMATECH e-Handbook of Statistical Methods, section 6.1.6.

    Examples
    --------
    >>> low, high = cpk_interval(1.0, 30)
    >>> round(low, 4), round(high, 4)
    (0.7163, 1.2837)
    """
    from scipy import stats

    alpha = _alpha(confidence)
    z = float(stats.norm.ppf(1 - alpha / 2))
    half = z * math.sqrt(1.0 / (9.0 * n) + cpk**2 / (2.0 * (n - 1)))
    return cpk - half, cpk + half


def offset_upper_bound(offset: float, std: float, n: int, confidence: float = DEFAULT_CONFIDENCE) -> float:
    """Upper end of the two-sided t interval of ``|μ − x₀|`` [length].

    ``|m − x₀| + t_{1−α/2, n−1} · s / √n``: the farthest the true mean may sit from the
    nominal at the confidence level (Student's t interval of the mean).

    Examples
    --------
    >>> round(offset_upper_bound(0.0, 1.0, 30), 4)
    0.3734
    """
    from scipy import stats

    alpha = _alpha(confidence)
    return abs(offset) + float(stats.t.ppf(1 - alpha / 2, n - 1)) * std / math.sqrt(n)


def _anderson_statistic(x: np.ndarray) -> float:
    import warnings

    from scipy import stats

    try:  # scipy >= 1.17 wants a p-value method named; the statistic is the same
        return float(stats.anderson(x, dist="norm", method="interpolate").statistic)
    except TypeError:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FutureWarning)
            return float(stats.anderson(x, dist="norm").statistic)


def ad_pvalue(statistic: float, n: int) -> float:
    """p-value of the Anderson–Darling statistic for the normal, mean and variance estimated.

    D'Agostino & Stephens (1986, table 4.9): with :math:`A^{*2} = A^2(1 + 0.75/n + 2.25/n^2)`,
    ``exp(1.2937 − 5.709 A* + 0.0186 A*²)`` for ``A* ≥ 0.6``,
    ``exp(0.9177 − 4.279 A* − 1.38 A*²)`` for ``0.34 < A* < 0.6``,
    ``1 − exp(−8.318 + 42.796 A* − 59.938 A*²)`` for ``0.2 < A* ≤ 0.34`` and
    ``1 − exp(−13.436 + 101.14 A* − 223.73 A*²)`` below (``A*`` meaning ``A*²``).

    Examples
    --------
    >>> round(ad_pvalue(0.787 / (1 + 4 / 50 - 25 / 50**2), 50), 2)  # near the 5 % critical value
    0.05
    """
    a = statistic * (1.0 + 0.75 / n + 2.25 / n**2)
    if a >= 0.6:
        p = math.exp(1.2937 - 5.709 * a + 0.0186 * a * a)
    elif a > 0.34:
        p = math.exp(0.9177 - 4.279 * a - 1.38 * a * a)
    elif a > 0.2:
        p = 1.0 - math.exp(-8.318 + 42.796 * a - 59.938 * a * a)
    else:
        p = 1.0 - math.exp(-13.436 + 101.14 * a - 223.73 * a * a)
    return min(max(p, 0.0), 1.0)


def anderson_darling_normal(values: ArrayLike) -> tuple[float, float]:
    """Anderson–Darling test of normality: statistic (scipy.stats.anderson) and p-value.

    Parameters
    ----------
    values : array_like
        At least 3 measurements with some spread.

    Returns
    -------
    (statistic, pvalue) : tuple of float
        ``nan`` for fewer than 3 values or no spread.
    """
    x = np.asarray(values, dtype=float)
    if x.size < 3 or np.std(x) == 0:
        return math.nan, math.nan
    statistic = _anderson_statistic(x)
    return statistic, ad_pvalue(statistic, x.size)


def _closest_alternative(x: np.ndarray, mean: float, std: float) -> tuple[str, dict]:
    """Uniform or symmetric triangular (same mean and σ), whichever is closer (KS distance)."""
    from scipy import stats

    distances = {
        "normal": stats.kstest(x, stats.norm(mean, std).cdf).statistic,
        "uniform": stats.kstest(x, stats.uniform(mean - math.sqrt(3) * std, 2 * math.sqrt(3) * std).cdf).statistic,
        "triangular": stats.kstest(
            x, stats.triang(0.5, mean - math.sqrt(6) * std, 2 * math.sqrt(6) * std).cdf).statistic,
    }
    best = min(("uniform", "triangular"), key=lambda k: distances[k])
    return best, {k: float(v) for k, v in distances.items()}


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class MeasuredCapability:
    """The capability of one contributor from its measured parts.

    Attributes
    ----------
    name : str
    n : int
        Parts measured.
    mean, std : float
        Sample mean and standard deviation (n − 1) [length].
    nominal, tolerance : float
        From the case [length].
    offset : float
        ``mean − nominal`` [length].
    mean_shift : float
        ``|offset| / tolerance`` [-] (may exceed 1: the mean lies outside the band).
    cp, cpk : float
        ``t / (3 s)`` and ``(t − |offset|) / (3 s)`` [-] (``inf`` without spread).
    cp_ci_low, cp_ci_high, cpk_ci_low, cpk_ci_high : float
        Confidence intervals at :attr:`CapabilityStudy.confidence` [-].
    offset_ci_high : float
        Upper confidence bound of ``|μ − nominal|`` [length].
    ad_statistic, ad_pvalue : float
        Anderson–Darling normality test (``nan`` below 3 parts or without spread).
    normal_rejected : bool
        ``ad_pvalue < 1 − confidence``.
    suggested : str or None
        ``uniform`` or ``triangular`` where normal is rejected, else None.
    ks_distance : dict
        Kolmogorov–Smirnov distance to the normal, uniform and triangular with the same
        mean and σ (empty without spread) [-].
    outside : int
        Parts outside ``nominal ± tolerance``.
    units : str
    warnings : tuple of str
    """

    name: str
    n: int
    mean: float
    std: float
    nominal: float
    tolerance: float
    offset: float
    mean_shift: float
    cp: float
    cpk: float
    cp_ci_low: float
    cp_ci_high: float
    cpk_ci_low: float
    cpk_ci_high: float
    offset_ci_high: float
    ad_statistic: float
    ad_pvalue: float
    normal_rejected: bool
    suggested: str | None
    ks_distance: dict
    outside: int
    units: str = ""
    warnings: tuple = field(default=())

    @property
    def has_spread(self) -> bool:
        """True when the values are not all the same."""
        return self.std > 0

    def written(self, conservative: bool = False) -> tuple[float, float]:
        """``(cp, mean_shift)`` a case gets: the estimates, or the confidence bounds."""
        if conservative:
            return self.cp_ci_low, self.offset_ci_high / self.tolerance
        return self.cp, self.mean_shift

    def to_dict(self) -> dict:
        """JSON-ready dict (contract keys first)."""
        return {
            "name": self.name, "n": self.n, "mean": self.mean, "std": self.std,
            "cp": self.cp, "cpk": self.cpk,
            "cp_ci_low": self.cp_ci_low, "cp_ci_high": self.cp_ci_high,
            "cpk_ci_low": self.cpk_ci_low, "cpk_ci_high": self.cpk_ci_high,
            "mean_shift": self.mean_shift,
            "nominal": self.nominal, "tolerance": self.tolerance, "offset": self.offset,
            "offset_ci_high": self.offset_ci_high,
            "ad_statistic": self.ad_statistic, "ad_pvalue": self.ad_pvalue,
            "normal_rejected": self.normal_rejected, "suggested": self.suggested,
            "ks_distance": dict(self.ks_distance), "outside": self.outside,
            "units": self.units, "warnings": list(self.warnings),
        }


@dataclass(frozen=True)
class CapabilityStudy:
    """Result of :func:`capability`.

    Attributes
    ----------
    status : str
        ``ok`` (a study of given data always gives its numbers; :mod:`allocator.status`).
    message : str
    confidence : float
    contributors : tuple of MeasuredCapability
        In the order of the measurement columns.
    source : str
        The measurements file (or ``<measurements>``).
    case : Case
    """

    status: str
    message: str
    confidence: float
    contributors: tuple
    source: str
    case: object

    @property
    def success(self) -> bool:
        """True when ``status`` is 'ok' (:mod:`allocator.status`)."""
        return self.status == _status.OK

    @property
    def warnings(self) -> tuple[str, ...]:
        """Every contributor's warnings, each prefixed by its name."""
        return tuple(f"{c.name}: {w}" for c in self.contributors for w in c.warnings)

    def __getitem__(self, name: str) -> MeasuredCapability:
        for c in self.contributors:
            if c.name == name:
                return c
        raise KeyError(name)

    def to_dict(self) -> dict:
        """``{"status", "message", "confidence", "contributors": [...]}``."""
        return {
            "status": self.status, "message": self.message, "confidence": self.confidence,
            "source": self.source, "contributors": [c.to_dict() for c in self.contributors],
        }

    def to_frame(self) -> pd.DataFrame:
        """One row per measured contributor (warnings joined by ``; ``)."""
        import pandas as pd

        rows = []
        for c in self.contributors:
            d = c.to_dict()
            d["ks_distance"] = ", ".join(f"{k} {v:.3g}" for k, v in c.ks_distance.items())
            d["warnings"] = "; ".join(c.warnings)
            rows.append(d)
        return pd.DataFrame(rows).set_index("name")

    def _repr_html_(self) -> str:
        from .display import result_html

        return result_html(f"Capability at {100 * self.confidence:g} % confidence", self.to_frame(), self.message)

    def __repr__(self) -> str:
        lines = [f"CapabilityStudy(status={self.status!r}, confidence={self.confidence:g})"]
        for c in self.contributors:
            lines.append(f"  {c.name}: n={c.n}, cp={c.cp:.3g} [{c.cp_ci_low:.3g}, {c.cp_ci_high:.3g}], "
                         f"cpk={c.cpk:.3g}, mean_shift={c.mean_shift:.3g}")
        return "\n".join(lines)

    def apply(self, *, conservative: bool = False) -> Case:
        """A copy of the case with ``cp`` and ``mean_shift`` from the data.

        Parameters
        ----------
        conservative : bool
            Write the lower confidence bound of Cp and the upper confidence bound of the
            offset (as ``mean_shift``) instead of the estimates.

        Returns
        -------
        Case
            Measured contributors become ``normal`` with the measured cp (a case's cp is
            defined for the normal only); one made by processes gets the cp on the process
            that makes its current tolerance. An unmeasured contributor, and one whose
            column has no spread, keeps its values.

        Raises
        ------
        CaseError
            A ``mean_shift`` above 1 (the mean, or its confidence bound, outside the
            tolerance band), which a case cannot hold; names the file and the column.
        """
        measured = {c.name: c for c in self.contributors}
        contributors = []
        for c in self.case.contributors:
            m = measured.get(c.name)
            if m is None or not m.has_spread:
                contributors.append(c)
                continue
            cp, shift = m.written(conservative)
            if shift > 1.0:
                what = "the upper confidence bound of the offset" if conservative else "the mean"
                raise CaseError(
                    f"mean_shift {shift:.4g} > 1: {what} lies outside ±{c.tolerance:g} of the nominal "
                    f"{c.nominal:g}, which a case cannot hold (re-centre the process or widen the tolerance)",
                    file=self.source, field=f"column {c.name}",
                )
            k = c.cheapest_option_holding(c.tolerance) if c.processes else None
            if k is None:
                contributors.append(replace(c, cp=cp, mean_shift=shift, distribution="normal"))
            else:
                processes = tuple(replace(p, cp=cp) if i == k else p for i, p in enumerate(c.processes))
                contributors.append(replace(c, mean_shift=shift, distribution="normal", processes=processes))
        return replace(self.case, contributors=tuple(contributors), path=None, sha256=None)


# --------------------------------------------------------------------------- reading


def _read_columns(table: DataTable, case: Case) -> dict[str, tuple[np.ndarray, tuple[int, ...]]]:
    names = case.names
    at = {}
    for i, name in enumerate(table.header):
        if not name:
            table.fail(f"column {i + 1} has no name (the header names case contributors)", table.header_row)
        if name not in names:
            table.fail(f"{name!r} is not a contributor of the case{did_you_mean(name, names)}",
                       table.header_row, name)
        if name in at:
            table.fail("appears twice in the header", table.header_row, name)
        at[name] = i
    if not at:
        table.fail("has no columns (the header names case contributors)", table.header_row)
    out = {}
    for name, i in at.items():
        values, rows = [], []
        for row, cells in table.rows:
            if cells[i]:
                values.append(number(table, cells[i], row, name))
                rows.append(row)
        if len(values) < 2:
            table.fail(f"{len(values)} value{'s' if len(values) != 1 else ''}: a capability needs at least 2",
                       None, name)
        out[name] = (np.array(values), tuple(rows))
    return out


def _one(name: str, x: np.ndarray, case: Case, confidence: float) -> MeasuredCapability:
    c = case.contributor(name)
    n = x.size
    mean = float(np.mean(x))
    std = float(np.std(x, ddof=1))
    t, x0 = c.tolerance, c.nominal
    offset = mean - x0
    outside = int(np.count_nonzero(np.abs(x - x0) > t * (1.0 + OUTSIDE_RTOL)))
    warnings = []
    if n < FEW_PARTS:
        warnings.append(f"only {n} parts: a capability from fewer than {FEW_PARTS} parts is unreliable "
                        "(common practice)")
    if std > 0:
        cp = t / (3.0 * std)
        cpk = (t - abs(offset)) / (3.0 * std)
        cp_low, cp_high = cp_interval(cp, n, confidence)
        cpk_low, cpk_high = cpk_interval(cpk, n, confidence)
        offset_high = offset_upper_bound(offset, std, n, confidence)
        statistic, pvalue = anderson_darling_normal(x)
        rejected = bool(pvalue < 1.0 - confidence)
        alternative, distances = _closest_alternative(x, mean, std)
        suggested = alternative if rejected else None
        if rejected:
            warnings.append(f"Anderson-Darling rejects the normal distribution (p = {pvalue:.3g} < "
                            f"{1 - confidence:.3g}); the parts look closer to {alternative} "
                            "(cp assumes a normal spread)")
    else:
        cp = cpk = cp_low = cp_high = cpk_low = cpk_high = math.inf
        offset_high = abs(offset)
        statistic = pvalue = math.nan
        rejected, suggested, distances = False, None, {}
        warnings.append("every value is the same (no spread measured: check the gauge's resolution); "
                        "a written case keeps this contributor's cp and mean_shift")
    if outside:
        warnings.append(f"{outside} of {n} parts outside ±{t:g} of the nominal {x0:g}")
    if std > 0 and c.distribution != "normal":
        warnings.append(f"the case has it {c.distribution}; a written case makes it normal with the measured cp")
    if std > 0 and c.processes:
        k = c.cheapest_option_holding(c.tolerance)
        if k is not None:
            warnings.append(f"a written case puts the measured cp on process {c.processes[k].name!r} "
                            f"(the one making ±{t:g})")
    return MeasuredCapability(
        name=name, n=n, mean=mean, std=std, nominal=x0, tolerance=t, offset=offset,
        mean_shift=abs(offset) / t, cp=cp, cpk=cpk, cp_ci_low=cp_low, cp_ci_high=cp_high,
        cpk_ci_low=cpk_low, cpk_ci_high=cpk_high, offset_ci_high=offset_high,
        ad_statistic=statistic, ad_pvalue=pvalue, normal_rejected=rejected, suggested=suggested,
        ks_distance=distances, outside=outside, units=case.contributor_units(name),
        warnings=tuple(warnings),
    )


def capability(
    case: Case,
    measurements: str | os.PathLike | Mapping,
    *,
    confidence: float = DEFAULT_CONFIDENCE,
) -> CapabilityStudy:
    """Cp, Cpk, mean shift and their confidence bounds from measured parts.

    Parameters
    ----------
    case : Case
        Gives each measured contributor's nominal and ± tolerance.
    measurements : str, path-like or mapping
        A wide CSV file (header: contributor names of the case; one measured value per
        row; columns may have different lengths; ``#`` lines are comments), or a mapping
        / DataFrame of name -> values.
    confidence : float
        Level of the confidence intervals and of the normality test (rejected when the
        p-value is below ``1 − confidence``) [-].

    Returns
    -------
    CapabilityStudy

    Raises
    ------
    CaseError
        One line naming file, row and column: a column that is not a contributor of the
        case, a cell that is not a number, a column with fewer than 2 values.
    UsageError
        ``confidence`` outside (0, 1).

    Examples
    --------
    >>> import allocator
    >>> case = allocator.load_case("cases/gearbox_end_play.toml")
    >>> study = capability(case, {"spacer": [20.001, 19.998, 20.004, 20.0, 19.997, 20.002]})
    >>> round(study["spacer"].cp, 3), study["spacer"].n
    (1.936, 6)
    """
    _alpha(confidence)
    if isinstance(measurements, (str, os.PathLike)):
        table = read_csv(measurements)
    else:
        table = from_columns(measurements, label="<measurements>")
    columns = _read_columns(table, case)
    results = tuple(_one(name, values, case, float(confidence)) for name, (values, _) in columns.items())
    n_warn = sum(len(r.warnings) for r in results)
    message = (f"{len(results)} contributor{'s' if len(results) != 1 else ''} measured"
               + (f", {n_warn} warning{'s' if n_warn != 1 else ''}" if n_warn else ""))
    return CapabilityStudy(status=_status.OK, message=message, confidence=float(confidence),
                           contributors=results, source=table.label, case=case)
