"""Stack analysis of a case at a given set of tolerances (worst case, RSS, mean shift, and
the exact fallout of a linear chain by numerical convolution)."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Mapping

import numpy as np

from . import stack
from .chain import linearise
from .closure import loop_sensitivities
from .errors import UsageError, unknown_names
from .model import per_unit
from .ppm import fraction_to_ppm

if TYPE_CHECKING:
    import pandas as pd

    from .model import Case


@dataclass(frozen=True)
class Contribution:
    """One contributor's part in one requirement."""

    name: str
    sensitivity: float  # ∂y/∂x [response/length]
    count: int
    tolerance: float  # ± [length]
    worst_case: float  # ± count·|a|·t [response]
    variance_share: float  # share of σ_y² [-], 0..1
    units: str = ""  # label of the contributor's tolerance
    sensitivity_units: str = ""  # label of ∂y/∂x: requirement units per contributor unit
    # through closure equations: ∂f/∂x with the unknowns held; sensitivity − direct is the
    # part through the loop (∂f/∂u · du/dx). None for a response that names no unknown.
    direct_sensitivity: float | None = None

    @property
    def loop_sensitivity(self) -> float | None:
        """The part of the sensitivity that goes through the closure loop, ``∂f/∂u · du/dx``."""
        return None if self.direct_sensitivity is None else self.sensitivity - self.direct_sensitivity


@dataclass(frozen=True)
class UnknownValue:
    """An unknown of the closure equations at the nominal solution."""

    name: str
    nominal: float  # [its own unit, see description]
    description: str = ""


@dataclass(frozen=True)
class RequirementAnalysis:
    """Stack results for one requirement."""

    name: str
    linear: bool
    nominal: float
    lower: float | None
    upper: float | None
    worst_case_min: float
    worst_case_max: float
    sigma: float
    fallout_below_ppm: float
    fallout_above_ppm: float
    target_ppm: float
    mean_shift: float  # δ, half-width of the band the mean may sit in [response]
    mean_shift_below_ppm: float
    mean_shift_above_ppm: float
    contributions: tuple[Contribution, ...] = field(default=())
    # how far the worst case passes each limit [response]; 0.0 when it holds within the
    # round-off margin of stack.limit_margin (the one comparison used for every verdict)
    worst_case_below: float = 0.0
    worst_case_above: float = 0.0
    units: str = ""  # label of the response, its limits, worst case, σ and δ
    through_loop: tuple[str, ...] = ()  # unknowns of the closure equations the response names
    # exact fallout from the stated distributions (numerical convolution), the mean at the
    # worse end of ȳ ± δ (the `convolution` model's constraint); None for an expression
    convolution_below_ppm: float | None = None
    convolution_above_ppm: float | None = None

    @property
    def convolution_ppm(self) -> float | None:
        """Exact fallout of the linear chain from the stated distributions, the mean at the
        worse end of its mean-shift band [ppm] (None for an expression)."""
        if self.convolution_below_ppm is None or self.convolution_above_ppm is None:
            return None
        return self.convolution_below_ppm + self.convolution_above_ppm

    @property
    def rss_ppm(self) -> float:
        """Predicted fallout of the rss model: normal response centred at ȳ [ppm]."""
        return self.fallout_below_ppm + self.fallout_above_ppm

    @property
    def fallout_ppm(self) -> float:
        """The same as :attr:`rss_ppm` (the JSON key): the rss fallout, whatever model
        the tolerances came from [ppm]."""
        return self.rss_ppm

    @property
    def mean_shift_ppm(self) -> float:
        """Total fallout with the mean at the worst place of its band [ppm]."""
        return self.mean_shift_below_ppm + self.mean_shift_above_ppm

    @property
    def worst_case_ok(self) -> bool:
        """The worst-case range lies inside the limits (round-off excused, see
        :func:`allocator.stack.limit_margin`)."""
        return self.worst_case_below == 0.0 and self.worst_case_above == 0.0

    @property
    def cpk(self) -> float:
        """Cpk of the response: distance from ȳ to the nearer limit over 3σ [-]."""
        d = min(stack.room(self.nominal, self.lower, self.upper))
        return math.inf if self.sigma == 0 else d / (3.0 * self.sigma)

    def to_dict(self) -> dict:
        """JSON-ready dict of this requirement's numbers (the ``--json`` output)."""
        out = {
            "name": self.name,
            "nominal": self.nominal,
            "lower": self.lower,
            "upper": self.upper,
            "worst_case_min": self.worst_case_min,
            "worst_case_max": self.worst_case_max,
            "worst_case_ok": self.worst_case_ok,
            "worst_case_below": self.worst_case_below,
            "worst_case_above": self.worst_case_above,
            "sigma": self.sigma,
            "cpk": self.cpk,
            "fallout_ppm": self.fallout_ppm,
            "fallout_below_ppm": self.fallout_below_ppm,
            "fallout_above_ppm": self.fallout_above_ppm,
            "target_ppm": self.target_ppm,
            "mean_shift": self.mean_shift,
            "mean_shift_ppm": self.mean_shift_ppm,
            "mean_shift_below_ppm": self.mean_shift_below_ppm,
            "mean_shift_above_ppm": self.mean_shift_above_ppm,
            "convolution_ppm": self.convolution_ppm,
            "convolution_below_ppm": self.convolution_below_ppm,
            "convolution_above_ppm": self.convolution_above_ppm,
            "linear": self.linear,
            "units": self.units,
            "contributors": [_contribution_dict(c) for c in self.contributions],
        }
        if self.through_loop:  # only through closure equations (v1 output unchanged)
            out["through_loop"] = list(self.through_loop)
        return out


