"""Which method solves an allocation problem: the one rule every path takes.

``allocate``, :func:`allocator.solve.solver_for` (and through it sweeps, offers and
studies), the discrete solver's polish with the chosen processes held and the unrounded
optimum reported beside a rounded one all ask :func:`continuous_solver_for` (or, with a
prepared problem, :func:`continuous_solver`). The rule, documented in docs/allocation.md
("Solvers"):

========================================================  =================================
case                                                      method (``result.solver``)
========================================================  =================================
rounding, or a free contributor that needs a choice of    the discrete solver
process or of listed tolerances                           (``allocator.solve.discrete``)
one requirement, worst case or rss (or mean shift with    ``lagrange-dual``: exact 1-D dual
no free mean shift)
one requirement, mean shift                               ``lagrange-newton``: Newton on the
                                                          KKT conditions, conic fallback
several requirements, worst case or rss (or mean shift      ``lagrange-multipliers``: Newton on
with no free mean shift), formula costs                   the multipliers, conic fallback
several requirements, mean shift with a free mean shift,  ``shift-multipliers``: semismooth
formula costs                                             Newton on two prices per requirement,
                                                          conic fallback
several requirements otherwise                            compiled conic problem
model ``convolution`` (linear chains, continuous)         ``convolution-sca``: convex steps
                                                          on the exact fallout
                                                          (:mod:`allocator.solve.convolution`)
========================================================  =================================

This module never imports the discrete solver (which imports it): a case the continuous
methods cannot take gives None here, and the caller builds the discrete solver.
"""

from __future__ import annotations

from typing import Mapping

from ..errors import UsageError, did_you_mean
from ..model import MODELS, Case
from .problem import AllocationProblem, NeedsDiscrete, prepare

__all__ = ["check_model", "needs_discrete", "continuous_solver", "continuous_solver_for"]


def check_model(model: str) -> str:
    """``model`` if it is one of :data:`allocator.model.MODELS`, else a UsageError.

    Checked before the dispatch, so that every solver path says the same.
    """
    if model not in MODELS:
        raise UsageError(f"unknown model {model!r}{did_you_mean(model, MODELS)} (choose from {', '.join(MODELS)})")
    return model


def needs_discrete(case: Case, fix: Mapping[str, float] | None = None) -> bool:
    """True when allocating ``case`` needs the discrete solver.

    A rounding setting; a free contributor with several processes or a ``choose`` table;
    or a held one (``fixed``, or in ``fix``) at a tolerance several of its processes can
    make (holding ``t`` leaves the choice among the processes whose range holds ``t``).
    """
    fix = fix or {}
    if case.allocation.rounding is not None:
        return True
    return any(
        c.needs_choice(c.tolerance if c.fixed else (float(fix[c.name]) if c.name in fix else None))
        for c in case.contributors
    )


def continuous_solver(problem: AllocationProblem):
    """The solver of a prepared continuous ``problem`` (``.solve(overrides=None)``).

    :class:`~allocator.solve.exact.ExactAllocation` for one separable requirement,
    :class:`~allocator.solve.exact.MeanShiftExact` (with the compiled conic problem as its
    fallback) for one requirement under mean shift,
    :class:`~allocator.solve.multipliers.MultiplierNewton` (the same fallback) for several
    separable requirements with formula costs,
    :class:`~allocator.solve.shift_multipliers.ShiftMultiplierNewton` (the same fallback) for
    several mean-shift requirements with formula costs, else
    :class:`~allocator.solve.continuous.CompiledAllocation`. cvxpy is imported only when
    the conic problem is built.
    """
    from .exact import ExactAllocation, MeanShiftExact, applicable, applicable_mean_shift
    from .multipliers import MultiplierNewton, applicable as applicable_multipliers
    from .shift_multipliers import ShiftMultiplierNewton, applicable as applicable_shift

    if applicable(problem):
        return ExactAllocation(problem)
    if applicable_mean_shift(problem):
        return MeanShiftExact(problem, fallback=_conic_factory(problem))
    if applicable_multipliers(problem):
        return MultiplierNewton(problem, fallback=_conic_factory(problem))
    if applicable_shift(problem):
        return ShiftMultiplierNewton(problem, fallback=_conic_factory(problem))
    return _conic_factory(problem)()


def _conic_factory(problem: AllocationProblem):
    def build():
        from .continuous import CompiledAllocation

        return CompiledAllocation.from_problem(problem)

    return build


def continuous_solver_for(case: Case, model: str, fix: Mapping[str, float] | None = None):
    """:func:`continuous_solver` for ``case``, or None when it needs the discrete solver.

    Raises
    ------
    UsageError
        Unknown model, or a bad ``fix`` entry.
    CaseError
        A cost table that is not convex and decreasing.
    """
    check_model(model)
    if model == "convolution":  # its own solver, with the rules above for its sub-problems
        from .convolution import convolution_solver

        return convolution_solver(case, fix, continuous_solver)
    if case.allocation.rounding is not None:
        return None
    try:
        # prepare() finds contributors that need a choice in the same pass that builds the
        # arrays (no separate scan of every contributor)
        problem = prepare(case, model, fix)
    except NeedsDiscrete:
        return None
    return continuous_solver(problem)
