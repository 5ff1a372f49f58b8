"""Solver discipline: what the library does when the conic solver misbehaves.

cvxpy's ``Problem.solve`` is replaced (monkeypatch) by a wrapper that runs the real
solver and then spoils the outcome the way real solvers sometimes do: it raises
``SolverError``, reports ``optimal_inaccurate``, returns NaN or no values, or a point a
little (or a lot) outside the constraints, or a feasible point that is not the optimum.
Whatever happens, an 'optimal' result must be the verified optimum -- checked here with
the independent numpy/scipy.stats code of tests/helpers.py and against an
unspoilt solve -- and anything else must be status 'failed' (``allocate`` exits 1 with a
one-line reason), never an unverified 'optimal'.

The invented case has two requirements sharing contributors. Worst case and rss of such
a case are first offered to Newton on the Lagrange multipliers
(allocator/solve/multipliers.py, tested in test_multipliers.py), mean shift to Newton on
the mean-shift prices (allocator/solve/shift_multipliers.py, tested in
test_shift_multipliers.py); here those paths are switched off, so every model goes through the conic solver (allocator/solve/continuous.py).
"""

from __future__ import annotations

from contextlib import contextmanager

import cvxpy as cp
import numpy as np
import pytest
from click.testing import CliRunner

from allocator.cli.main import cli
from allocator.model import AllocationSettings, Case, Contributor, CostCurve, Requirement
from allocator.solve import allocate
from allocator.solve import continuous, multipliers, shift_multipliers

from helpers import Reference, case_text, rtol_for

MODELS = ("worst-case", "rss", "mean-shift")
REAL_SOLVE = cp.Problem.solve


def invented_case() -> Case:
    """Five contributors, two requirements sharing c1 (invented for these tests)."""
    curves = [
        CostCurve("reciprocal", a=0.8, b=0.004),
        CostCurve("reciprocal-power", a=0.4, b=0.0001, k=2.0),
        CostCurve("exponential", a=0.1, b=0.9, c=40.0),
        CostCurve("reciprocal", a=0.05, b=0.002),
        CostCurve("reciprocal-power", a=1.5, b=0.002, k=1.5),
    ]
    counts = [1, 2, 1, 1, 3]
    people = tuple(
        Contributor(name=f"c{i}", nominal=5.0 + i, tolerance=0.03, limits=(0.004, 0.1), cost=curves[i],
                    mean_shift=0.2, count=counts[i])
        for i in range(5)
    )
    at_nominal = {c.name: c.count * c.nominal for c in people}
    chains = [{"c0": 1.0, "c1": -1.0, "c2": 1.0}, {"c1": 1.0, "c3": -1.0, "c4": 2.0}]
    rooms = [(0.10, 0.15), (0.20, 0.12)]
    requirements = []
    for j, (chain, (below, above)) in enumerate(zip(chains, rooms)):
        y0 = sum(coeff * at_nominal[name] for name, coeff in chain.items())
        requirements.append(Requirement(f"r{j}", chain=chain, lower=y0 - below, upper=y0 + above,
                                        fallout_ppm=[100.0, 1000.0][j]))
    return Case(title="Solver discipline (invented)", contributors=people, requirements=tuple(requirements),
                allocation=AllocationSettings(models=MODELS))


CASE = invented_case()


def _conic_only(problem) -> bool:
    return False  # the multiplier path never applies: the conic solver answers


with pytest.MonkeyPatch.context() as patch:
    patch.setattr(multipliers, "applicable", _conic_only)
    patch.setattr(shift_multipliers, "applicable", _conic_only)
    HONEST = {model: allocate(CASE, model) for model in MODELS}


@pytest.fixture(autouse=True)
def conic_path(monkeypatch):
    monkeypatch.setattr(multipliers, "applicable", _conic_only)
    monkeypatch.setattr(shift_multipliers, "applicable", _conic_only)


def test_the_unspoilt_solves_are_verified_optima():
    """Control: without interference every model is solved by the conic solver."""
    for model, result in HONEST.items():
        assert result.status == "optimal", (model, result.message)
        assert result.solver not in ("lagrange-dual", "lagrange-newton"), result.solver
        assert_verified(model, result)


