"""Least-cost tolerance allocation.

``allocate(case, model)`` takes the solver :mod:`.dispatch` picks (one rule for every
path):

- the discrete solver (:mod:`.discrete`) for rounding and for contributors that need a
  choice of process or of listed tolerances;
- the exact 1-D Lagrange dual (:mod:`.exact`) when the case has one requirement and the
  model is worst-case or rss (no cvxpy import, fastest); Newton on the KKT conditions for
  one requirement under mean shift;
- Newton on the Lagrange multipliers (:mod:`.multipliers`) for several requirements
  under worst case or rss with formula costs (no cvxpy import; conic fallback);
- the convex conic formulation (:mod:`.continuous`) otherwise, with cutting planes for
  two-sided mean shift.

Every answer is re-checked against the original requirements in plain numpy before it is
called 'optimal' (see :mod:`.problem`).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Mapping, Sequence

from ..model import Case
from .result import Allocation, RequirementResult

if TYPE_CHECKING:  # for type checkers only: nothing here runs
    from typing import Protocol

    from .problem import AllocationProblem

    class Solver(Protocol):
        """What :func:`solver_for` returns: an allocation per set of limit overrides."""

        def solve(self, overrides: Mapping[str, Mapping[str, float]] | None = None) -> Allocation: ...

__all__ = ["allocate", "allocate_all", "solver_for", "prepare", "Allocation", "RequirementResult"]


def prepare(case: Case, model: str, fix: Mapping[str, float] | None = None) -> AllocationProblem:
    """The checked :class:`~allocator.solve.problem.AllocationProblem` for ``case``."""
    from .problem import prepare as _prepare

    return _prepare(case, model, fix)


def _default_model(case: Case) -> str:
    return case.allocation.models[0] if case.allocation.models else "worst-case"


def solver_for(
    case: Case, model: str | None = None, *, fix: Mapping[str, float] | None = None, **options: Any
) -> Solver:
    """A solver object with ``.solve(overrides=None) -> Allocation`` for repeated use.

    The method is the one rule of :mod:`.dispatch` (docs/allocation.md, "Solvers"): the
    discrete solver for rounding or a choice of process (``options`` are its
    ``grid_points``, ``gap_target``, ``time_limit``), else the exact dual, Newton on the
    KKT conditions or a compiled conic problem. Building it once and calling ``solve``
    with limit overrides is what frontier sweeps do.
    """
    from .dispatch import continuous_solver_for

    solver = continuous_solver_for(case, model or _default_model(case), fix)
    if solver is not None:
        return solver
    from .discrete import DiscreteAllocation

    return DiscreteAllocation(case, model or _default_model(case), fix, **options)


def allocate(
    case: Case,
    model: str | None = None,
    *,
    fix: Mapping[str, float] | None = None,
    overrides: Mapping[str, Mapping[str, float]] | None = None,
) -> Allocation:
    """Least-cost ± tolerances for ``case`` under one stack model.

    Parameters
    ----------
    case : Case
    model : {'worst-case', 'rss', 'mean-shift', 'convolution'}, optional
        Default: the first of the case's ``[allocation].models``.
    fix : dict, optional
        Contributor name -> ± tolerance to hold at [length] (besides the case's
        ``fixed`` contributors).
    overrides : dict, optional
        Requirement name -> dict of ``lower`` / ``upper`` / ``fallout_ppm`` to use
        instead of the case's.

    Returns
    -------
    Allocation
        ``status`` 'optimal', 'infeasible' (``message`` names the requirement, by how much
        the tightest tolerances miss it and the largest contributors) or 'failed'.

    Raises
    ------
    UsageError
        Unknown model or contributor in ``fix``, a held tolerance ≤ 0, or a contributor
        that needs process selection while the discrete solver is not available.
    CaseError
        A cost table that is not convex and decreasing.

    Notes
    -----
    Minimise ``Σ n_i C_i(t_i)`` over ``lower_i ≤ t_i ≤ upper_i`` subject to every
    requirement under the model (see docs/allocation.md). References: Chase, Greenwood,
    Loosli & Hauglund (1990), Manufacturing Review 3(1), 49-59; Greenwood & Chase (1987),
    Journal of Engineering for Industry 109(2), 112-116.
    """
    return solver_for(case, model, fix=fix).solve(overrides)


def allocate_all(
    case: Case, models: Sequence[str] | None = None, *, fix: Mapping[str, float] | None = None
) -> list[Allocation]:
    """:func:`allocate` for each model (default: the case's ``[allocation].models``)."""
    models = tuple(models) if models else tuple(case.allocation.models)
    return [allocate(case, m, fix=fix) for m in models]
