"""Cost curves from supplier quotes: least squares on relative residuals, a family chosen by AICc.

A designer rarely knows a curve's ``a``, ``b``, ``k`` or ``c``; what they have is a few
quotes per part (a price at two to six tolerances, from one or several suppliers).
:func:`fit_costs` reads them (CSV header ``contributor,supplier,tolerance,cost``), fits every
formula family of the cost registry (:mod:`allocator.costs.registry`) to each group
(contributor, supplier) and chooses one family per group:

- **Objective**: the sum of squared relative residuals ``r_i = C(t_i)/cost_i − 1``, so a
  cheap part and an expensive one weigh alike and "10 % off" means the same everywhere.
- **Bounds**: the registry's parameter bounds (``a ≥ 0``, ``b``, ``k``, ``c`` > 0; a
  strict bound is held as ``≥ 0`` in the fit and a fit that ends on it is reported).
- **Starts**: every formula family is ``a + b·φ(t)``, linear in ``a`` and ``b``; for each
  value of the remaining parameter (``k`` or ``c``) on a grid, bounded linear least
  squares (:func:`nonnegative_pair`, closed form) gives the best ``a, b`` exactly. The best grid
  point is refined by a bounded scalar search of this profile, then every parameter is
  polished together by :func:`scipy.optimize.least_squares` with bounds; the better of
  the two is kept.
- **Choice**: the corrected Akaike criterion ``AICc = n ln(RSS/n) + 2p + 2p(p+1)/(n−p−1)``
  (``p`` curve parameters; the residual variance is not counted). Families within
  :data:`TIE` of the lowest AICc count as tied and the one with the fewest parameters is
  chosen; a family with ``n ≤ p + 1`` quotes has no AICc and is chosen only when no family
  has one (then the one with the fewest parameters). See docs/quotes.md.

References
----------
.. [1] C. M. Hurvich and C.-L. Tsai, "Regression and time series model selection in small
   samples", Biometrika 76(2):297-307, 1989 (AICc).
.. [2] K. P. Burnham and D. R. Anderson, Model Selection and Multimodel Inference, 2nd ed.,
   Springer, 2002 (a difference below 2 as "substantial support" for both models).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Mapping

import numpy as np

from . import status as _status
from .costs import FAMILIES, CostCurve, check_curve
from .datafile import DataTable, from_columns, number, read_csv, where
from .errors import CaseError, UsageError, did_you_mean

if TYPE_CHECKING:
    import pandas as pd
    from numpy.typing import ArrayLike

    from .costs.family import CurveFamily
    from .model import Case

__all__ = [
    "FITTED_CURVES",
    "QUOTE_COLUMNS",
    "FamilyFit",
    "CostFit",
    "CostFits",
    "fit_curve",
    "fit_costs",
    "nonnegative_pair",
]

QUOTE_COLUMNS = ("contributor", "supplier", "tolerance", "cost")
REQUIRED_COLUMNS = ("contributor", "tolerance", "cost")
FITTED_CURVES: tuple[str, ...] = tuple(name for name, f in FAMILIES.items() if not f.piecewise)
TIE = 2.0  # AICc difference counted as a tie (Burnham & Anderson 2002: below 2, both supported)
FAR_OFF = 0.10  # a quote this far from the fit (relative) is worth a question to the supplier
FAR_OUTSIDE = 1.5  # a tolerance beyond the quoted range by this factor is "far" outside
# relative residuals below this are round-off, not information: the rms in AICc is floored
RMS_FLOOR = 1e-9
# a curve whose cost falls by less than this (relative) over the quoted range is flat
FLAT = 1e-6
UNNAMED_SUPPLIER = "unnamed"  # process name for a group without a supplier beside named ones

# start grids of the parameter that is not linear, by parameter name (t: the quoted tolerances)
_START_GRIDS = {
    "k": lambda t: np.geomspace(0.05, 8.0, 48),  # exponent [-]
    "c": lambda t: np.geomspace(0.01 / t.max(), 60.0 / t.min(), 64),  # decay rate [1/length]
}


# --------------------------------------------------------------------------- one curve


@dataclass(frozen=True)
class FamilyFit:
    """One family fitted to one group of quotes.

    Attributes
    ----------
    curve : str
        The family's name (``reciprocal`` ...).
    params : dict
        Parameter name -> value (the family's own parameters only).
    rms_relative : float
        Root mean square of the relative residuals [-].
    max_relative : float
        Largest absolute relative residual [-].
    residuals : tuple of float
        ``C(t_i)/cost_i − 1`` per quote, in the order given [-].
    criterion : float
        AICc (``inf`` when the family has too many parameters for the quotes).
    success : bool
        The least-squares solvers ended normally with finite parameters.
    message : str
    """

    curve: str
    params: dict
    rms_relative: float
    max_relative: float
    residuals: tuple
    criterion: float
    success: bool
    message: str = ""

    @property
    def n_parameters(self) -> int:
        """Number of fitted curve parameters."""
        return len(self.params)

    @property
    def cost_curve(self) -> CostCurve:
        """The fitted curve as a :class:`~allocator.costs.CostCurve`."""
        return CostCurve(curve=self.curve, **self.params)


def aicc(rss: float, n: int, p: int) -> float:
    """Corrected Akaike criterion of a least-squares fit (Hurvich & Tsai 1989).

    Parameters
    ----------
    rss : float
        Sum of squared (relative) residuals [-].
    n : int
        Number of points.
    p : int
        Number of fitted curve parameters.

    Returns
    -------
    float
        ``n ln(max(RSS/n, RMS_FLOOR²)) + 2p + 2p(p+1)/(n−p−1)``; ``inf`` when ``n ≤ p + 1``.

    Examples
    --------
    >>> round(aicc(0.01, 6, 2), 4)
    -30.3816
    """
    if n - p - 1 <= 0:
        return math.inf
    mean_square = max(rss / n, RMS_FLOOR**2)
    return n * math.log(mean_square) + 2 * p + 2 * p * (p + 1) / (n - p - 1)


def _structure(fam: CurveFamily):
    """Parameter names, the one not linear (or None), lower bounds and the fixed extras."""
    names = tuple(q.name for q in fam.parameters)
    extra = {k: v for k, v in fam.one(CostCurve(fam.name)).items() if k not in names}
    nonlinear = [q for q in names if q not in ("a", "b")]
    lower = np.array([q.lower for q in fam.parameters], dtype=float)
    return names, (nonlinear[0] if nonlinear else None), lower, extra


def _model(fam, names, extra, theta, t):
    p = {**extra, **dict(zip(names, (float(x) for x in theta)))}
    with np.errstate(over="ignore", under="ignore", invalid="ignore", divide="ignore"):
        return np.asarray(fam.value(p, t), dtype=float)


def nonnegative_pair(u: np.ndarray, w: np.ndarray) -> tuple[float, float]:
    """``(a, b) ≥ 0`` minimising ``‖a·u + b·w − 1‖²``: bounded linear least squares in closed form.

    The unconstrained least-squares solution (SVD, columns scaled to unit length) when both
    parts are ≥ 0; otherwise the better of the two one-column solutions (a convex quadratic
    in two variables whose free minimum is infeasible has its minimum on an edge).

    Examples
    --------
    >>> u, w = np.array([1.0, 1.0, 1.0]), np.array([1.0, 2.0, 3.0])
    >>> a, b = nonnegative_pair(u, w * 0.5)
    >>> round(a, 12), round(b, 12)
    (1.0, 0.0)
    """
    ones = np.ones(u.size)
    scale = np.array([np.linalg.norm(u), np.linalg.norm(w)])
    scale[scale == 0] = 1.0
    matrix = np.column_stack([u, w]) / scale
    candidates = []
    try:
        x = np.linalg.lstsq(matrix, ones, rcond=None)[0] / scale
        if np.all(x >= 0) and np.all(np.isfinite(x)):
            candidates.append((float(x[0]), float(x[1])))
    except np.linalg.LinAlgError:
        pass
    uu, ww = float(u @ u), float(w @ w)
    candidates.append((max(float(u.sum()) / uu, 0.0) if uu > 0 else 0.0, 0.0))
    candidates.append((0.0, max(float(w.sum()) / ww, 0.0) if ww > 0 else 0.0))

    def rss(x):
        r = x[0] * u + x[1] * w - 1.0
        return float(r @ r)

    return min(candidates, key=rss)


def fit_curve(tolerance: ArrayLike, cost: ArrayLike, curve: str) -> FamilyFit:
    """Fit one cost-curve family to quotes by least squares on relative residuals.

    Parameters
    ----------
    tolerance : array_like
        Quoted ± tolerances, > 0, at least two different ones [length].
    cost : array_like
        Quoted unit prices, > 0 [currency].
    curve : str
        A formula family of the registry (:data:`FITTED_CURVES`).

    Returns
    -------
    FamilyFit

    Notes
    -----
    Minimises :math:`\\sum_i (C(t_i)/c_i - 1)^2` within the registry's bounds. Every formula
    family is :math:`a + b\\,\\varphi(t; g)`, linear in ``a, b``: for ``g`` (``k`` or ``c``)
    on a grid the bounded linear problem is solved exactly, the best grid point refined by
    a bounded scalar search, and the whole vector polished by
    :func:`scipy.optimize.least_squares`.

    Examples
    --------
    >>> fit = fit_curve([0.01, 0.02, 0.05], [12.0, 7.0, 4.0], "reciprocal")
    >>> {k: round(v, 4) for k, v in fit.params.items()}, round(fit.rms_relative, 6)
    ({'a': 2.0, 'b': 0.1}, 0.0)
    """
    from scipy import optimize

    if curve not in FITTED_CURVES:
        raise UsageError(
            f"curve: {curve!r} cannot be fitted (expected one of {', '.join(FITTED_CURVES)})"
            f"{did_you_mean(curve, FITTED_CURVES)}"
        )
    fam = FAMILIES[curve]
    t = np.asarray(tolerance, dtype=float)
    c = np.asarray(cost, dtype=float)
    n = t.size
    names, nonlinear, lower, extra = _structure(fam)
    ia, ib = names.index("a"), names.index("b")

    def residuals(theta):
        return _model(fam, names, extra, theta, t) / c - 1.0

    def profile(g):
        """Best (a, b) for the non-linear parameter ``g``: bounded linear least squares."""
        theta = np.zeros(len(names))
        if nonlinear is not None:
            theta[names.index(nonlinear)] = g
        basis_theta = theta.copy()
        basis_theta[ib] = 1.0
        basis = _model(fam, names, extra, basis_theta, t)
        theta[ia], theta[ib] = nonnegative_pair(1.0 / c, np.nan_to_num(basis, posinf=1e300) / c)
        r = residuals(theta)
        rss = float(r @ r) if np.all(np.isfinite(r)) else math.inf
        return rss, theta

    if nonlinear is None:
        best_rss, best = profile(None)
    else:
        grid = _START_GRIDS[nonlinear](t)
        scores = [profile(g) for g in grid]
        rss_grid = np.array([s[0] for s in scores])
        j = int(np.argmin(rss_grid))
        best_rss, best = scores[j]
        lo, hi = grid[max(j - 1, 0)], grid[min(j + 1, len(grid) - 1)]
        if hi > lo:
            found = optimize.minimize_scalar(
                lambda u: profile(math.exp(u))[0], bounds=(math.log(lo), math.log(hi)),
                method="bounded", options={"xatol": 1e-10},
            )
            rss, theta = profile(math.exp(found.x))
            if rss < best_rss:
                best_rss, best = rss, theta

    # polish every parameter together (a strict bound held as >= its value in the fit)
    upper = np.full(len(names), np.inf)
    start = np.clip(best, lower, None)
    start = np.where(start <= lower, lower + 1e-12 * np.maximum(np.abs(start), 1.0), start)
    success, message = True, ""
    try:
        polished = optimize.least_squares(
            residuals, start, bounds=(lower, upper), x_scale="jac", method="trf",
            ftol=1e-14, xtol=1e-14, gtol=1e-14, max_nfev=2000,
        )
        r = polished.fun
        rss = float(r @ r)
        if np.isfinite(rss) and rss < best_rss:
            best_rss, best = rss, polished.x
        message = polished.message
    except ValueError as err:  # a start the solver refuses: keep the profile's optimum
        message = str(err)
    r = residuals(best)
    success = bool(np.all(np.isfinite(best)) and np.all(np.isfinite(r)))
    params = {name: float(v) for name, v in zip(names, best)}
    rss = float(r @ r) if success else math.inf
    return FamilyFit(
        curve=curve,
        params=params,
        rms_relative=math.sqrt(rss / n) if success else math.inf,
        max_relative=float(np.max(np.abs(r))) if success else math.inf,
        residuals=tuple(float(x) for x in r),
        criterion=aicc(rss, n, len(names)) if success else math.inf,
        success=success,
        message=message,
    )


def choose(fits) -> FamilyFit:
    """The family chosen among ``fits`` (see the module docstring and docs/quotes.md).

    Lowest AICc, with every family within :data:`TIE` of it counted as tied and the one
    with the fewest parameters taken among those (then the lower AICc); when no family
    has an AICc (too few quotes), the successful fit with the fewest parameters.
    """
    usable = [f for f in fits if f.success]
    if not usable:
        return fits[0]
    defined = [f for f in usable if math.isfinite(f.criterion)]
    if not defined:
        return min(usable, key=lambda f: (f.n_parameters, f.rms_relative))
    best = min(f.criterion for f in defined)
    tied = [f for f in defined if f.criterion <= best + TIE]
    return min(tied, key=lambda f: (f.n_parameters, f.criterion))


# --------------------------------------------------------------------------- groups


@dataclass(frozen=True)
class CostFit:
    """The quotes of one contributor from one supplier and the curve chosen for them.

    Attributes
    ----------
    contributor : str
    supplier : str
        ``""`` when the quotes name none.
    tolerances, costs : tuple of float
        The quotes [length], [currency].
    rows : tuple of int
        Their rows in the quotes file.
    fit : FamilyFit
        The chosen (or forced) family.
    families : tuple of FamilyFit
        Every family tried (only the forced one with ``curve=``).
    limits : tuple of float
        The ``[tightest, loosest]`` range written to a case: the quoted range, widened to
        hold the case's current tolerance when it lies outside [length].
    warnings : tuple of str
    """

    contributor: str
    supplier: str
    tolerances: tuple
    costs: tuple
    rows: tuple
    fit: FamilyFit
    families: tuple
    limits: tuple
    warnings: tuple = field(default=())

    @property
    def curve(self) -> str:
        """The chosen (or forced) family."""
        return self.fit.curve

    @property
    def points(self) -> int:
        """Number of quotes in the group."""
        return len(self.tolerances)

    @property
    def params(self) -> dict:
        """The chosen family's parameters, by name."""
        return dict(self.fit.params)

    @property
    def rms_relative(self) -> float:
        """Root mean square relative residual of the chosen fit [-]."""
        return self.fit.rms_relative

    @property
    def max_relative(self) -> float:
        """Largest absolute relative residual of the chosen fit [-]."""
        return self.fit.max_relative

    @property
    def falls(self) -> bool:
        """True when the fitted cost falls over the quoted range by more than :data:`FLAT`."""
        fam = FAMILIES[self.curve]
        lo, hi = self.quoted_range
        with np.errstate(all="ignore"):
            ends = np.asarray(fam.value(fam.one(self.cost_curve), np.array([lo, hi])), dtype=float)
        return bool(ends[0] - ends[1] > FLAT * abs(ends[1]))

    @property
    def quoted_range(self) -> tuple[float, float]:
        """Tightest and loosest quoted tolerance [length]."""
        return (min(self.tolerances), max(self.tolerances))

    @property
    def cost_curve(self) -> CostCurve:
        """The chosen fit as a :class:`~allocator.costs.CostCurve`."""
        return self.fit.cost_curve

    def to_dict(self) -> dict:
        """JSON-ready dict (contract keys first: contributor ... points)."""
        return {
            "contributor": self.contributor,
            "supplier": self.supplier,
            "curve": self.curve,
            **self.params,
            "rms_relative": self.rms_relative,
            "points": self.points,
            "max_relative": self.max_relative,
            "tolerance_range": list(self.quoted_range),
            "limits": list(self.limits),
            "criterion": {f.curve: (f.criterion if math.isfinite(f.criterion) else None) for f in self.families},
            "residuals": list(self.fit.residuals),
            "warnings": list(self.warnings),
        }


def _warnings(group: CostFit, fam: CurveFamily, case_contributor) -> tuple[str, ...]:
    """The warnings of one group (not errors: the curve is still usable)."""
    out = []
    n, p = group.points, group.fit.n_parameters
    if n < p + 1:
        out.append(
            f"{n} quotes for the {p} parameters of {group.curve}: the curve passes through "
            "every quote and shows no scatter (ask for more quotes)"
        )
    lo, hi = group.quoted_range
    grid = np.geomspace(lo, hi, 64) if hi > lo else np.array([lo])
    p_all = fam.one(group.cost_curve)
    with np.errstate(all="ignore"):
        slope = np.asarray(fam.derivative(p_all, grid), dtype=float)
        bend = np.asarray(fam.curvature(p_all, grid), dtype=float)
    if not np.all(slope < 0) or not group.falls:
        out.append(f"the fitted {group.curve} curve does not fall over the quoted range "
                   "(the quotes do not get cheaper as the tolerance loosens)")
    elif not np.all(bend > 0):
        out.append(f"the fitted {group.curve} curve is not convex over the quoted range")
    for t, r, row in zip(group.tolerances, group.fit.residuals, group.rows):
        off = -r / (1.0 + r)  # quote / fit - 1 (r = fit / quote - 1)
        if abs(off) > FAR_OFF:
            side = "above" if off > 0 else "below"
            out.append(
                f"the quote at ±{t:g} (row {row}) is {100 * abs(off):.0f} % {side} the fit "
                "(ask the supplier)"
            )
    if case_contributor is not None:
        c = case_contributor
        for limit, what in _case_ranges(c):
            if limit < lo / FAR_OUTSIDE or limit > hi * FAR_OUTSIDE:
                out.append(
                    f"the case's {what} ±{limit:g} lies far outside the quoted ±{lo:g} .. ±{hi:g}: "
                    "the curve would be extrapolated there"
                    + (" (the written limits hold the quoted range)" if what != "tolerance" else "")
                )
    return tuple(out)


def _case_ranges(c):
    """The tolerances of a case contributor a fitted curve is used at: current and limits."""
    out = [(c.tolerance, "tolerance")]
    for option in c.options():
        out += [(option.limits[0], "tightest limit"), (option.limits[1], "loosest limit")]
    seen, unique = set(), []
    for limit, what in out:
        if (limit, what) not in seen:
            seen.add((limit, what))
            unique.append((limit, what))
    return unique


# --------------------------------------------------------------------------- the result


@dataclass(frozen=True)
class CostFits:
    """Result of :func:`fit_costs`: one fitted curve per (contributor, supplier).

    Attributes
    ----------
    status : str
        ``optimal`` when every group's fit ended normally, else ``failed``
        (:mod:`allocator.status`).
    message : str
    fits : tuple of CostFit
        In the order the groups first appear in the quotes.
    source : str
        The quotes file (or ``<quotes>``).
    curve : str or None
        The family forced with ``curve=``, None when chosen per group.
    case : Case or None
        The case the contributors were checked against.
    """

    status: str
    message: str
    fits: tuple
    source: str
    curve: str | None = None
    case: object = None

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal' (:mod:`allocator.status`)."""
        return self.status == _status.OPTIMAL

    @property
    def warnings(self) -> tuple[str, ...]:
        """Every group's warnings, each prefixed by its contributor (and supplier)."""
        return tuple(f"{_label(f)}: {w}" for f in self.fits for w in f.warnings)

    def __getitem__(self, key) -> CostFit:
        """The fit of ``contributor`` or of ``(contributor, supplier)``."""
        for f in self.fits:
            if key == f.contributor or key == (f.contributor, f.supplier):
                return f
        raise KeyError(key)

    def to_dict(self) -> dict:
        """``{"status", "message", "fits": [...]}`` (docs/quotes.md)."""
        return {
            "status": self.status,
            "message": self.message,
            "source": self.source,
            "fits": [f.to_dict() for f in self.fits],
        }

    def to_frame(self) -> pd.DataFrame:
        """One row per (contributor, supplier): curve, parameters, residuals, points, warnings."""
        import pandas as pd

        rows = []
        for f in self.fits:
            d = {"contributor": f.contributor, "supplier": f.supplier, "curve": f.curve,
                 "a": f.params.get("a"), "b": f.params.get("b"), "k": f.params.get("k"),
                 "c": f.params.get("c"), "rms_relative": f.rms_relative,
                 "max_relative": f.max_relative, "points": f.points,
                 "tightest": f.quoted_range[0], "loosest": f.quoted_range[1]}
            for fam in f.families:
                d[f"aicc {fam.curve}"] = fam.criterion
            d["warnings"] = "; ".join(f.warnings)
            rows.append(d)
        return pd.DataFrame(rows).set_index(["contributor", "supplier"])

    def _repr_html_(self) -> str:
        from .display import result_html

        return result_html(f"Cost fits: {self.status}", self.to_frame(), self.message)

    def __repr__(self) -> str:
        lines = [f"CostFits(status={self.status!r}, groups={len(self.fits)})"]
        for f in self.fits:
            params = ", ".join(f"{k}={v:.4g}" for k, v in f.params.items())
            lines.append(f"  {_label(f)}: {f.curve} ({params}), rms {100 * f.rms_relative:.2g} %")
        return "\n".join(lines)

    def apply(self, case: Case | None = None) -> Case:
        """A copy of ``case`` with the fitted curves (see docs/quotes.md).

        One supplier for a contributor: its curve, with the quoted range (widened to hold
        the current tolerance) as ``limits``; several: one process per supplier, named by
        the supplier, so that allocation chooses between them. The contributor's previous
        ``cost``, ``limits`` and processes are replaced; everything else is kept.

        Parameters
        ----------
        case : Case, optional
            Default: the case given to :func:`fit_costs`.

        Returns
        -------
        Case

        Raises
        ------
        UsageError
            No case, a contributor the case does not have, or a fit that did not succeed.
        CaseError
            A fitted parameter on its strict bound (``b = 0``: quotes that never get cheaper),
            which a case cannot hold; names the quotes file and the group's first row.
        """
        from .model import Process

        case = case if case is not None else self.case
        if case is None:
            raise UsageError("apply: no case to write the fitted curves into (give case=)")
        by_name: dict[str, list[CostFit]] = {}
        for f in self.fits:
            if f.contributor not in case.names:
                raise UsageError(f"apply: the case has no contributor {f.contributor!r}"
                                 f"{did_you_mean(f.contributor, case.names)}")
            if not f.fit.success:
                raise UsageError(f"apply: the fit of {_label(f)} did not succeed ({f.fit.message})")
            problem = check_curve(f.cost_curve, f.limits)
            if problem or not f.falls:  # b on (or next to) its bound: quotes that never get cheaper
                raise CaseError(
                    f"the {f.curve} curve fitted to {_label(f)} is flat"
                    + (f" ({problem})" if problem else "")
                    + ": its quotes do not get cheaper as the tolerance loosens, so it cannot "
                    "go into a case (check the quotes, or give the part a table cost)",
                    file=self.source, field=where(f.rows[0], "cost"),
                )
            by_name.setdefault(f.contributor, []).append(f)
        contributors = []
        for c in case.contributors:
            groups = by_name.get(c.name)
            if not groups:
                contributors.append(c)
            elif len(groups) == 1:
                g = groups[0]
                contributors.append(replace(c, limits=tuple(g.limits), cost=g.cost_curve, processes=()))
            else:
                processes = tuple(
                    Process(name=g.supplier or UNNAMED_SUPPLIER, limits=tuple(g.limits), cost=g.cost_curve)
                    for g in groups
                )
                contributors.append(replace(c, limits=None, cost=None, processes=processes))
        return replace(case, contributors=tuple(contributors), path=None, sha256=None)


def _label(f: CostFit) -> str:
    return f"{f.contributor} ({f.supplier})" if f.supplier else f.contributor


# --------------------------------------------------------------------------- reading


def _read_quotes(table: DataTable):
    """Groups ``{(contributor, supplier): [(row, t, cost), ...]}`` in order of appearance."""
    header = [h.lower() for h in table.header]
    for i, name in enumerate(header):
        if name not in QUOTE_COLUMNS:
            table.fail(f"unknown column {table.header[i]!r}{did_you_mean(name, QUOTE_COLUMNS)} "
                       f"(the header is {','.join(QUOTE_COLUMNS)})", table.header_row, table.header[i] or None)
        if header.index(name) != i:
            table.fail(f"column {name!r} appears twice", table.header_row, name)
    for name in REQUIRED_COLUMNS:
        if name not in header:
            table.fail(f"missing column {name!r} (the header is {','.join(QUOTE_COLUMNS)})", table.header_row)
    at = {name: header.index(name) for name in header}
    groups: dict[tuple[str, str], list] = {}
    for row, cells in table.rows:
        contributor = cells[at["contributor"]]
        if not contributor:
            table.fail("empty: every quote names its contributor", row, "contributor")
        supplier = cells[at["supplier"]] if "supplier" in at else ""
        t = _cell_number(table, cells[at["tolerance"]], row, "tolerance", "a ± tolerance")
        price = _cell_number(table, cells[at["cost"]], row, "cost", "a quoted cost")
        groups.setdefault((contributor, supplier), []).append((row, t, price))
    if not groups:
        table.fail("has a header but no quotes")
    for (contributor, supplier), quotes in groups.items():
        if len({t for _, t, _ in quotes}) < 2:
            who = f"{contributor!r}" + (f" from {supplier!r}" if supplier else "")
            only = "one quote only" if len(quotes) == 1 else "quotes at one tolerance only"
            table.fail(f"{who} has {only}: a curve needs quotes at two or more tolerances",
                       quotes[0][0], "tolerance")
    return groups


def _cell_number(table: DataTable, text: str, row: int, column: str, what: str) -> float:
    """A positive number from a quote's cell (empty, text and values <= 0 refused)."""
    if not text:
        table.fail(f"empty: every quote needs {what}", row, column)
    value = number(table, text, row, column)
    if not value > 0:
        table.fail(f"{what} must be > 0 (got {text})", row, column)
    return value


def _written_limits(groups, contributor) -> list[tuple[float, float]]:
    """The ``limits`` written for each group of one contributor: the quoted ranges.

    When no range holds the contributor's current tolerance (a case refuses a tolerance
    outside every range), the range nearest to it (in ratio) is widened to hold it.
    """
    ranges = [(min(t), max(t)) for t in groups]
    if contributor is None:
        return ranges
    t = contributor.tolerance
    if any(lo <= t <= hi for lo, hi in ranges):
        return ranges
    gap = [max(lo / t, t / hi) for lo, hi in ranges]
    j = int(np.argmin(gap))
    ranges[j] = (min(ranges[j][0], t), max(ranges[j][1], t))
    return ranges


def fit_costs(
    quotes: str | os.PathLike | Mapping,
    *,
    curve: str | None = None,
    case: Case | None = None,
) -> CostFits:
    """Fit a cost curve to each contributor's (and supplier's) quotes.

    Parameters
    ----------
    quotes : str, path-like or mapping
        A CSV file with header ``contributor,supplier,tolerance,cost`` (``supplier`` may be
        empty or left out; ``#`` lines are comments), or a mapping / DataFrame with those
        columns.
    curve : {'reciprocal', 'reciprocal-power', 'exponential'}, optional
        Force one family for every group; default: chosen per group by AICc.
    case : Case, optional
        Check the contributors against it (an unknown one is bad input) and warn where its
        tolerances lie far outside the quotes; :meth:`CostFits.apply` then writes into it.

    Returns
    -------
    CostFits

    Raises
    ------
    CaseError
        Bad quotes, one line naming file, row and column: a missing or unknown column,
        a cell that is not a number, a tolerance or cost ≤ 0, a contributor not in
        ``case``, a group with quotes at one tolerance only.
    UsageError
        ``curve`` is not a formula family.

    Examples
    --------
    >>> fits = fit_costs({"contributor": ["spacer"] * 3, "tolerance": [0.01, 0.02, 0.05],
    ...                   "cost": [12.0, 7.0, 4.0]})
    >>> fits.status, fits["spacer"].curve, round(fits["spacer"].params["b"], 6)
    ('optimal', 'reciprocal', 0.1)
    """
    if curve is not None and curve not in FITTED_CURVES:
        raise UsageError(
            f"--curve: {curve!r} is not a curve that can be fitted (expected one of "
            f"{', '.join(FITTED_CURVES)}){did_you_mean(curve, FITTED_CURVES)}"
        )
    if isinstance(quotes, (str, os.PathLike)):
        table = read_csv(quotes)
    else:
        table = from_columns(quotes, label="<quotes>")
    groups = _read_quotes(table)
    if case is not None:
        for (contributor, _), rows in groups.items():
            if contributor not in case.names:
                table.fail(f"{contributor!r} is not a contributor of the case"
                           f"{did_you_mean(contributor, case.names)}", rows[0][0], "contributor")
    names = (curve,) if curve else FITTED_CURVES
    limits = {}
    for name in dict.fromkeys(contributor for contributor, _ in groups):
        keys = [key for key in groups if key[0] == name]
        owner = case.contributor(name) if case is not None else None
        quoted = [[x[1] for x in groups[key]] for key in keys]
        limits.update(zip(keys, _written_limits(quoted, owner)))
    fits = []
    for (contributor, supplier), rows in groups.items():
        t = np.array([x[1] for x in rows])
        price = np.array([x[2] for x in rows])
        families = tuple(fit_curve(t, price, name) for name in names)
        chosen = families[0] if curve else choose(families)
        owner = case.contributor(contributor) if case is not None else None
        group = CostFit(
            contributor=contributor, supplier=supplier,
            tolerances=tuple(float(x) for x in t), costs=tuple(float(x) for x in price),
            rows=tuple(x[0] for x in rows), fit=chosen, families=families,
            limits=tuple(float(x) for x in limits[(contributor, supplier)]),
        )
        fits.append(replace(group, warnings=_warnings(group, FAMILIES[chosen.curve], owner)))
    failed = [f for f in fits if not f.fit.success]
    n_warn = sum(len(f.warnings) for f in fits)
    if failed:
        status = _status.FAILED
        message = "no usable fit for " + ", ".join(_label(f) for f in failed)
    else:
        status = _status.OPTIMAL
        message = f"{len(fits)} curve{'s' if len(fits) != 1 else ''} fitted" + (
            f", {n_warn} warning{'s' if n_warn != 1 else ''}" if n_warn else "")
    return CostFits(status=status, message=message, fits=tuple(fits), source=table.label,
                    curve=curve, case=case)
