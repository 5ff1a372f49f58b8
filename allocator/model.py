"""Typed, immutable objects that a validated case file becomes.

Everything downstream (stack analysis, allocation, simulation, reports) works on these
objects only; :mod:`allocator.case` is the one place that turns TOML into them.

Conventions (see docs/case-file.md):

- a tolerance ``t`` is the symmetric half-width: ``t = 0.05`` means ±0.05 [length];
- in a requirement, a contributor's name stands for the *sum* of its ``count`` identical,
  independent instances, so a linear chain's nominal is ``Σ coeff · count · nominal`` and
  its worst case ``Σ count · |coeff| · t``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING, Literal, Mapping

from .costs import CURVES, CostCurve  # noqa: F401  (re-exported: the curve families live in the cost registry)

if TYPE_CHECKING:  # numpy is imported where it is used
    import numpy as np
    from numpy.typing import ArrayLike

DISTRIBUTIONS = ("normal", "uniform", "triangular")
MODELS = ("worst-case", "rss", "mean-shift", "convolution")
# how plots, reports and tables name each model in prose
MODEL_LABELS = {"worst-case": "worst case", "rss": "RSS", "mean-shift": "mean shift",
                "convolution": "exact convolution"}
DEFAULT_FALLOUT_PPM = 2700.0
DEFAULT_MODELS = ("worst-case", "rss")
# A tolerance written equal to a limit (up to float noise) is inside it.
HOLD_RTOL = 1e-9

Distribution = Literal["normal", "uniform", "triangular"]
ModelName = Literal["worst-case", "rss", "mean-shift", "convolution"]


def sigma_factor(distribution: str, cp: float = 1.0) -> float:
    """Ratio σ / t of a contributor's distribution.

    Parameters
    ----------
    distribution : {'normal', 'uniform', 'triangular'}
    cp : float
        Process capability index, only meaningful for ``normal`` [-].

    Returns
    -------
    float
        ``1/(3·cp)`` (normal, ±t = ±3·cp·σ), ``1/√3`` (uniform on ±t),
        ``1/√6`` (symmetric triangular on ±t).
    """
    if distribution == "normal":
        return 1.0 / (3.0 * cp)
    if distribution == "uniform":
        return 1.0 / math.sqrt(3.0)
    if distribution == "triangular":
        return 1.0 / math.sqrt(6.0)
    raise ValueError(f"unknown distribution {distribution!r}")


def per_unit(numerator: str, denominator: str) -> str:
    """Label of a ratio of two labelled quantities, e.g. ``per_unit("N", "mm") == "N/mm"``.

    Labels are text only (no conversion): equal labels give ``"-"`` (a pure number),
    an empty denominator gives the numerator, an empty numerator ``"1/mm"``; ``N``
    per ``N/mm`` is ``mm``; any other denominator that is itself a ratio or a product
    is put in parentheses.

    Examples
    --------
    >>> per_unit("EUR", "N"), per_unit("mm", "mm"), per_unit("EUR", "N/mm"), per_unit("N", "N/mm")
    ('EUR/N', '-', 'EUR/(N/mm)', 'mm')
    """
    if numerator == denominator:
        return "-"
    if not denominator:
        return numerator
    head, slash, rest = denominator.partition("/")
    if slash and head == numerator and rest and "/" not in rest:
        return rest  # N per (N/mm) is mm
    if any(ch in denominator for ch in "/*· "):
        denominator = f"({denominator})"
    return f"{numerator or '1'}/{denominator}"


@dataclass(frozen=True)
class Process:
    """One way of making a contributor: an achievable range and its cost curve."""

    name: str
    limits: tuple[float, float]
    cost: CostCurve | None
    cp: float | None = None


@dataclass(frozen=True)
class Contributor:
    """One dimension in the chain, made by one part (``count`` instances per assembly)."""

    name: str
    nominal: float
    tolerance: float
    limits: tuple[float, float] | None = None
    cost: CostCurve | None = None
    processes: tuple[Process, ...] = ()
    description: str = ""
    cp: float = 1.0
    mean_shift: float = 0.0
    distribution: str = "normal"
    count: int = 1
    fixed: bool = False
    units: str | None = None  # label of nominal and tolerance; None: the case's ``units``

    @property
    def sigma_factor(self) -> float:
        """σ / t for the contributor's own distribution and cp."""
        return sigma_factor(self.distribution, self.cp)

    def process_sigma_factor(self, process: Process) -> float:
        """σ / t when made by ``process`` (its cp overrides the contributor's)."""
        cp = process.cp if process.cp is not None else self.cp
        return sigma_factor(self.distribution, cp)

    def options(self) -> tuple[Process, ...]:
        """The ways of making this contributor.

        A contributor without ``process`` entries has one implicit option named
        ``""`` with its own ``limits``, ``cost`` and ``cp``. A fixed contributor
        without limits has the single tolerance ``tolerance``.
        """
        if self.processes:
            return self.processes
        limits = self.limits if self.limits is not None else (self.tolerance, self.tolerance)
        return (Process(name="", limits=limits, cost=self.cost, cp=None),)

    @property
    def is_discrete(self) -> bool:
        """True when allocation needs a discrete choice for this contributor.

        Free: several processes or a ``choose`` table. Fixed: several processes can make
        its ``tolerance`` (see :meth:`needs_choice`).
        """
        return self.needs_choice(self.tolerance if self.fixed else None)

    def options_holding(self, tolerance: float) -> tuple[int, ...]:
        """The options (positions in :meth:`options`) that can make ± ``tolerance``.

        An option can make ``t`` when its ``limits`` hold it (up to :data:`HOLD_RTOL`
        relative) and its cost is defined there: a ``choose`` table must list ``t``.
        Holding a tolerance does not choose the process: each of these makes ``t`` at its
        own cost and with its own cp (so its own σ).

        Parameters
        ----------
        tolerance : float
            ± tolerance [length].

        Returns
        -------
        tuple of int
            Empty when no option makes ``tolerance``.

        Examples
        --------
        >>> shaft = Contributor(name="shaft", nominal=20.0, tolerance=0.03, processes=(
        ...     Process("lathe", (0.01, 0.05), CostCurve("reciprocal", a=1.0, b=0.01)),
        ...     Process("grinder", (0.005, 0.02), CostCurve("reciprocal", a=3.0, b=0.01))))
        >>> shaft.options_holding(0.015), shaft.options_holding(0.03), shaft.options_holding(0.1)
        ((0, 1), (0,), ())
        """
        t = float(tolerance)
        out = []
        for k, p in enumerate(self.options()):
            lo, hi = p.limits
            if not lo * (1.0 - HOLD_RTOL) <= t <= hi * (1.0 + HOLD_RTOL):
                continue
            if p.cost is not None and p.cost.is_discrete:
                try:
                    p.cost.value(t)
                except ValueError:  # not one of the listed tolerances
                    continue
            out.append(k)
        return tuple(out)

    def cheapest_option_holding(self, tolerance: float) -> int | None:
        """The cheapest option that can make ± ``tolerance`` (a position in :meth:`options`).

        The rule for a tolerance whose process nobody chose (the case's current
        ``tolerance``, a plain tolerance map given to verify): among
        :meth:`options_holding`, the lowest unit cost at ``tolerance`` (an option without a
        cost curve costs 0); ties go to the option listed first.

        Parameters
        ----------
        tolerance : float
            ± tolerance [length].

        Returns
        -------
        int or None
            None when no option makes ``tolerance``.

        Examples
        --------
        >>> shaft = Contributor(name="shaft", nominal=20.0, tolerance=0.03, processes=(
        ...     Process("lathe", (0.01, 0.05), CostCurve("reciprocal", a=1.0, b=0.01)),
        ...     Process("grinder", (0.005, 0.02), CostCurve("reciprocal", a=3.0, b=0.01))))
        >>> shaft.cheapest_option_holding(0.015), shaft.cheapest_option_holding(0.008)
        (0, 1)
        >>> shaft.cheapest_option_holding(0.1) is None
        True
        """
        from . import costs

        makers = self.options_holding(tolerance)
        if not makers:
            return None
        options = self.options()
        best, best_cost = makers[0], math.inf
        for k in makers:
            curve = options[k].cost
            if curve is None:
                value = 0.0
            else:
                try:
                    value = float(costs.cost_value(curve, float(tolerance)))
                except ValueError:  # not defined there
                    continue
            if value < best_cost:
                best, best_cost = k, value
        return best

    def needs_choice(self, held: float | None = None) -> bool:
        """True when allocating this contributor is a discrete choice.

        Parameters
        ----------
        held : float, optional
            The ± tolerance it is held at [length] (a ``fix`` entry, or ``tolerance`` when
            it is ``fixed``); None when it is free.

        Returns
        -------
        bool
            Free: several processes or a ``choose`` table. Held at ``t``: several options
            can make ``t`` (:meth:`options_holding`); with one it is fully determined.
        """
        if held is not None:
            return len(self.options_holding(held)) > 1
        return len(self.processes) > 1 or any(
            p.cost is not None and p.cost.is_discrete for p in self.options()
        )


