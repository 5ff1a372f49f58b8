"""The allocation problem in arrays, shared by every solver.

:func:`prepare` turns a :class:`~allocator.model.Case`, a stack model and optional held
tolerances into an :class:`AllocationProblem`: which contributors are free, their bounds,
cost curves, counts, σ-factors and mean-shift fractions, and each requirement's nominal
response and sensitivities. The same object then provides what every solver needs around
the optimisation itself, all in plain numpy:

- the requirement statistics at a set of tolerances (:meth:`AllocationProblem.evaluate`),
  which is also the independent re-check of every solution;
- the infeasibility diagnosis at the tightest tolerances (:meth:`AllocationProblem.diagnose`);
- the polish that restores feasibility after a solver's round-off (:meth:`AllocationProblem.polish`);
- the shadow prices from a solver's multipliers (:func:`shadow_prices`);
- the result object (:meth:`AllocationProblem.result`).

Nothing here imports cvxpy or pandas.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Mapping

import numpy as np
from .. import costs, stack
from ..chain import linearise
from ..errors import CaseError, UsageError, did_you_mean
from ..model import HOLD_RTOL, MODELS, Case, CostCurve
from ..ppm import PER_MILLION, fraction_to_ppm, ppm_to_fraction
from .result import Allocation, RequirementResult

__all__ = [
    "AllocationProblem",
    "NeedsDiscrete",
    "CurveSet",
    "RequirementData",
    "RequirementLimits",
    "prepare",
    "check_fix_values",
    "cheapest_unit_cost",
    "sigma_limit_slopes",
    "mean_shift_allowance",
    "shadow_prices",
]

# A solution may sit this far (relative) outside a requirement before it is polished;
# polishing always aims at exact feasibility, this is only what still counts as met.
# Worst case: W <= room·(1 + rtol) with room = min(ȳ − L, U − ȳ) <= W; the excess rtol·room
# then lies within stack.limit_margin (rtol·max(|ȳ|, |L|, |U|, W)), so the analysis of an
# accepted allocation calls it inside its limits.
WORST_CASE_RTOL = stack.LIMIT_RTOL
FALLOUT_RTOL = 1e-6
# A tolerance within this fraction of its range from a bound is reported at that bound.
BOUND_RTOL = 1e-7


class NeedsDiscrete(UsageError):
    """A free contributor needs a choice of process or of listed tolerances."""


def _g(x: float) -> str:
    return f"{x:.4g}"


# --------------------------------------------------------------------------- cost curves


class CurveSet:
    """Many cost curves evaluated at once, vectorised per curve family.

    The curves are grouped by family once (:mod:`allocator.costs.registry`); each group
    keeps its parts' positions and parameter arrays, and every method asks each family
    for its vectorised formula. ``None`` costs nothing. Families with kinks (tables) are
    listed in :attr:`tables`, the positions the solvers treat piece by piece.
    """

    def __init__(self, curves):
        self.curves = tuple(curves)
        self.size = len(self.curves)
        members: dict[str, list[int]] = {}
        for i, c in enumerate(self.curves):  # one pass: cases may have thousands of parts
            if c is not None:
                members.setdefault(c.curve, []).append(i)
        self.groups = []  # (family, positions, parameters)
        for name, index in members.items():
            fam = costs.family(name)
            params = fam.params([self.curves[i] for i in index])
            self.groups.append((fam, np.array(index, dtype=int), params))
        self._index_tables()

    def _index_tables(self) -> None:
        self.tables = sorted(int(i) for fam, idx, _ in self.groups if fam.piecewise for i in idx)

    def subset(self, index) -> "CurveSet":
        """The curves at positions ``index`` (increasing), without re-reading the curves."""
        index = np.asarray(index, dtype=int)
        position = np.full(self.size, -1)
        position[index] = np.arange(index.size)
        out = CurveSet.__new__(CurveSet)
        out.curves = tuple(self.curves[i] for i in index)
        out.size = index.size
        out.groups = []
        for fam, idx, params in self.groups:
            keep = position[idx] >= 0
            if keep.any():
                out.groups.append((fam, position[idx][keep], fam.take(params, keep)))
        out._index_tables()
        return out

    def _each(self, method: str, t, *extra, fill: float = 0.0, dtype=float) -> np.ndarray:
        """``family.method(params, t[..., idx], extra[..., idx]...)`` per group, ``fill`` elsewhere.

        ``t`` is one value per part, shape (parts,), or one row per point, shape
        (points, parts) (a sweep's many right-hand sides at once); ``extra`` arrays are
        (parts,) or of ``t``'s shape. Formula families take the rows in one call; a
        table's formulas take one point at a time.
        """
        t = np.asarray(t, dtype=float)
        out = np.full(t.shape[:-1] + (self.size,), fill, dtype=dtype)
        for fam, idx, params in self.groups:
            args = [None if e is None else np.asarray(e)[..., idx] for e in extra]
            call = getattr(fam, method)
            if t.ndim == 1 or not fam.piecewise or method in getattr(fam, "rows_at_once", ()):
                out[..., idx] = call(params, t[..., idx], *args)
                continue
            for row in range(t.shape[0]):
                rows = [None if a is None else (a[row] if a.ndim == 2 else a) for a in args]
                out[row, idx] = call(params, t[row, idx], *rows)
        return out

    def value(self, t) -> np.ndarray:
        """Unit cost of each contributor at ``t`` [currency]; NaN where undefined."""
        return self._each("value", t)

    def derivative(self, t) -> np.ndarray:
        """d cost / d t of each contributor at ``t`` [currency/length]."""
        return self._each("derivative", t)

    def curvature(self, t) -> np.ndarray:
        """d² cost / d t² of each contributor at ``t`` (0 for tables and None)."""
        return self._each("curvature", t)

    def at_breakpoint(self, t, rtol: float = 1e-9) -> np.ndarray:
        """True where a table contributor sits on one of its listed tolerances (a kink)."""
        t = np.asarray(t, dtype=float)
        out = np.zeros(self.size, dtype=bool)
        for fam, idx, params in self.groups:
            out[idx] = fam.at_breakpoint(params, t[idx], rtol)
        return out

    def linear_minimiser(self, s) -> np.ndarray:
        """Per part, the unclipped minimiser of ``C(t) + s t`` (inf where nothing pulls)."""
        return self._each("linear_minimiser", s, fill=np.inf)

    def quadratic_minimiser(self, q, lo, hi, shift=None, start=None) -> np.ndarray:
        """Per part, the minimiser of ``C(t) + q t²/2 (+ shift·t)`` (clip to [lo, hi] after);
        ``start``: a guess per part where an iterative family starts."""
        return self._each("quadratic_minimiser", q, lo, hi, shift, start, fill=np.inf)


def scaled_curve(curve: CostCurve | None, length: float, cost: float) -> CostCurve | None:
    """The curve of ``cost(length·τ) / cost`` as a function of the scaled tolerance ``τ``.

    Solving in ``τ = t / length`` with costs divided by ``cost`` makes the problem the
    solver sees independent of the case's units (mm, m, μm give the same numbers).
    """
    if curve is None:
        return None
    return costs.family_of(curve).scaled(curve, length, cost)


# --------------------------------------------------------------------------- requirements


@dataclass(frozen=True)
class RequirementData:
    """One requirement as the solvers see it (first-order in the contributors)."""

    name: str
    nominal: float  # ȳ [response]
    sensitivity: np.ndarray  # a_i in case order [response/length]
    lower: float | None
    upper: float | None
    fallout_ppm: float
    linear: bool


@dataclass(frozen=True)
class RequirementLimits:
    """The limits in force for one solve (a requirement's own, or overridden)."""

    lower: float | None
    upper: float | None
    fallout_ppm: float

    @property
    def fallout(self) -> float:
        return ppm_to_fraction(self.fallout_ppm)

    @property
    def two_sided(self) -> bool:
        return self.lower is not None and self.upper is not None


def _tails(mean: float, sigma: float, limits: RequirementLimits) -> tuple[float, float, float, float]:
    """``(z_L, φ(z_L), z_U, φ(z_U))`` at ``σ > 0``, ``φ`` without its ``1/√(2π)``
    (0, 0 for a missing limit): the terms of σ_max's derivatives."""
    d_low, d_up = stack.room(mean, limits.lower, limits.upper)
    phi_l = z_l = phi_u = z_u = 0.0
    if limits.lower is not None:
        z_l = -d_low / sigma
        phi_l = math.exp(-0.5 * z_l * z_l)
    if limits.upper is not None:
        z_u = -d_up / sigma
        phi_u = math.exp(-0.5 * z_u * z_u)
    return z_l, phi_l, z_u, phi_u


def sigma_limit_slopes(mean: float, sigma: float, limits: RequirementLimits) -> dict[str, float]:
    """Partial derivatives of the largest allowed σ (:func:`allocator.stack.sigma_limit`).

    Parameters
    ----------
    mean : float
        Response mean μ [response].
    sigma : float
        ``σ_max = sigma_limit(μ, p, L, U)`` at that mean [response].
    limits : RequirementLimits
        ``L``, ``U`` and the fallout target ``p``.

    Returns
    -------
    dict
        ``mean``, ``lower``, ``upper`` [-] and ``fallout`` [response per unit fraction]:
        ∂σ_max/∂μ, ∂σ_max/∂L, ∂σ_max/∂U, ∂σ_max/∂p.

    Notes
    -----
    σ_max solves ``F = Φ(z_L) + Φ(z_U) − p = 0`` with ``z_L = (L − μ)/σ``,
    ``z_U = (μ − U)/σ``; by the implicit function theorem, with
    ``D = z_L φ(z_L) + z_U φ(z_U)`` (< 0),

    .. math::

        \\frac{∂σ}{∂μ} = \\frac{φ(z_U) − φ(z_L)}{D},\\quad
        \\frac{∂σ}{∂L} = \\frac{φ(z_L)}{D},\\quad
        \\frac{∂σ}{∂U} = -\\frac{φ(z_U)}{D},\\quad
        \\frac{∂σ}{∂p} = -\\frac{σ}{D}.

    A missing limit drops its term. At σ_max = 0 (mean on a limit) the one-sided limit
    values ``∓1/z`` with ``z = Φ⁻¹(1 − p)`` are returned.
    """
    d_low, d_up = stack.room(mean, limits.lower, limits.upper)
    if not sigma > 0:
        z = -stack.normal_quantile(limits.fallout)
        if d_up <= d_low:
            return {"mean": -1.0 / z, "lower": 0.0, "upper": 1.0 / z, "fallout": 0.0}
        return {"mean": 1.0 / z, "lower": -1.0 / z, "upper": 0.0, "fallout": 0.0}
    z_l, phi_l, z_u, phi_u = _tails(mean, sigma, limits)
    # the 1/sqrt(2π) of φ cancels in every ratio except ∂σ/∂p
    d = z_l * phi_l + z_u * phi_u
    return {
        "mean": (phi_u - phi_l) / d,
        "lower": phi_l / d,
        "upper": -phi_u / d,
        "fallout": -sigma * math.sqrt(2.0 * math.pi) / d,
    }


def mean_shift_allowance(nominal: float, delta: float, limits: RequirementLimits) -> tuple[float, float, float]:
    """Largest σ with the mean anywhere in ``ȳ ± δ``, its slope in δ, and the worst mean.

    Returns
    -------
    (g, dg/dδ, worst mean) : (float, float, float)
        ``g(δ) = min(σ_max(ȳ − δ), σ_max(ȳ + δ))`` [response]
        (:func:`allocator.stack.mean_shift_sigma_limit`), its right derivative [-] and
        the band end that attains the minimum.

    Notes
    -----
    ``g`` is decreasing; it is concave on its domain (checked numerically in the tests),
    so a tangent ``g(δ_k) + g'(δ_k)(δ − δ_k)`` lies above it everywhere: the cutting-plane
    solver uses those tangents as an outer approximation. At ``δ = 0`` with both band
    ends equally bad the right derivative is the smaller of the two one-sided slopes.
    """
    p = limits.fallout
    delta = max(delta, 0.0)
    ends = []
    for sign in (-1.0, 1.0):
        mean = nominal + sign * delta
        sigma = stack.sigma_limit(mean, p, limits.lower, limits.upper)
        slope = sign * sigma_limit_slopes(mean, sigma, limits)["mean"]
        ends.append((sigma, slope, mean))
    low, high = ends
    if low[0] < high[0] or (low[0] == high[0] and low[1] < high[1]):
        return low
    return high


def sigma_limit_curvature(mean: float, sigma: float, limits: RequirementLimits) -> float | None:
    """``∂²σ_max/∂μ²`` (:func:`sigma_limit_slopes`' ``mean``, differentiated once more).

    With ``N = φ(z_U) − φ(z_L)`` and ``D = z_L φ(z_L) + z_U φ(z_U)`` (``σ′ = N/D``),
    ``z_L′ = −(1 + z_L σ′)/σ``, ``z_U′ = (1 − z_U σ′)/σ`` and ``φ′ = −z φ z′``:
    ``σ″ = (N′ D − N D′)/D²`` with ``N′ = −z_U φ_U z_U′ + z_L φ_L z_L′`` and
    ``D′ = φ_L (1 − z_L²) z_L′ + φ_U (1 − z_U²) z_U′``. None at ``σ = 0``.
    """
    if not sigma > 0:
        return None
    z_l, phi_l, z_u, phi_u = _tails(mean, sigma, limits)
    n, d = phi_u - phi_l, z_l * phi_l + z_u * phi_u
    slope = n / d
    zl1, zu1 = -(1.0 + z_l * slope) / sigma, (1.0 - z_u * slope) / sigma
    n1 = -z_u * phi_u * zu1 + z_l * phi_l * zl1
    d1 = phi_l * (1.0 - z_l * z_l) * zl1 + phi_u * (1.0 - z_u * z_u) * zu1
    return (n1 * d - n * d1) / (d * d)


def allowance_with_curvature(nominal: float, delta: float, lim: RequirementLimits) -> tuple[float, float, float]:
    """g(δ), g'(δ) and g''(δ): at the worse end of the band ``μ = ȳ ± δ``, ``g″ = σ_max″(μ)``
    in closed form (:func:`sigma_limit_curvature`); a central difference of the analytic
    g' where σ_max is 0."""
    value, slope, mean = mean_shift_allowance(nominal, delta, lim)
    curvature = sigma_limit_curvature(mean, value, lim)
    if curvature is not None and math.isfinite(curvature):
        return value, slope, curvature
    domain = min(stack.room(nominal, lim.lower, lim.upper))
    h = 1e-5 * max(delta, 1e-3 * domain)
    if delta - h < 0:
        plus = mean_shift_allowance(nominal, delta + h, lim)[1]
        return value, slope, (plus - slope) / h
    plus = mean_shift_allowance(nominal, delta + h, lim)[1]
    minus = mean_shift_allowance(nominal, delta - h, lim)[1]
    return value, slope, (plus - minus) / (2 * h)


# --------------------------------------------------------------------------- the problem


class AllocationProblem:
    """Arrays of one allocation problem: contributors, bounds, costs, requirements.

    Attributes
    ----------
    case : Case
    model : str
        ``worst-case``, ``rss`` or ``mean-shift``.
    names : tuple of str
    counts, sigma_factors, mean_shifts : numpy.ndarray
        ``n_i`` [-], ``f_i = σ_i/t_i`` [-], ``m_i`` [-] in case order.
    free : numpy.ndarray of bool
        Contributors the allocation may change.
    tightest, loosest : numpy.ndarray
        ``[tightest, loosest]`` per contributor [length] (the case's ``limits``); a held
        contributor has both equal to its held value.
    held : numpy.ndarray
        Held tolerance (case ``fixed`` or the ``fix`` argument), NaN for free ones.
    hold_kind : tuple of str
        ``'fixed'`` (case), ``'held'`` (``fix`` argument) or ``''``.
    current : numpy.ndarray
        The case's current tolerances [length].
    curves : CurveSet
    processes : tuple of str
    requirements : tuple of RequirementData
    length_scale, cost_scale : float
        Scales the solvers divide tolerances and costs by.

    A held contributor (``fixed``, or in ``fix``) at ``t`` takes the cost curve and cp of
    the option that makes ``t`` (:meth:`~allocator.model.Contributor.options_holding`).
    When several can, that is a discrete choice; when none can (a ``fixed`` part outside
    every range the case gives it) the part is taken as it is: no cost, its own cp.

    With ``check=True`` (what :func:`prepare` does) the same pass refuses contributors
    that need a discrete choice, free or held (:class:`NeedsDiscrete`), and non-convex
    cost tables (:class:`~allocator.errors.CaseError`); without it any case is taken as it
    is, a held contributor with the first option that makes its tolerance (the discrete
    solver uses that for the statistics of a chosen combination, where each contributor
    has one option left).
    """

    def __init__(self, case: Case, model: str, fix: Mapping[str, float] | None = None, *, check: bool = False):
        self.case = case
        self.model = model
        self.fix = dict(fix or {})
        contributors = case.contributors
        nan = math.nan
        lo, hi, held, sigma_factors = [], [], [], []
        names, counts, shifts, current = [], [], [], []
        curves, processes, hold_kind = [], [], []
        current_override = {}  # held with several processes: cheapest at the current t
        file = str(case.path) if case.path is not None else None
        fixes = self.fix
        # one pass (for a free contributor the same as Contributor.options()[0], without
        # building a Process per call), filling lists: this runs on every allocation and
        # cases may have thousands of parts
        for i, c in enumerate(contributors):
            names.append(c.name)
            counts.append(c.count)
            shifts.append(c.mean_shift)
            current.append(c.tolerance)
            if c.fixed or c.name in fixes:
                # held at t: the options that can make t (holding t does not choose the
                # process; each makes t at its own cost and cp)
                value = c.tolerance if c.fixed else float(fixes[c.name])
                makers = c.options_holding(value)
                if len(makers) > 1 and check:
                    options = c.options()
                    raise NeedsDiscrete(
                        f"contributor '{c.name}' held at ±{value:g} can be made by "
                        f"{', '.join(repr(options[k].name) for k in makers)}; choosing one is "
                        "the discrete allocation's job, not the continuous solver's"
                    )
                if makers:
                    option = c.options()[makers[0]]
                    curve, name = option.cost, option.name
                    sigma_factors.append(c.process_sigma_factor(option))
                else:
                    # a fixed part no option makes is taken as it is: no cost, its own cp
                    # (a held `fix` value no option makes was refused by check_fix_values)
                    curve, name = None, ""
                    sigma_factors.append(c.sigma_factor)
                if len(c.processes) > 1:
                    current_override[i] = cheapest_unit_cost(c, c.tolerance)
                processes.append(name)
                curves.append(curve)
                lo.append(value)
                hi.append(value)
                held.append(value)
                hold_kind.append("fixed" if c.fixed else "held")
                continue
            if c.processes:
                option = c.processes[0]
                limits, curve, name = option.limits, option.cost, option.name
                sigma_factors.append(c.process_sigma_factor(option))
            else:
                limits = c.limits if c.limits is not None else (c.tolerance, c.tolerance)
                curve, name = c.cost, ""
                sigma_factors.append(c.sigma_factor)
            processes.append(name)
            curves.append(curve)
            lo.append(limits[0])
            hi.append(limits[1])
            held.append(nan)
            hold_kind.append("")
            if not check:
                continue
            if len(c.processes) > 1 or (curve is not None and curve.is_discrete):
                raise NeedsDiscrete(
                    f"contributor '{c.name}' needs a choice of process or of listed tolerances; "
                    "that is the discrete allocation's job, not the continuous solver's"
                )
            if curve is not None:
                problem = costs.table_problem(curve)  # None for the formula families
                if problem:
                    raise CaseError(
                        f"contributor '{c.name}': its cost table cannot be used for continuous "
                        f"allocation: {problem}",
                        file=file,
                        field=f"contributor[{i + 1}] ({c.name}).cost",
                    )
        lo, hi, held = (np.array(v, dtype=float) for v in (lo, hi, held))
        sigma_factors = np.array(sigma_factors, dtype=float)
        self.names = tuple(names)
        self.counts = np.array(counts, dtype=float)
        self.sigma_factors = sigma_factors
        self.mean_shifts = np.array(shifts, dtype=float)
        self.tightest, self.loosest, self.held = lo, hi, held
        self.free = np.isnan(held)
        self.hold_kind = tuple(hold_kind)
        self.current = np.array(current, dtype=float)
        self._current_override = current_override
        self.processes = tuple(processes)
        self.curves = CurveSet(curves)
        self.requirements = tuple(
            RequirementData(
                r.name, lin.nominal, np.asarray(lin.sensitivity, dtype=float),
                r.lower, r.upper, float(r.fallout_ppm), lin.linear,
            )
            for r, lin in ((r, linearise(case, r)) for r in case.requirements)
        )

        free = self.free
        if free.any():
            self.length_scale = float(np.exp(np.mean(np.log(np.concatenate([lo[free], hi[free]])))))
            mid = np.sqrt(lo * hi)
            unit = self.curves.value(mid)
            scale = float(np.sum((self.counts * unit)[free]))
            self.cost_scale = scale if math.isfinite(scale) and scale > 0 else 1.0
        else:
            self.length_scale, self.cost_scale = 1.0, 1.0

    # ------------------------------------------------------------------ tolerances

    def full(self, t_free) -> np.ndarray:
        """All tolerances (case order) from the free ones."""
        t = self.held.copy()
        t[self.free] = t_free
        return t

    # ------------------------------------------------------------------ limits

    def limits(self, overrides=None) -> list[RequirementLimits]:
        """The limits in force per requirement, with ``overrides`` applied.

        ``overrides`` maps a requirement name to a dict with any of ``lower``,
        ``upper``, ``fallout_ppm`` (``None`` removes a limit).
        """
        overrides = overrides or {}
        known = {r.name for r in self.requirements}
        for name, change in overrides.items():
            if name not in known:
                raise UsageError(f"overrides: unknown requirement {name!r}{did_you_mean(name, known)}")
            bad = set(change) - {"lower", "upper", "fallout_ppm"}
            if bad:
                raise UsageError(
                    f"overrides: {name}: unknown key(s) {', '.join(sorted(bad))} "
                    "(allowed: lower, upper, fallout_ppm)"
                )
        out = []
        for r in self.requirements:
            change = overrides.get(r.name, {})
            lim = RequirementLimits(
                change.get("lower", r.lower),
                change.get("upper", r.upper),
                float(change.get("fallout_ppm", r.fallout_ppm)),
            )
            if not 0 < lim.fallout_ppm < PER_MILLION:
                raise UsageError(f"overrides: {r.name}: fallout_ppm must be in (0, 1e6)")
            if lim.two_sided and lim.lower >= lim.upper:
                raise UsageError(f"overrides: {r.name}: lower must be below upper")
            out.append(lim)
        return out

    # ------------------------------------------------------------------ statistics

    def statistics(self, t, limits: list[RequirementLimits]) -> list[dict]:
        """Per requirement at tolerances ``t``: spreads, fallout and how far it misses.

        ``excess`` is the relative violation of the model's constraint: worst case
        ``W / min(ȳ − L, U − ȳ) − 1``; statistical ``fallout / target − 1`` (≤ 0: met).
        """
        n, f, m = self.counts, self.sigma_factors, self.mean_shifts
        out = []
        for req, lim in zip(self.requirements, limits):
            a, y0 = req.sensitivity, req.nominal
            half = stack.worst_case_half_width(a, n, t)
            sigma = stack.rss_sigma(a, n, f * t)
            delta = stack.mean_shift_delta(a, n, m, t) if self.model == "mean-shift" else 0.0
            below, above, mean = stack.worst_mean_fallout(y0, delta, sigma, lim.lower, lim.upper)
            fallout = below + above
            if self.model == "worst-case":
                room = min(stack.room(y0, lim.lower, lim.upper))
                if room == math.inf:
                    excess = -1.0
                elif room <= 0:
                    excess = math.inf
                else:
                    excess = half / room - 1.0
            elif lim.lower is None and lim.upper is None:
                excess = -1.0
            else:
                excess = fallout / lim.fallout - 1.0
            out.append(
                {
                    "half_width": half, "sigma": sigma, "delta": delta, "mean": mean,
                    "fallout": fallout, "excess": excess,
                }
            )
        return out

    def _rtol(self) -> float:
        return WORST_CASE_RTOL if self.model == "worst-case" else FALLOUT_RTOL

    def feasible(self, t, limits, *, rtol: float = 0.0) -> bool:
        """All requirements met at ``t`` (within ``rtol`` relative)."""
        return all(s["excess"] <= rtol for s in self.statistics(t, limits))

    # ------------------------------------------------------------------ infeasibility

    def diagnose(self, limits: list[RequirementLimits]) -> str | None:
        """Why the problem is infeasible, or None.

        Every constraint is monotone in every tolerance, so the tightest tolerances
        (free ones at their lower bounds, held ones at their values) minimise every
        requirement's spread at once: if they fail a requirement, nothing meets it.
        """
        t = self.tightest
        n, f = self.counts, self.sigma_factors
        problems = []
        for req, lim, s in zip(self.requirements, limits, self.statistics(t, limits)):
            if s["excess"] <= self._rtol():
                continue
            a, y0 = req.sensitivity, req.nominal
            outside = (lim.lower is not None and y0 <= lim.lower) or (
                lim.upper is not None and y0 >= lim.upper
            )
            if outside:
                problems.append(
                    f"requirement '{req.name}': nominal {_g(y0)} is not inside the limits "
                    f"[{_fmt_limit(lim.lower)}, {_fmt_limit(lim.upper)}]; no tolerance can fix that"
                )
                continue
            if self.model == "worst-case":
                lo_y, hi_y = y0 - s["half_width"], y0 + s["half_width"]
                misses = []
                if lim.upper is not None and hi_y > lim.upper:
                    misses.append(f"exceeds upper {_g(lim.upper)} by {_g(hi_y - lim.upper)}")
                if lim.lower is not None and lo_y < lim.lower:
                    misses.append(f"is below lower {_g(lim.lower)} by {_g(lim.lower - lo_y)}")
                what = (
                    f"worst-case range at tightest tolerances is [{_g(lo_y)}, {_g(hi_y)}], "
                    + " and ".join(misses)
                )
                share = n * np.abs(a) * t
                label = "worst case"
            else:
                what = (
                    f"fallout at tightest tolerances is {_g(fraction_to_ppm(s['fallout']))} ppm > target "
                    f"{_g(lim.fallout_ppm)} ppm"
                )
                if self.model == "mean-shift" and s["delta"] > 0:
                    what += f" (mean at {_g(s['mean'])}, shifted by up to ±{_g(s['delta'])})"
                share = n * (a * f * t) ** 2
                label = "variance"
            total = share.sum()
            top = np.argsort(-share, kind="stable")[:3]
            parts = [
                f"{self.names[i]}{' (' + self.hold_kind[i] + ')' if self.hold_kind[i] else ''} "
                f"{100 * share[i] / total:.0f}%"
                for i in top
                if total > 0 and share[i] > 0
            ]
            problems.append(
                f"requirement '{req.name}': {what}; largest shares of the {label}: {', '.join(parts)}"
            )
        return "; ".join(problems) if problems else None

    # ------------------------------------------------------------------ polish

    def polish(self, t, limits) -> tuple[np.ndarray, float]:
        """Smallest shrink of the free tolerances that meets every requirement.

        Returns ``(t', θ)`` with ``t'_i = max(lower_i, θ·t_i)`` for free contributors
        and θ ∈ (0, 1] the largest that meets them (1 when ``t`` is already feasible):
        ``1 − θ`` of 1e-15, 1e-12, ... is tried first (a solver's answer misses by
        round-off as a rule), then bisection. Every constraint is monotone in every
        tolerance, so feasibility is monotone in θ.
        """
        t = np.clip(t, self.tightest, self.loosest)
        if self.feasible(t, limits):
            return t, 1.0
        free = self.free
        shrink = lambda theta: np.where(free, np.maximum(self.tightest, theta * t), t)  # noqa: E731
        good, bad = 0.0, 1.0
        if free.any():
            good = float(np.min(self.tightest[free] / np.maximum(t[free], 1e-300)))
        if not self.feasible(shrink(good), limits):
            return shrink(good), good  # infeasible even at the tightest: caller reports
        # a solver's answer on the constraint misses it by round-off as a rule: shrinks of
        # 1e-15, 1e-12, ... first, then bisection (some 50 checks fewer)
        step = 1e-15
        while 1.0 - step > good:
            if self.feasible(shrink(1.0 - step), limits):
                good = 1.0 - step
                break
            bad, step = 1.0 - step, step * 1e3
        for _ in range(200):
            mid = 0.5 * (good + bad)
            if mid in (good, bad):
                break
            if self.feasible(shrink(mid), limits):
                good = mid
            else:
                bad = mid
        return shrink(good), good

    # ------------------------------------------------------------------ result

    def unit_costs(self, t) -> np.ndarray:
        """Cost of one part of each contributor at ``t`` [currency]."""
        return self.curves.value(t)

    def total_cost(self, t) -> float:
        return float(np.sum(self.counts * self.unit_costs(t)))

    def bound_flags(self, t) -> tuple[str, ...]:
        """'tightest' | 'loosest' | 'fixed' | '' per contributor."""
        lo, hi = self.tightest, self.loosest
        slack = BOUND_RTOL * np.maximum(hi - lo, hi)
        flags = np.where(t <= lo + slack, "tightest", np.where(t >= hi - slack, "loosest", ""))
        return tuple(np.where(self.free, flags, "fixed").tolist())

    def result(
        self,
        t,
        limits,
        *,
        status: str,
        message: str,
        solver: str,
        iterations: int = 0,
        gap: float | None = None,
        multipliers=None,
        marginal: bool = True,
        **fields,
    ) -> Allocation:
        """Build the :class:`Allocation` for tolerances ``t`` (None when infeasible).

        ``multipliers`` holds, per requirement, ``-∂cost/∂(allowance)``: for worst case
        the allowance is the half-width room ``min(ȳ − L, U − ȳ)``, for the statistical
        models the largest allowed σ [currency per response unit]. ``marginal=False``
        leaves out binding limits and shadow prices (a discrete choice has no derivative
        with respect to a limit). ``fields`` are further :class:`Allocation` arguments
        (e.g. ``rounding``), or ones that replace what this problem gives
        (``unit_cost_current``, ``current_cost``, ``requirements``): the result is built
        complete, once.
        """
        case = self.case
        current_unit = self.unit_costs(self.current)
        for i, value in self._current_override.items():
            current_unit[i] = value
        current_cost = float(np.sum(self.counts * current_unit))
        kwargs = dict(
            model=self.model,
            status=status,
            message=message,
            names=self.names,
            current=self.current,
            counts=self.counts,
            tightest=np.where(self.free, self.tightest, np.nan),
            loosest=np.where(self.free, self.loosest, np.nan),
            unit_cost_current=current_unit,
            current_cost=current_cost,
            processes=dict(zip(self.names, self.processes)),
            solver=solver,
            iterations=iterations,
            gap=gap,
            units=case.units,
            contributor_units=case.own_contributor_units,
            currency=case.currency,
            title=case.title,
            held={n: float(v) for n, v, k in zip(self.names, self.held, self.hold_kind) if k == "held"},
        )
        if t is None:
            return Allocation(**{**kwargs, "requirements": [], **fields})
        unit = self.unit_costs(t)
        stats = self.statistics(t, limits)
        multipliers = [0.0] * len(self.requirements) if multipliers is None else multipliers
        records = []
        for req, lim, s, y in zip(self.requirements, limits, stats, multipliers):
            prices = shadow_prices(self.model, req, lim, s, y)
            records.append(
                RequirementResult(
                    name=req.name,
                    nominal=req.nominal,
                    lower=lim.lower,
                    upper=lim.upper,
                    worst_case_min=req.nominal - s["half_width"],
                    worst_case_max=req.nominal + s["half_width"],
                    sigma=s["sigma"],
                    mean_shift=s["delta"],
                    fallout_ppm=fraction_to_ppm(s["fallout"]),
                    target_ppm=None if self.model == "worst-case" else lim.fallout_ppm,
                    linear=req.linear,
                    **prices,
                    units=case.requirement_units(req.name),
                )
            )
        if not marginal:
            records = [replace(r, binding="", shadow_price=None, shadow_lower=None, shadow_upper=None,
                               shadow_ppm=None) for r in records]
        return Allocation(**{
            **kwargs,
            "allocated": np.asarray(t, dtype=float),
            "unit_cost_allocated": unit,
            "total_cost": float(np.sum(self.counts * unit)),
            "bounds": self.bound_flags(t),
            "requirements": records,
            **fields,
        })

    def infeasible(self, limits, message: str, solver: str = "") -> Allocation:
        return self.result(None, limits, status="infeasible", message=message, solver=solver)


def _fmt_limit(x):
    return "-inf" if x is None else _g(x)


def shadow_prices(model: str, req: RequirementData, lim: RequirementLimits, stats: dict, y: float) -> dict:
    """d(total cost)/d(limit) and d(total cost)/d(ppm) from a constraint multiplier.

    Parameters
    ----------
    model : str
    req : RequirementData
    lim : RequirementLimits
    stats : dict
        :meth:`AllocationProblem.statistics` entry at the solution.
    y : float
        ``-∂cost/∂(allowance)`` ≥ 0 [currency per response unit]: for worst case the
        allowance is the half-width room ``min(ȳ − L, U − ȳ)``; for rss and mean shift
        the largest allowed σ at the worst mean.

    Returns
    -------
    dict
        ``binding`` ('lower' | 'upper' | 'both' | ''), ``shadow_price`` (of the binding
        limit, or the larger of two), ``shadow_lower``, ``shadow_upper`` [currency/length]
        and ``shadow_ppm`` [currency/ppm] (None for worst case).

    Notes
    -----
    Envelope theorem: ``d cost*/dθ = −y · ∂(allowance)/∂θ``. Worst case: raising ``U``
    adds room one to one when the upper side is the nearer one, raising ``L`` removes it.
    Statistical: the σ-limit slopes of :func:`sigma_limit_slopes` at the worst mean.
    With a centred nominal under worst case both limits bind; each value is then the
    one-sided derivative for tightening that limit.
    """
    y = max(float(y), 0.0)
    out = {"binding": "", "shadow_price": 0.0, "shadow_lower": None, "shadow_upper": None,
           "shadow_ppm": None}
    if lim.lower is not None:
        out["shadow_lower"] = 0.0
    if lim.upper is not None:
        out["shadow_upper"] = 0.0
    if model != "worst-case":
        out["shadow_ppm"] = 0.0
    if y == 0.0:
        return out
    if model == "worst-case":
        d_low, d_up = stack.room(req.nominal, lim.lower, lim.upper)
        tie = math.isclose(d_low, d_up, rel_tol=1e-12)
        if d_up <= d_low or tie:
            out["shadow_upper"] = -y
        if d_low <= d_up or tie:
            out["shadow_lower"] = y
    else:
        sigma = stack.sigma_limit(stats["mean"], lim.fallout, lim.lower, lim.upper)
        slopes = sigma_limit_slopes(stats["mean"], sigma, lim)
        if lim.lower is not None:
            out["shadow_lower"] = -y * slopes["lower"]
        if lim.upper is not None:
            out["shadow_upper"] = -y * slopes["upper"]
        out["shadow_ppm"] = ppm_to_fraction(-y * slopes["fallout"])  # per fraction -> per ppm
    low, up = abs(out["shadow_lower"] or 0.0), abs(out["shadow_upper"] or 0.0)
    big = max(low, up)
    sides = [s for s, v in (("lower", low), ("upper", up)) if big > 0 and v >= 1e-3 * big]
    out["binding"] = "both" if len(sides) == 2 else (sides[0] if sides else "")
    out["shadow_price"] = out["shadow_upper"] if up >= low else out["shadow_lower"]
    return out


# --------------------------------------------------------------------------- prepare


# A held tolerance written equal to a limit (up to float noise) is inside it.
_FIX_RTOL = HOLD_RTOL


def cheapest_unit_cost(contributor, tolerance: float) -> float:
    """Cost of one part made to ± ``tolerance`` by its cheapest option that can [currency].

    The option is :meth:`~allocator.model.Contributor.cheapest_option_holding` (the same
    rule that picks the process, and so the cp, when verify checks such a tolerance).
    When none can make it: 0 for a ``fixed`` contributor (taken as it is), else the first
    option's curve at ``tolerance`` (NaN where the curve does not define it).
    """
    k = contributor.cheapest_option_holding(tolerance)
    if k is None:
        if contributor.fixed:
            return 0.0
        k = 0
    curve = contributor.options()[k].cost
    if curve is None:
        return 0.0
    try:
        value = float(costs.cost_value(curve, float(tolerance)))
    except ValueError:
        return math.nan
    return value if math.isfinite(value) else math.nan


def check_fix_values(case: Case, fix) -> dict[str, float]:
    """``fix`` as name -> float: each names a contributor and holds a finite t > 0 that
    one of its options can make (:meth:`~allocator.model.Contributor.options_holding`:
    inside its limits, or with processes inside the limits of at least one process; a
    ``choose`` table must list it).

    A held tolerance the part cannot be made to is refused rather than priced off its cost
    curve. A case-``fixed`` contributor keeps its own tolerance, so its entry is not
    checked against limits.
    """
    out = {}
    for name, value in (fix or {}).items():
        if name not in case.names:
            raise UsageError(f"fix: unknown contributor '{name}'{did_you_mean(name, case.names)}")
        try:
            value = float(value)
        except (TypeError, ValueError):
            raise UsageError(f"fix: {name}: tolerance must be a number (got {value!r})") from None
        if not (math.isfinite(value) and value > 0):
            raise UsageError(f"fix: {name}: tolerance must be > 0 (got {value:g})")
        c = case.contributor(name)
        if not c.fixed and not c.options_holding(value):
            options = c.options()
            covering = [p for p in options
                        if p.limits[0] * (1 - _FIX_RTOL) <= value <= p.limits[1] * (1 + _FIX_RTOL)]
            if covering:  # inside a range, but only choose tables cover it and none lists it
                listed = "; ".join(
                    (f"{p.name}: " if c.processes else "")
                    + ", ".join(f"{x:g}" for x in p.cost.points_tolerance)
                    for p in covering
                )
                raise UsageError(f"fix: {name}: tolerance {value:g} is not one of the listed tolerances ({listed})")
            if c.processes:
                ranges = ", ".join(f"{p.name} [{p.limits[0]:g}, {p.limits[1]:g}]" for p in options)
                where = f"the limits of every process ({ranges})"
            else:
                where = f"its limits [{options[0].limits[0]:g}, {options[0].limits[1]:g}]"
            raise UsageError(f"fix: {name}: tolerance {value:g} is outside {where}")
        out[name] = value
    return out


def prepare(case: Case, model: str, fix: Mapping[str, float] | None = None) -> AllocationProblem:
    """Check that ``case`` can be allocated continuously and build the arrays.

    Raises
    ------
    UsageError
        Unknown model, a ``fix`` entry naming no contributor or holding a tolerance
        ≤ 0 or outside the contributor's limits; :class:`NeedsDiscrete` (a UsageError) for a contributor that needs process
        selection (the discrete solver's job).
    CaseError
        A ``table`` cost that is not convex and decreasing (named, with the reason).
    """
    if model not in MODELS:
        raise UsageError(f"unknown model {model!r}{did_you_mean(model, MODELS)} (choose from {', '.join(MODELS)})")
    return AllocationProblem(case, model, check_fix_values(case, fix), check=True)
