"""The result of an allocation: tolerances, costs, requirement checks and shadow prices.

Reads like :class:`scipy.optimize.OptimizeResult`: ``status``, ``success``, ``message`` and
the numbers, never a bare tuple. pandas is imported only by the methods that return
pandas objects (``tolerances``, ``to_frame`` ...); :meth:`Allocation.rows` and
:meth:`Allocation.to_dict` give the same numbers as plain Python for fast command-line use.
"""

from __future__ import annotations

import math
from dataclasses import FrozenInstanceError, asdict, dataclass
from types import MappingProxyType
from typing import TYPE_CHECKING, Callable

import numpy as np

from .. import status as _status

if TYPE_CHECKING:  # pandas is imported where it is used
    import pandas as pd

__all__ = ["Allocation", "Brief", "RequirementResult", "STATUSES", "complete"]

STATUSES = _status.SOLVE  # see allocator.status


@dataclass(frozen=True)
class RequirementResult:
    """One requirement at the allocated tolerances.

    Attributes
    ----------
    name : str
    nominal : float
        Response at the nominals ȳ [response].
    lower, upper : float or None
        RequirementLimits in force for this solve.
    worst_case_min, worst_case_max : float
        ``ȳ ∓ Σ n|a|t`` [response].
    sigma : float
        RSS standard deviation of the response [response].
    mean_shift : float
        Half-width δ of the band the mean may sit in (mean-shift model; else 0) [response].
    fallout_ppm : float
        Predicted fallout: normal at ȳ (worst-case and rss models) or at the worst mean
        in ȳ ± δ (mean-shift model) [ppm].
    target_ppm : float or None
        Fallout target (statistical models only) [ppm].
    linear : bool
        False when the requirement is a linearised expression.
    binding : str
        Which limit the optimum presses against: 'lower', 'upper', 'both' or ''.
    shadow_price : float
        d(total cost)/d(limit) of the binding limit [currency/response]: negative for an
        upper limit (raising it saves money), positive for a lower one.
    shadow_lower, shadow_upper : float or None
        The same per limit (None when the limit is absent).
    shadow_ppm : float or None
        d(total cost)/d(fallout target) [currency/ppm] (statistical models).
    units : str
        Label of the response and its limits (the requirement's ``units``, else the
        case's); shadow prices of the limits are in currency per this label.
    """

    name: str
    nominal: float
    lower: float | None
    upper: float | None
    worst_case_min: float
    worst_case_max: float
    sigma: float
    mean_shift: float
    fallout_ppm: float
    target_ppm: float | None
    linear: bool
    binding: str
    shadow_price: float
    shadow_lower: float | None
    shadow_upper: float | None
    shadow_ppm: float | None
    units: str = ""

    def to_dict(self) -> dict:
        """JSON-ready dict of every field."""
        return asdict(self)