@dataclass(frozen=True)
class Requirement:
    """An assembly requirement: a response ``y`` of the contributors and its limits.

    Exactly one of ``chain`` (linear: ``y = Σ coeff · x``) and ``expression``
    (a smooth function of contributor names) is set.
    """

    name: str
    chain: Mapping[str, float] | None = None
    expression: str | None = None
    lower: float | None = None
    upper: float | None = None
    fallout_ppm: float = DEFAULT_FALLOUT_PPM  # the case file's name for the target
    units: str | None = None  # label of the response and its limits; None: the case's ``units``

    @property
    def target_ppm(self) -> float:
        """The fallout this requirement allows [ppm]: the case file's ``fallout_ppm``.

        On a requirement ``fallout_ppm`` is a target; on every result it is a prediction
        or a count (docs/results.md, *What fallout_ppm means*). The library says
        ``target_ppm`` for the target, as the results do.
        """
        return self.fallout_ppm

    @property
    def is_linear(self) -> bool:
        """True for a linear ``chain``, False for a nonlinear ``expression``."""
        return self.chain is not None


@dataclass(frozen=True)
class Unknown:
    """A quantity the assembly settles at (an angle, a position), not a contributor.

    Its value is the solution of the case's closure equations (docs/closure.md); ``guess``
    only starts the nominal solve.
    """

    name: str
    guess: float
    description: str = ""