def _contribution_dict(c: Contribution) -> dict:
    out = {
        "name": c.name,
        "sensitivity": c.sensitivity,
        "count": c.count,
        "tolerance": c.tolerance,
        "worst_case": c.worst_case,
        "variance_percent": 100.0 * c.variance_share,
        "units": c.units,
        "sensitivity_units": c.sensitivity_units,
    }
    if c.direct_sensitivity is not None:
        out["direct_sensitivity"] = c.direct_sensitivity
        out["loop_sensitivity"] = c.loop_sensitivity
    return out


@dataclass(frozen=True)
class StackAnalysis:
    """Result of :func:`analyze`: one :class:`RequirementAnalysis` per requirement."""

    title: str
    units: str  # the case's units (each requirement and contribution carries its own label)
    requirements: tuple[RequirementAnalysis, ...]
    tolerances: Mapping[str, float]
    unknowns: tuple[UnknownValue, ...] = ()  # closure unknowns at the nominal solution

    def __repr__(self) -> str:
        lines = [f"StackAnalysis({self.title!r})"]
        for r in self.requirements:
            lines.append(
                f"  {r.name}: nominal {r.nominal:.6g}, worst case "
                f"[{r.worst_case_min:.6g}, {r.worst_case_max:.6g}], sigma {r.sigma:.4g}, "
                f"fallout {r.rss_ppm:.4g} ppm (target {r.target_ppm:g})"
            )
        return "\n".join(lines)

    def to_dict(self) -> dict:
        """JSON-ready dict: one entry per requirement under ``requirements`` (and the
        closure unknowns' nominal values under ``unknowns`` when the case has any)."""
        out = {"requirements": [r.to_dict() for r in self.requirements]}
        if self.unknowns:
            out["unknowns"] = [
                {"name": u.name, "nominal": u.nominal, "description": u.description} for u in self.unknowns
            ]
        return out

    def to_frame(self) -> pd.DataFrame:
        """One row per requirement (pandas DataFrame, index ``requirement``)."""
        import pandas as pd

        rows = []
        for r in self.requirements:
            d = r.to_dict()
            d.pop("contributors")
            rows.append(d)
        return pd.DataFrame(rows).set_index("name").rename_axis("requirement")

    def contributions_frame(self) -> pd.DataFrame:
        """One row per (requirement, contributor) with a nonzero sensitivity (index
        ``requirement``, ``contributor``)."""
        import pandas as pd

        rows = [
            {"requirement": r.name, **c, "requirement_units": r.units}
            for r in self.requirements
            for c in r.to_dict()["contributors"]
        ]
        return pd.DataFrame(rows).set_index(["requirement", "name"]).rename_axis(["requirement", "contributor"])

    def _repr_html_(self) -> str:
        from .display import result_html

        return result_html(f"Stack analysis: {self.title}", self.to_frame())