class Allocation:
    """Least-cost tolerances for one stack model.

    Attributes
    ----------
    model : str
        'worst-case', 'rss' or 'mean-shift'.
    status : str
        'optimal' (solved and re-checked against every requirement), 'infeasible'
        (no tolerances within limits can meet a requirement; ``message`` says which and
        by how much) or 'failed' (the solvers did not produce a verified optimum).
    success : bool
        ``status == 'optimal'``.
    message : str
    total_cost : float or None
        ``Σ count · cost(t)`` at the allocated tolerances [currency].
    current_cost : float
        The same at the case's current tolerances (NaN if a current tolerance lies
        outside its cost table) [currency].
    savings, savings_percent : float or None
        ``current_cost − total_cost`` [currency] and as % of ``current_cost``.
    tolerances, current, unit_cost, active : pandas.Series
        Allocated and current ± tolerances [length], unit cost at the allocation
        [currency], and per contributor 'tightest' | 'loosest' | 'fixed' | ''.
    processes : dict
        Contributor name -> process name ('' for a contributor without processes).
    requirements : list of RequirementResult
    solver : str
        'lagrange-dual' (exact 1-D dual), 'lagrange-newton' (one requirement under mean
        shift) or the conic solver's name ('clarabel', ...).
    iterations : int
        Root-finding steps (dual) or solver iterations (summed over cutting planes).
    gap : float or None
        Relative gap between the returned cost and a lower bound on the optimum.
    held : dict
        Tolerances held by the ``fix`` argument.
    units : str
        The case's units label.
    contributor_units : dict
        Contributor name -> units label of its tolerances (its own, else the case's);
        the constructor takes only the labels that differ from ``units``.
    rounding : str or None
        How the discrete solver rounded the tolerances (e.g. 'multiples of 0.001'); None
        without ``[allocation].rounding``.
    grades : dict
        Contributor name -> ISO 286 grade ('IT7') with ``rounding = "iso286"``.
    unrounded : Allocation or None
        With rounding: the optimum of the same case without rounding, as ``allocate``
        gives it.
    unrounded_cost : float or None
        Its total cost [currency].
    rounding_cost : float or None
        ``total_cost − unrounded_cost`` [currency].
    lower_bound : float or None
        A proven lower bound on the least cost, where the discrete solver computed one
        (``gap`` is relative to it) [currency].

    Notes
    -----
    Complete when built and read-only afterwards: assigning or deleting an attribute
    raises :class:`dataclasses.FrozenInstanceError` (an AttributeError). ``processes``,
    ``held`` and ``grades`` are read-only mappings, ``requirements`` a tuple.
    """

    def __init__(
        self,
        *,
        model,
        status,
        message,
        names,
        current,
        counts,
        tightest,
        loosest,
        unit_cost_current,
        current_cost,
        processes,
        solver,
        iterations,
        gap,
        units,
        currency,
        title,
        held,
        requirements,
        allocated=None,
        unit_cost_allocated=None,
        total_cost=None,
        bounds=None,
        contributor_units=None,
        rounding=None,
        grades=None,
        unrounded=None,
        unrounded_cost=None,
        rounding_cost=None,
        lower_bound=None,
    ):
        if status not in STATUSES:
            raise ValueError(f"unknown status {status!r}")
        self._build(
            model=model,
            status=status,
            message=message,
            names=tuple(names),
            _current=_frozen_array(current),
            _counts=_frozen_array(counts),
            # each free contributor's tolerance range [tightest, loosest] (NaN when held):
            # the contract's ``limits``, the JSON's "tightest" and "loosest"
            _tightest=_frozen_array(tightest),
            _loosest=_frozen_array(loosest),
            _unit_current=_frozen_array(unit_cost_current),
            current_cost=float(current_cost),
            processes=MappingProxyType(dict(processes)),
            solver=solver,
            iterations=int(iterations),
            gap=gap,
            units=units,
            _own_units=MappingProxyType(dict(contributor_units or {})),  # labels that differ from ``units``
            currency=currency,
            title=title,
            held=MappingProxyType(dict(held)),
            rounding=rounding,  # e.g. 'multiples of 0.001'
            unrounded=unrounded,
            unrounded_cost=None if unrounded_cost is None else float(unrounded_cost),
            rounding_cost=None if rounding_cost is None else float(rounding_cost),
            grades=MappingProxyType(dict(grades or {})),
            lower_bound=None if lower_bound is None else float(lower_bound),
            requirements=tuple(requirements),
            _allocated=None if allocated is None else _frozen_array(allocated),
            _unit_allocated=None if unit_cost_allocated is None else _frozen_array(unit_cost_allocated),
            total_cost=None if total_cost is None else float(total_cost),
            # 'tightest' | 'loosest' | 'fixed' | '' per contributor: the JSON's "bound"
            _bound_flags=tuple(bounds) if bounds is not None else ("",) * len(tuple(names)),
        )

    def _build(self, **fields):
        for name, value in fields.items():
            object.__setattr__(self, name, value)

    def __setattr__(self, name, value):
        raise FrozenInstanceError(f"cannot assign to field {name!r}: an Allocation is read-only")

    def __delattr__(self, name):
        raise FrozenInstanceError(f"cannot delete field {name!r}: an Allocation is read-only")

    # ------------------------------------------------------------------ numbers

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal' (:mod:`allocator.status`)."""
        return self.status == _status.OPTIMAL

    @property
    def savings(self) -> float | None:
        """Current cost minus allocated cost [currency] (None when infeasible)."""
        if self.total_cost is None:
            return None
        return self.current_cost - self.total_cost

    @property
    def savings_percent(self) -> float | None:
        """Savings as a percentage of the current cost [%] (None when infeasible or no cost)."""
        if self.total_cost is None or not self.current_cost:
            return None
        return 100.0 * (self.current_cost - self.total_cost) / self.current_cost

    def cost_delta(self, other: "Allocation") -> float | None:
        """``self.total_cost − other.total_cost`` (e.g. the price of holding a tolerance)."""
        if self.total_cost is None or other.total_cost is None:
            return None
        return self.total_cost - other.total_cost

    def allocated_array(self) -> np.ndarray | None:
        """Allocated tolerances as a numpy array in case order (None when infeasible)."""
        return None if self._allocated is None else self._allocated.copy()

    @property
    def contributor_units(self) -> dict:
        """Contributor name -> units label of its tolerances."""
        return {n: self._own_units.get(n, self.units) for n in self.names}

    # ------------------------------------------------------------------ pandas views

    def _series(self, values, name):
        import pandas as pd

        # a copy: the Allocation's own arrays are read-only
        return pd.Series(np.array(values), index=pd.Index(self.names, name="contributor"), name=name)

    @property
    def tolerances(self):
        """Allocated ± tolerances by contributor (None when infeasible) [length]."""
        return None if self._allocated is None else self._series(self._allocated, "allocated")

    @property
    def current(self) -> pd.Series:
        """The case's current ± tolerances by contributor [length]."""
        return self._series(self._current, "current")

    @property
    def unit_cost(self):
        """Unit cost at the allocated tolerances [currency]."""
        if self._unit_allocated is None:
            return None
        return self._series(self._unit_allocated, "unit_cost")

    @property
    def active(self) -> pd.Series:
        """Where each allocated tolerance sits: 'tightest', 'loosest', 'fixed' or '' (free)."""
        return self._series(list(self._bound_flags), "bound")

    # ------------------------------------------------------------------ plain views

    def rows(self) -> list[dict]:
        """One plain dict per contributor (what ``to_frame`` shows, without pandas)."""
        out = []
        for i, name in enumerate(self.names):
            out.append(
                {
                    "contributor": name,
                    "process": self.processes.get(name, ""),
                    "count": int(self._counts[i]),
                    "current": float(self._current[i]),
                    "allocated": None if self._allocated is None else float(self._allocated[i]),
                    "bound": self._bound_flags[i],
                    "tightest": _finite(self._tightest[i]),
                    "loosest": _finite(self._loosest[i]),
                    "unit_cost_current": _finite(self._unit_current[i]),
                    "unit_cost_allocated": (
                        None if self._unit_allocated is None else _finite(self._unit_allocated[i])
                    ),
                    "units": self._own_units.get(name, self.units),
                }
            )
        return out

    def to_frame(self) -> pd.DataFrame:
        """Per-contributor DataFrame (index ``contributor``): current, allocated, bound,
        unit costs, count, limits."""
        import pandas as pd

        return pd.DataFrame(self.rows()).set_index("contributor")

    def requirements_frame(self) -> pd.DataFrame:
        """Per-requirement DataFrame (index ``requirement``): ranges, σ, fallout vs target,
        shadow prices."""
        import pandas as pd

        return pd.DataFrame([r.to_dict() for r in self.requirements]).set_index("name").rename_axis("requirement")

    def _repr_html_(self) -> str:
        from ..display import result_html

        cost = "" if self.total_cost is None else f", total cost {self.total_cost:.6g} {self.currency}".rstrip()
        return result_html(f"Allocation {self.model}: {self.status}{cost}", self.to_frame(), self.message)

    def to_dict(self) -> dict:
        """JSON-ready dict; the contract keys are model, status, total_cost, tolerances."""
        return {
            "model": self.model,
            "status": self.status,
            "success": self.success,
            "message": self.message,
            "total_cost": self.total_cost,
            "current_cost": self.current_cost,
            "savings": self.savings,
            "savings_percent": self.savings_percent,
            "tolerances": (
                {} if self._allocated is None
                else {n: float(t) for n, t in zip(self.names, self._allocated)}
            ),
            "contributors": self.rows(),
            "requirements": [r.to_dict() for r in self.requirements],
            "held": dict(self.held),
            "solver": self.solver,
            "iterations": self.iterations,
            "gap": self.gap,
            "rounding": self.rounding,
            "unrounded_cost": self.unrounded_cost,
            "rounding_cost": self.rounding_cost,
            "grades": dict(self.grades),
            "units": self.units,
            "currency": self.currency,
        }

    def __repr__(self) -> str:
        head = f"Allocation(model={self.model!r}, status={self.status!r}"
        if self.total_cost is None:
            return f"{head}, message={self.message!r})"
        cur = f" {self.currency}" if self.currency else ""
        lines = [
            f"{head}, total_cost={self.total_cost:.6g}{cur}, current_cost={self.current_cost:.6g}{cur}, "
            f"solver={self.solver!r})"
        ]
        width = max(len(n) for n in self.names) if self.names else 0
        for row in self.rows():
            lines.append(
                f"  {row['contributor']:<{width}}  ±{row['current']:.4g} -> ±{row['allocated']:.4g}"
                + (f"  [{row['bound']}]" if row["bound"] else "")
            )
        for r in self.requirements:
            text = (
                f"  {r.name}: worst case [{r.worst_case_min:.6g}, {r.worst_case_max:.6g}], "
                f"sigma {r.sigma:.4g}, fallout {r.fallout_ppm:.4g} ppm"
            )
            if r.target_ppm is not None:
                text += f" (target {r.target_ppm:.4g})"
            lines.append(text)
        if self.message:
            lines.append(f"  {self.message}")
        return "\n".join(lines)