@dataclass(frozen=True)
class Closure:
    """One closure equation of an implicit assembly: ``equation = 0``.

    ``equation`` is written in the expression grammar and may name contributors and
    unknowns; ``name`` labels it in messages (empty: ``closure[i]``).
    """

    equation: str
    name: str = ""


@dataclass(frozen=True)
class AllocationSettings:
    """The case file's ``[allocation]`` table: the models to solve and the rounding."""

    models: tuple[str, ...] = DEFAULT_MODELS
    rounding: float | str | None = None  # a step [length], "iso286", or None


@dataclass(frozen=True)
class Economics:
    """The case file's ``[economics]`` table: annual volume and scrap cost per assembly."""

    volume: float | None = None  # assemblies per year
    scrap_cost: float | None = None  # cost of one assembly outside the limits [currency]


@dataclass(frozen=True)
class FrontierSettings:
    """The case file's ``[frontier]`` table: which requirement limit to sweep, over what range."""

    requirement: str | None = None
    vary: str = "upper"  # lower | upper | fallout_ppm
    range: tuple[float, float] | None = None
    points: int = 25


@dataclass(frozen=True)
class Offer:
    """A supplier's offer: contributor ``contributor`` at ± ``tolerance`` for ``price`` per part.

    The case file's optional ``[[offer]]`` tables (docs/offers.md); evaluated by
    :func:`allocator.offers.evaluate_offers`.
    """

    contributor: str
    tolerance: float  # ± half-width the supplier holds [length]
    price: float  # per part [currency]; a contributor with count n pays n · price per assembly
    note: str = ""

    @property
    def label(self) -> str:
        """``NAME=T@PRICE``, the form the command line takes."""
        return f"{self.contributor}={self.tolerance:g}@{self.price:g}"