def analyze(
    case: Case, tolerances: Mapping[str, float] | None = None, *, processes: Mapping[str, str] | None = None
) -> StackAnalysis:
    """Worst case, RSS and mean-shift analysis of every requirement.

    Parameters
    ----------
    case : allocator.model.Case
    tolerances : mapping or pandas.Series, name -> ± tolerance [length], optional
        Overrides for some or all contributors (e.g. ``allocation.tolerances``); the
        case's current ``tolerance`` values are used for the rest.
    processes : mapping name -> process name, optional
        The process that makes each named contributor (e.g. ``Allocation.processes``); its
        cp sets the contributor's σ. The others are made by the cheapest of their processes
        that holds their tolerance (:meth:`allocator.model.Case.sigma_factors_at`).

    Returns
    -------
    StackAnalysis

    Raises
    ------
    UsageError
        ``tolerances`` names a contributor the case does not have.

    Notes
    -----
    Per requirement with sensitivities ``a``, counts ``n``, σ factors ``f``:
    ``W = Σ n|a|t``, ``σ_y = sqrt(Σ n (a f t)²)``, fallout
    ``Φ((L − ȳ)/σ_y) + 1 − Φ((U − ȳ)/σ_y)``; mean-shift band ``δ = Σ n|a| m t`` with the
    fallout taken at the worst mean in ``ȳ ± δ`` (Greenwood & Chase 1987). Nonlinear
    expressions use their exact first-order sensitivities at the nominals. For a linear
    chain, ``convolution_ppm`` is the exact fallout from the stated distributions
    (:func:`allocator.convolve.linear_sum_distribution`) with the mean at the worse end of
    ``ȳ ± δ``: the constraint of the ``convolution`` model (docs/convolution.md).

    The worst-case verdict (``worst_case_ok``, ``worst_case_below``/``_above``) is
    :func:`allocator.stack.worst_case_excess`: a worst case within ``1e-9`` of the largest
    of ``|ȳ|, |L|, |U|, W`` from a limit counts as on it, so binary round-off of decimal
    inputs never turns a design that meets its limit exactly into a failure.
    """
    t = case.current_tolerances
    if tolerances is not None:
        # dict(...) of a mapping or a pandas Series: never the truth value of the object
        given = dict(tolerances.items())
        problem = unknown_names("contributor", given, case.names)
        if problem:
            raise UsageError(f"tolerances: {problem}")
        t = np.array([float(given.get(n, t[i])) for i, n in enumerate(case.names)])
    n = case.counts
    f = case.sigma_factors_at(t, processes)
    m = case.mean_shifts
    names = case.names
    contributor_units = [case.contributor_units(name) for name in names]
    results = []
    for req in case.requirements:
        units = case.requirement_units(req.name)
        lin = linearise(case, req)
        a = lin.sensitivity
        split = loop_sensitivities(case, req) if case.unknowns and not lin.linear else None
        direct = split.direct if split is not None and split.unknowns else None
        wc = n * np.abs(a) * t
        var = n * (a * f * t) ** 2
        sigma = float(math.sqrt(var.sum()))
        half = stack.worst_case_half_width(a, n, t)
        lo, hi = lin.nominal - half, lin.nominal + half
        wc_below, wc_above = stack.worst_case_excess(lin.nominal, half, req.lower, req.upper)
        below, above = stack.normal_fallout(lin.nominal, sigma, req.lower, req.upper)
        delta = stack.mean_shift_delta(a, n, m, t)
        ms_below, ms_above, _ = stack.worst_mean_fallout(lin.nominal, delta, sigma, req.lower, req.upper)
        exact_below = exact_above = None
        if lin.linear:
            from .convolve import chain_fallout

            below_c, above_c, _ = chain_fallout(a, n, t, [c.distribution for c in case.contributors], f,
                                                lin.nominal, delta, req.lower, req.upper)
            exact_below, exact_above = fraction_to_ppm(below_c), fraction_to_ppm(above_c)
        involved = np.flatnonzero(a != 0)
        total_var = var.sum()
        contributions = tuple(
            Contribution(
                name=names[i],
                sensitivity=float(a[i]),
                count=int(n[i]),
                tolerance=float(t[i]),
                worst_case=float(wc[i]),
                variance_share=float(var[i] / total_var) if total_var > 0 else 0.0,
                units=contributor_units[i],
                sensitivity_units=per_unit(units, contributor_units[i]),
                direct_sensitivity=None if direct is None else float(direct[i]),
            )
            for i in involved
        )
        results.append(
            RequirementAnalysis(
                name=req.name,
                linear=lin.linear,
                nominal=lin.nominal,
                lower=req.lower,
                upper=req.upper,
                worst_case_min=lo,
                worst_case_max=hi,
                sigma=sigma,
                fallout_below_ppm=fraction_to_ppm(below),
                fallout_above_ppm=fraction_to_ppm(above),
                target_ppm=req.target_ppm,
                mean_shift=delta,
                mean_shift_below_ppm=fraction_to_ppm(ms_below),
                mean_shift_above_ppm=fraction_to_ppm(ms_above),
                contributions=contributions,
                worst_case_below=wc_below,
                worst_case_above=wc_above,
                units=units,
                through_loop=split.unknowns if split is not None else (),
                convolution_below_ppm=exact_below,
                convolution_above_ppm=exact_above,
            )
        )
    return StackAnalysis(
        title=case.title,
        units=case.units,
        requirements=tuple(results),
        tolerances=dict(zip(case.names, map(float, t))),
        unknowns=tuple(
            UnknownValue(u.name, float(v), u.description) for u, v in zip(case.unknowns, case.loop.values)
        ) if case.unknowns else (),
    )