def assert_verified(model: str, result) -> None:
    """An 'optimal' result: within limits, meets every requirement (independent check)
    and costs what the unspoilt solve costs."""
    ref = Reference(CASE, model)
    t = result.allocated_array()
    assert ref.within_limits(t)
    assert np.all(ref.excess(t)[0] <= rtol_for(model)), ref.excess(t)
    assert result.total_cost == pytest.approx(float(ref.cost(t)[0]), rel=1e-12)
    if model in HONEST and HONEST[model] is not result:
        assert result.total_cost == pytest.approx(HONEST[model].total_cost, rel=1e-7)


def assert_failed_honestly(model: str, result) -> None:
    """A 'failed' result says why and shows only tolerances that meet every requirement."""
    assert result.status == "failed", (result.status, result.message)
    assert not result.success
    assert result.message.startswith("no verified optimum"), result.message
    t = result.allocated_array()
    if t is not None:
        ref = Reference(CASE, model)
        assert ref.within_limits(t) and np.all(ref.excess(t)[0] <= rtol_for(model))
        assert "the tolerances shown meet every requirement" in result.message


def _tau(problem):
    return next(v for v in problem.variables() if v.name() == "tau")


@contextmanager
def spoilt(monkeypatch, spoil, *, solvers=None):
    """Run the real solver, then ``spoil(problem, solver)`` when the solver is in
    ``solvers`` (all when None). Records the solvers called."""
    calls = []

    def solve(self, *args, solver=None, **kwargs):
        calls.append(solver)
        if solvers is None or solver in solvers:
            return spoil(self, solver, lambda: REAL_SOLVE(self, *args, solver=solver, **kwargs))
        return REAL_SOLVE(self, *args, solver=solver, **kwargs)

    monkeypatch.setattr(cp.Problem, "solve", solve)
    try:
        yield calls
    finally:
        monkeypatch.setattr(cp.Problem, "solve", REAL_SOLVE)


def raise_solver_error(problem, solver, run):
    raise cp.error.SolverError(f"{solver} gave up (simulated)")


def report_inaccurate(problem, solver, run):
    value = run()
    problem._status = cp.OPTIMAL_INACCURATE
    return value


def scale_point(factor):
    def spoil(problem, solver, run):
        value = run()
        tau = _tau(problem)
        tau.value = tau.value * factor
        return value

    return spoil


def nan_point(problem, solver, run):
    value = run()
    problem._status = cp.OPTIMAL
    _tau(problem).value = None  # a solver that says optimal but gives no numbers
    return value


# --------------------------------------------------------------------------- retries


@pytest.mark.parametrize("model", MODELS)
def test_solver_error_on_the_first_solver_is_retried_with_another(monkeypatch, model):
    with spoilt(monkeypatch, raise_solver_error, solvers={"CLARABEL"}) as calls:
        result = allocate(CASE, model)
    assert "SCS" in calls, calls  # Clarabel (both tiers) raised, the next solver ran
    assert result.status == "optimal", result.message
    assert result.solver == "scs"
    assert_verified(model, result)


@pytest.mark.parametrize("model", MODELS)
def test_every_solver_raising_is_failed_without_tolerances(monkeypatch, model):
    with spoilt(monkeypatch, raise_solver_error) as calls:
        result = allocate(CASE, model)
    assert set(calls) >= {"CLARABEL", "SCS"}
    assert_failed_honestly(model, result)
    assert result.allocated_array() is None and result.total_cost is None
    for name in continuous.SOLVER_ORDER:
        if name.split("-")[0] in cp.installed_solvers():
            assert f"{name.lower()} failed" in result.message, result.message


@pytest.mark.parametrize("model", MODELS)
def test_inaccurate_first_solver_is_retried_and_the_next_answer_verified(monkeypatch, model):
    with spoilt(monkeypatch, report_inaccurate, solvers={"CLARABEL"}):
        result = allocate(CASE, model)
    assert result.status == "optimal", result.message
    assert result.solver == "scs"
    assert_verified(model, result)


@pytest.mark.parametrize("model", MODELS)
def test_only_inaccurate_answers_are_failed_never_optimal(monkeypatch, model):
    with spoilt(monkeypatch, report_inaccurate):
        result = allocate(CASE, model)
    assert_failed_honestly(model, result)


@pytest.mark.parametrize("model", MODELS)
def test_optimal_without_numbers_is_failed(monkeypatch, model):
    with spoilt(monkeypatch, nan_point):
        result = allocate(CASE, model)
    assert_failed_honestly(model, result)