@dataclass(frozen=True)
class Case:
    """A whole validated case: contributors, requirements and settings.

    ``units`` labels every contributor and requirement that has no ``units`` of its own;
    :meth:`contributor_units` and :meth:`requirement_units` give the label in force.
    """

    title: str
    contributors: tuple[Contributor, ...]
    requirements: tuple[Requirement, ...]
    units: str = "mm"
    currency: str = ""
    allocation: AllocationSettings = field(default_factory=AllocationSettings)
    economics: Economics = field(default_factory=Economics)
    frontier: FrontierSettings = field(default_factory=FrontierSettings)
    path: Path | None = None  # the file it was read from, if any
    sha256: str | None = None  # hash of that file's bytes, for reproducibility
    offers: tuple[Offer, ...] = ()  # the case file's [[offer]] tables, in file order
    unknowns: tuple[Unknown, ...] = ()  # an implicit assembly's unknowns (docs/closure.md)
    closures: tuple[Closure, ...] = ()  # and its closure equations, one per unknown

    @property
    def names(self) -> tuple[str, ...]:
        """Contributor names in case order."""
        return tuple(c.name for c in self.contributors)

    @property
    def unknown_names(self) -> tuple[str, ...]:
        """Names of the unknowns of the closure equations, in case order (empty if none)."""
        return tuple(u.name for u in self.unknowns)

    @cached_property
    def loop(self):
        """The closure equations solved at the nominals (:class:`allocator.closure.LoopSolution`).

        None when the case has no unknowns. Solved once per case, on first use.

        Raises
        ------
        allocator.closure.ClosureError
            The loop does not close at the nominals (singular or no convergence).
        """
        if not self.unknowns:
            return None
        from .closure import solve_loop

        return solve_loop(self)

    @cached_property
    def _positions(self) -> dict[str, int]:
        # built once per case: index() is called per chain entry, a scan would be O(n²)
        return {c.name: i for i, c in enumerate(self.contributors)}

    def index(self, name: str) -> int:
        """Position of contributor ``name`` in :attr:`contributors`."""
        return self._positions[name]

    def contributor(self, name: str) -> Contributor:
        """The contributor called ``name`` (KeyError if there is none)."""
        return self.contributors[self.index(name)]

    @cached_property
    def _requirements_by_name(self) -> dict[str, Requirement]:
        # built once per case: problem and result code look requirements up per solve
        out: dict[str, Requirement] = {}
        for r in self.requirements:
            out.setdefault(r.name, r)  # the first of a name, as a scan would find it
        return out

    def requirement(self, name: str) -> Requirement:
        """The requirement called ``name`` (KeyError if there is none)."""
        return self._requirements_by_name[name]

    def contributor_units(self, name: str) -> str:
        """Units label of contributor ``name``: its own ``units``, else the case's."""
        own = self.contributor(name).units
        return self.units if own is None else own

    @cached_property
    def own_contributor_units(self) -> dict[str, str]:
        """Contributor name -> units label, only for contributors with their own label."""
        return {c.name: c.units for c in self.contributors if c.units is not None}

    def requirement_units(self, name: str) -> str:
        """Units label of requirement ``name`` (its response and limits): its own, else the case's."""
        own = self.requirement(name).units
        return self.units if own is None else own

    def sensitivity_units(self, requirement: str, contributor: str) -> str:
        """Label of ∂y/∂x: requirement units per contributor unit (``"N/mm"``), see :func:`per_unit`."""
        return per_unit(self.requirement_units(requirement), self.contributor_units(contributor))

    @property
    def unit_labels(self) -> tuple[str, ...]:
        """The distinct units labels in use, the case's first (for a one-line summary)."""
        items = (*self.contributors, *self.requirements)
        used = {self.units if x.units is None else x.units for x in items}
        labels = dict.fromkeys([self.units] + [x.units for x in items if x.units is not None])
        return tuple(label for label in labels if label and label in used)

    @property
    def current_tolerances(self) -> np.ndarray:
        """The case's current ± tolerances as a numpy array in contributor order."""
        import numpy as np

        return np.array([c.tolerance for c in self.contributors], dtype=float)

    @property
    def counts(self) -> np.ndarray:
        """``count`` per contributor (identical instances in the stack) as a float array."""
        import numpy as np

        return np.array([c.count for c in self.contributors], dtype=float)

    @property
    def sigma_factors(self) -> np.ndarray:
        """σ / t per contributor (its own distribution and cp)."""
        import numpy as np

        return np.array([c.sigma_factor for c in self.contributors], dtype=float)

    def making_processes(self, tolerances: ArrayLike, processes: Mapping[str, str] | None = None) -> tuple[str, ...]:
        """The process that makes each contributor at ``tolerances``.

        Parameters
        ----------
        tolerances : array_like
            ± tolerance per contributor, in case order [length].
        processes : mapping name -> process name, optional
            Processes already chosen (e.g. :attr:`allocator.solve.Allocation.processes`).
            A chosen process must be one of the contributor's and make its tolerance
            (:meth:`Contributor.options_holding`). Contributors not named, or named with
            ``""``, take the cheapest process that makes their tolerance
            (:meth:`Contributor.cheapest_option_holding`).

        Returns
        -------
        tuple of str
            Process name per contributor; ``""`` for a contributor without processes and
            for one that no process makes (it keeps its own cp).

        Raises
        ------
        CaseError
            Field ``processes.<name>``: an unknown contributor or process, or a process
            whose range does not hold the tolerance.
        """
        from .errors import CaseError

        chosen = dict(processes or {})
        for name in chosen:
            if name not in self._positions:
                raise CaseError("unknown contributor", field=f"processes.{name}")
        out = []
        for c, t in zip(self.contributors, tolerances):
            t = float(t)
            name = chosen.get(c.name) or ""
            if not c.processes:
                if name:
                    raise CaseError(
                        f"{c.name!r} has no process entries, so it cannot be made by {name!r}",
                        field=f"processes.{c.name}",
                    )
                out.append("")
                continue
            if name:
                names = [p.name for p in c.processes]
                if name not in names:
                    raise CaseError(
                        f"no process {name!r} (the processes of {c.name!r}: {', '.join(names)})",
                        field=f"processes.{c.name}",
                    )
                if names.index(name) not in c.options_holding(t):
                    lo, hi = c.processes[names.index(name)].limits
                    raise CaseError(
                        f"process {name!r} makes ±{lo:g} to ±{hi:g}, not ±{t:g}",
                        field=f"processes.{c.name}",
                    )
                out.append(name)
                continue
            k = c.cheapest_option_holding(t)
            out.append("" if k is None else c.processes[k].name)
        return tuple(out)

    def sigma_factors_at(self, tolerances: ArrayLike, processes: Mapping[str, str] | None = None) -> np.ndarray:
        """σ / t per contributor when made by the processes of :meth:`making_processes`.

        A contributor made by a process with its own ``cp`` takes that cp; every other
        contributor its own (:attr:`sigma_factors`). Same parameters as
        :meth:`making_processes`.

        Returns
        -------
        numpy.ndarray
            σ / t per contributor [-].
        """
        import numpy as np

        made_by = self.making_processes(tolerances, processes)
        out = []
        for c, name in zip(self.contributors, made_by):
            process = next((p for p in c.processes if p.name == name), None) if name else None
            out.append(c.sigma_factor if process is None else c.process_sigma_factor(process))
        return np.array(out, dtype=float)

    @property
    def mean_shifts(self) -> np.ndarray:
        """Estimated mean shift per contributor, as a fraction of its tolerance [-]."""
        import numpy as np

        return np.array([c.mean_shift for c in self.contributors], dtype=float)

    def with_tolerances(self, tolerances: Mapping[str, float]) -> "Case":
        """A copy whose current tolerances are replaced by ``tolerances`` (by name)."""
        from dataclasses import replace

        from .errors import UsageError, unknown_names

        tolerances = dict(tolerances.items())
        problem = unknown_names("contributor", tolerances, self.names)
        if problem:
            raise UsageError(f"tolerances: {problem}")
        return replace(
            self,
            contributors=tuple(
                replace(c, tolerance=float(tolerances[c.name])) if c.name in tolerances else c
                for c in self.contributors
            ),
        )