@dataclass(frozen=True)
class Brief:
    """A solve's verdict before its :class:`Allocation` is built.

    What the many solves inside a sweep or a branch and bound read: the status, the
    total cost, the gap and the allocated tolerances, re-checked like any allocation's.
    :meth:`allocation` builds the complete :class:`Allocation` (the same object the plain
    solve returns) when one is wanted; building it is most of a fast solve's time.

    Attributes
    ----------
    status : str
        As :attr:`Allocation.status`.
    message : str
    total_cost : float or None
        [currency]
    gap : float or None
        Relative gap to a proven lower bound (None where none was proven).
    solver : str
    """

    status: str
    message: str
    total_cost: float | None
    gap: float | None
    solver: str
    _allocated: np.ndarray | None = None
    _build: Callable[[], "Allocation"] | None = None

    @property
    def success(self) -> bool:
        """True when ``status`` is 'optimal'."""
        return self.status == _status.OPTIMAL

    def allocated_array(self) -> np.ndarray | None:
        """Allocated tolerances in case order (a copy; None when infeasible)."""
        return None if self._allocated is None else np.array(self._allocated, dtype=float)

    def allocation(self) -> "Allocation":
        """The complete :class:`Allocation` (built now)."""
        return self._build()


def complete(result: "Allocation | Brief") -> "Allocation":
    """The complete :class:`Allocation` of a solve's result: a :class:`Brief` builds its
    own, an Allocation is returned as it is."""
    return result.allocation() if isinstance(result, Brief) else result


def _frozen_array(values) -> np.ndarray:
    out = np.array(values, dtype=float)
    out.flags.writeable = False
    return out


def _finite(x):
    x = float(x)
    return x if math.isfinite(x) else None