# --------------------------------------------------------------------------- bad points


@pytest.mark.parametrize("model", MODELS)
@pytest.mark.parametrize("excess", [1e-9, 1e-6, 1e-3, 0.1])
def test_a_point_outside_the_constraints_is_polished_or_failed(monkeypatch, model, excess):
    """Every answer pushed outward by ``excess``: the library either restores and
    verifies the optimum (polish, KKT refinement) or reports 'failed'."""
    with spoilt(monkeypatch, scale_point(1.0 + excess)):
        result = allocate(CASE, model)
    if result.status == "optimal":
        assert_verified(model, result)
    else:
        assert_failed_honestly(model, result)


@pytest.mark.parametrize("model", MODELS)
def test_a_feasible_point_that_is_not_the_optimum_is_not_called_optimal(monkeypatch, model):
    """The solver says optimal but its point is 10 % tighter than the optimum (feasible,
    dearer): the result must be the true optimum or 'failed'."""
    with spoilt(monkeypatch, scale_point(0.9)):
        result = allocate(CASE, model)
    if result.status == "optimal":
        assert result.total_cost == pytest.approx(HONEST[model].total_cost, rel=1e-6), (
            f"'optimal' at {result.total_cost} vs {HONEST[model].total_cost}, gap {result.gap}"
        )
    else:
        assert_failed_honestly(model, result)


# --------------------------------------------------------------------------- through the CLI


@pytest.fixture()
def case_file(tmp_path):
    path = tmp_path / "discipline.toml"
    path.write_text(case_text(CASE), encoding="utf-8")
    return path


def test_cli_exits_0_when_a_retry_succeeds(monkeypatch, case_file):
    with spoilt(monkeypatch, raise_solver_error, solvers={"CLARABEL"}):
        result = CliRunner().invoke(cli, ["allocate", str(case_file), "--model", "rss", "--json"])
    assert result.exit_code == 0, result.output
    assert '"status": "optimal"' in result.stdout


@pytest.mark.parametrize("spoil", [raise_solver_error, report_inaccurate], ids=["error", "inaccurate"])
def test_cli_exits_1_with_one_line_when_no_solver_is_verified(monkeypatch, case_file, spoil):
    with spoilt(monkeypatch, spoil):
        result = CliRunner().invoke(cli, ["allocate", str(case_file), "--model", "rss"])
    assert result.exit_code == 1, result.output
    assert "Traceback" not in result.output and result.exception is None or isinstance(result.exception, SystemExit)
    errors = result.stderr.strip().splitlines()
    # the reason is printed once, with the result on stdout; stderr says which model failed
    assert errors == ["error: allocation with model rss: failed"], result.stderr
    assert "no verified optimum" in result.stdout
    assert "optimal" not in result.stdout.replace("no verified optimum", "")


@pytest.mark.parametrize("model", MODELS)
def test_a_failed_message_names_each_solvers_reason(monkeypatch, model):
    """With cutting planes (mean shift) the round count once replaced the reason."""
    with spoilt(monkeypatch, report_inaccurate):
        result = allocate(CASE, model)
    for name in ("clarabel", "scs"):
        assert f"{name}: inaccurate" in result.message, result.message


@pytest.mark.parametrize("model", MODELS)
@pytest.mark.parametrize("excess", [1e-15, 1e-13, 1e-10, 1e-6, 1e-2, 0.3])
def test_polish_shrinks_to_the_largest_factor_that_meets_the_requirements(model, excess):
    # The optimum pushed outward by ``excess``: polish() returns the largest shrink factor
    # θ whose point meets every requirement, to the last float: θ itself passes the numpy
    # check and the next float above it fails (maximality checked directly, not through
    # the search that found it).
    from allocator.solve import prepare

    problem = prepare(CASE, model)
    limits = problem.limits(None)
    t = HONEST[model].allocated_array() * (1.0 + excess)
    polished, theta = problem.polish(t, limits)
    free = problem.free
    assert 0.0 < theta <= 1.0
    assert problem.feasible(polished, limits)
    if theta < 1.0:
        above = np.nextafter(theta, 2.0)
        shrunk = np.where(free, np.maximum(problem.tightest, above * np.clip(t, problem.tightest, problem.loosest)), t)
        assert not problem.feasible(shrunk, limits), (theta, above)
