"""Property tests: random invented cases, every answer re-checked outside the project.

Hypothesis draws cases with 2-40 contributors and 1-5 linear requirements that share
contributors (coefficients ±[0.2, 3], limits placed around the nominal response), random
cost curves (reciprocal, reciprocal-power with k in [0.5, 3], exponential, convex tables),
limits, counts 1-4, distributions, fixed contributors, the three stack models (mean
shift 0-0.5) and fallout targets of 1-10000 ppm. For every 'optimal' allocation the test
checks, with the tests' own numpy code and ``scipy.stats.norm`` (``Reference`` in
tests/helpers.py; never the project's ``stack.py`` or checker):

- every tolerance lies within its limits and fixed ones are held;
- worst case: ``ȳ ± Σ n|a|t`` inside the limits; rss: the normal fallout at ``ȳ`` is at
  most the target (·(1 + 1e-6)); mean shift: the same with the mean anywhere in
  ``ȳ ± Σ n|a|m t`` (checked on a grid across the band, ends included);
- the reported total cost is ``Σ n·cost(t)`` recomputed from the curve formulas;
- no feasible point among 200 random points within the limits (and 100 small random
  moves of the answer) is cheaper (1e-9 relative);
- (the expensive property, fewer examples) no feasible local optimum that
  ``scipy.optimize.minimize(method="SLSQP")`` finds from three starts is cheaper
  (1e-7 relative; a start that does not converge is skipped).

A feasible case may end 'failed' (no solver answer could be verified) only if the result
says so and any tolerances it shows still meet every requirement, and in at most 2 % of
the examples. Cases built to be infeasible (limits tighter than the response spread at
the tightest tolerances) must come back 'infeasible' with the requirement's name in the
message.

Runs are reproducible: every property is derandomized (the examples depend only on the
test's code and the Hypothesis version) unless ``ALLOCATOR_PROPERTY_SEED`` is set;
``ALLOCATOR_PROPERTY_SCALE`` multiplies the example counts. See docs/reliability.md.
"""

from __future__ import annotations

import math
import os
import zlib

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, event, given, note, seed, settings
from hypothesis import strategies as st
from scipy import optimize, special, stats

from allocator import stack
from allocator.case import loads_case
from allocator.model import Case
from allocator.solve import allocate

from helpers import Invented, Reference, build_case, case_text, rtol_for, unit_cost_slope

# --------------------------------------------------------------------------- run settings

SEED = os.environ.get("ALLOCATOR_PROPERTY_SEED")
SCALE = float(os.environ.get("ALLOCATOR_PROPERTY_SCALE", "1"))
MODELS = ("worst-case", "rss", "mean-shift")

# examples per property (before ALLOCATOR_PROPERTY_SCALE); the sum is what CI runs
EXAMPLES = {
    "sigma_limit": 300,
    "single": 1000,
    "several": 400,
    "slsqp": 120,
    "infeasible": 200,
    "text": 50,
}
# The three longest properties also run on a few examples in the fast loop
# (``pytest -m "not slow"``, see DEVELOPERS.md); the full counts above are marked slow.
QUICK_EXAMPLES = {"single": 60, "several": 30, "slsqp": 12}
SIZES = pytest.mark.parametrize("size", ["quick", pytest.param("full", marks=pytest.mark.slow)])


def _examples(key: str, size: str = "full") -> int:
    counts = QUICK_EXAMPLES if size == "quick" else EXAMPLES
    return max(1, int(round(counts[key] * SCALE)))


def _settings(key: str, size: str = "full"):
    """Per-test settings: fixed example count, no deadline, reproducible examples."""
    return settings(
        max_examples=_examples(key, size),
        deadline=None,
        derandomize=SEED is None,
        database=None,
        print_blob=True,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.filter_too_much],
    )


def _seeded(test):
    return seed(int(SEED))(test) if SEED is not None else test



class Counter:
    """Counts the examples a property actually ran (so a shortfall is noticed)."""

    def __init__(self):
        self.runs = 0
        self.events: dict[str, int] = {}

    def __call__(self, label: str = "") -> None:
        if label:
            self.events[label] = self.events.get(label, 0) + 1


def _run(key: str, inner, counter: Counter, size: str = "full") -> None:
    """Run a Hypothesis property, then report how many examples ran and how to rerun it."""
    mode = f"seed {SEED}" if SEED is not None else "derandomized"
    try:
        inner()
    except Exception as err:  # add the reproduction line to whatever failed
        raise AssertionError(
            f"property '{key}' failed after {counter.runs} examples ({mode}); reproduce with: "
            + (f"ALLOCATOR_PROPERTY_SEED={SEED} " if SEED is not None else "")
            + f"pytest tests/test_properties.py -k {key} -s  (see docs/reliability.md)\n{err}"
        ) from err
    summary = ", ".join(f"{k} {v}" for k, v in sorted(counter.events.items()))
    print(f"[property {key}] {counter.runs} examples ({mode}); {summary}")
    assert counter.runs >= _examples(key, size), f"only {counter.runs} of {_examples(key, size)} examples ran"


# --------------------------------------------------------------------------- strategies
# Hypothesis draws the shape of a case (model, sizes, which requirement is broken) and a
# seed; the parameters come from numpy with that seed. Drawing every one of up to 40
# contributors' dozen parameters through Hypothesis costs ~4 ms each, which would eat the
# time budget; a shrunk failure is still small (fewer contributors and requirements) and
# its full case is printed by note().


@st.composite
def invented_cases(draw, *, min_contributors=2, max_contributors=40, min_requirements=1,
                   max_requirements=5, models=MODELS, infeasible=False) -> Invented:
    model = draw(st.sampled_from(models))
    size = draw(st.integers(min_contributors, max_contributors))
    count = draw(st.integers(min_requirements, max_requirements))
    broken = draw(st.integers(0, count - 1)) if infeasible else None
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    return build_case(rng, model, size, count, broken)


# --------------------------------------------------------------------------- checks


def _rng_for(case: Case) -> np.random.Generator:
    """A generator seeded by the case itself, so a failing example replays exactly."""
    return np.random.default_rng(zlib.crc32(repr(case).encode()))


def check_optimal(invented: Invented, result, *, perturb: bool = True) -> np.ndarray:
    """Assert the independent guarantees of an 'optimal' result; return its tolerances."""
    case, model = invented.case, invented.model
    ref = Reference(case, model)
    assert result.status == "optimal", f"{result.status}: {result.message}"
    t = result.allocated_array()
    assert t is not None and t.shape == (len(case.contributors),)
    assert ref.within_limits(t), "a tolerance is outside its limits or a fixed one moved"
    excess = ref.excess(t)[0]
    assert np.all(excess <= rtol_for(model)), f"requirement missed: relative excess {excess}"
    cost = float(ref.cost(t)[0])
    assert result.total_cost == pytest.approx(cost, rel=1e-9, abs=1e-12)

    rng = _rng_for(case)
    points = ref.random_points(rng, 200)
    points[:, ref.fixed] = ref.held[ref.fixed]
    ok = ref.feasible(points)
    event(f"random points feasible: {'none' if not ok.any() else 'some'}")
    if ok.any():
        best = float(ref.cost(points[ok]).min())
        assert cost <= best * (1 + 1e-9) + 1e-12, f"a random feasible point costs {best} < {cost}"
    if perturb:
        scale = rng.choice([1e-3, 1e-2, 1e-1], size=(100, 1))
        moved = np.clip(t * np.exp(scale * rng.standard_normal((100, len(t)))), ref.lo, ref.hi)
        moved[:, ref.fixed] = ref.held[ref.fixed]
        ok = ref.feasible(moved)
        if ok.any():
            best = float(ref.cost(moved[ok]).min())
            assert cost <= best * (1 + 1e-9) + 1e-12, f"a nearby feasible point costs {best} < {cost}"
    return t


# A feasible case may end 'failed' when no solver's answer can be verified (the library
# must say so rather than guess); that is allowed, but rarely: at most this share of runs.
MAX_FAILED_SHARE = 0.02


def is_honest_failure(invented: Invented, result, counter: "Counter") -> bool:
    """True (and checked) when ``result`` is an explicit 'failed'; False for 'optimal'."""
    if result.status != "failed":
        return False
    counter("failed, said so")
    assert result.message.startswith("no verified optimum"), result.message
    t = result.allocated_array()
    if t is not None:  # tolerances shown with a failure must still meet every requirement
        ref = Reference(invented.case, invented.model)
        assert ref.within_limits(t) and np.all(ref.excess(t)[0] <= rtol_for(invented.model))
    return True


def check_failures_are_rare(counter: "Counter") -> None:
    failed = counter.events.get("failed, said so", 0)
    assert failed <= max(1, MAX_FAILED_SHARE * counter.runs), (
        f"{failed} of {counter.runs} feasible cases ended 'failed'"
    )


def check_infeasible(invented: Invented, result) -> None:
    ref = Reference(invented.case, invented.model)
    bad = ref.excess(ref.tightest())[0] > rtol_for(invented.model)
    assert bad.any(), "test construction: the case should be infeasible at the tightest tolerances"
    assert result.status == "infeasible", f"{result.status}: {result.message}"
    assert result.allocated_array() is None
    for r in np.flatnonzero(bad):
        if ref.excess(ref.tightest())[0][r] > 1e-3:  # clearly missed: must be named
            assert f"'r{r}'" in result.message, result.message


def slsqp_best(invented: Invented) -> float | None:
    """Cheapest feasible SLSQP optimum over three starts (None if none converged).

    Variables ``x = log t`` of the free contributors; constraints written here from the
    contract with analytic gradients: worst case ``1 − W/room ≥ 0``; statistical
    ``log p − log F(μ, σ) ≥ 0`` at ``μ = ȳ`` (rss) or at both ends ``ȳ ± δ`` (mean shift),
    ``F`` the two-tail normal fallout (scipy.special.log_ndtr for the tails).
    """
    case, model = invented.case, invented.model
    ref = Reference(case, model)
    free = ~ref.fixed
    lo, hi = np.log(ref.lo[free]), np.log(ref.hi[free])
    span = hi - lo
    base = ref.held.copy()
    scale = float(ref.cost(np.sqrt(ref.lo * ref.hi))[0]) or 1.0
    a, n, f, m = ref.a, ref.n, ref.f, ref.m
    abs_a = np.abs(a)
    room = ref.room()
    shifts = (-1.0, 1.0) if model == "mean-shift" else (0.0,)

    def full(u):  # u in [0, 1]: position of log t between the limits
        t = base.copy()
        t[free] = np.exp(lo + u * span)
        return t

    def objective(u):
        return float(ref.cost(full(u))[0]) / scale

    def gradient(u):
        t = full(u)
        g = np.array([n[i] * float(unit_cost_slope(ref.curves[i], t[i])) for i in range(len(t))])
        return (g * t)[free] * span / scale

    def constraint(x):
        t = full(x)
        if model == "worst-case":
            return 1.0 - (abs_a * n) @ t / room
        sigma = np.sqrt((a**2 * (n * f**2)) @ (t * t))
        delta = (abs_a * (n * m)) @ t
        out = []
        for r in range(len(ref.y0)):
            for shift in shifts:
                out.append(math.log(ref.p[r]) - _log_fallout(ref, r, ref.y0[r] + shift * delta[r], sigma[r])[0])
        return np.array(out)

    def jacobian(x):
        t = full(x)
        if model == "worst-case":
            return -((abs_a * n) * t / room[:, None])[:, free] * span
        sigma = np.sqrt((a**2 * (n * f**2)) @ (t * t))
        delta = (abs_a * (n * m)) @ t
        rows = []
        for r in range(len(ref.y0)):
            d_sigma = a[r] ** 2 * n * f**2 * t / sigma[r]  # dσ/dt
            d_delta = abs_a[r] * n * m  # dδ/dt
            for shift in shifts:
                mean = ref.y0[r] + shift * delta[r]
                _, d_mean_part, d_sigma_part = _log_fallout(ref, r, mean, sigma[r])
                d = d_mean_part * shift * d_delta + d_sigma_part * d_sigma
                rows.append(-(d * t)[free] * span)  # chain rule to u
        return np.array(rows)

    rng = _rng_for(case)
    starts = [np.zeros_like(lo), np.full_like(lo, 0.5)]
    if lo.size <= 8:  # a third, random start where it is cheap
        starts.append(rng.uniform(0, 0.5, size=lo.shape))
    best = None
    for x0 in starts:
        with np.errstate(all="ignore"):
            res = optimize.minimize(objective, x0, jac=gradient, method="SLSQP",
                                    bounds=[(0.0, 1.0)] * lo.size,
                                    constraints=[{"type": "ineq", "fun": constraint, "jac": jacobian}],
                                    options={"maxiter": 300, "ftol": 1e-13})
        if not res.success:
            continue
        t = full(np.clip(res.x, 0.0, 1.0))
        if not ref.feasible(t, rtol=1e-9)[0]:
            continue
        cost = float(ref.cost(t)[0])
        best = cost if best is None else min(best, cost)
    return best


def _log_fallout(ref: Reference, r: int, mean: float, sigma: float):
    """log F and its partial derivatives in the mean and in σ (two-tail normal fallout)."""
    logs, d_mean = [], []
    if ref.lower[r] is not None:
        z = (ref.lower[r] - mean) / sigma  # F_low = Φ(z)
        logs.append(special.log_ndtr(z))
        d_mean.append((-1.0 / sigma, z))
    if ref.upper[r] is not None:
        z = (mean - ref.upper[r]) / sigma  # F_up = Φ(z)
        logs.append(special.log_ndtr(z))
        d_mean.append((1.0 / sigma, z))
    log_f = float(np.logaddexp.reduce(logs))
    g_mean = g_sigma = 0.0
    for log_tail, (dz_dmean, z) in zip(logs, d_mean):
        weight = math.exp(-0.5 * z * z - 0.5 * math.log(2 * math.pi) - log_f)  # φ(z)/F
        g_mean += weight * dz_dmean
        g_sigma += weight * (-z / sigma)
    return log_f, g_mean, g_sigma


# --------------------------------------------------------------------------- properties


def test_sigma_limit_meets_the_target_exactly():
    """stack.sigma_limit against scipy.stats.norm: the fallout at σ_max is the target.

    Includes limits exactly symmetric about the mean (where a round-off sign error once
    made the root bracket fail with ValueError)."""
    counter = Counter()

    @_settings("sigma_limit")
    @_seeded
    @given(
        mean=st.floats(-100.0, 100.0),
        near=st.floats(math.log(1e-4), math.log(10.0)).map(math.exp),
        ratio=st.sampled_from([1.0, 1.0, 1.0 + 1e-15]) | st.floats(1.0, 5.0),
        ppm=st.floats(math.log(1e-3), math.log(4e5)).map(math.exp),
        side=st.sampled_from(["both", "upper", "lower"]),
    )
    def inner(mean, near, ratio, ppm, side):
        counter.runs += 1
        p = ppm * 1e-6
        lower, upper = mean - near, mean + near * ratio
        if side == "upper":
            lower = None
        elif side == "lower":
            upper = None
        assume(lower is None or lower < mean)
        assume(upper is None or upper > mean)
        sigma = stack.sigma_limit(mean, p, lower, upper)
        fallout = 0.0
        if lower is not None:
            fallout += stats.norm.cdf((lower - mean) / sigma)
        if upper is not None:
            fallout += stats.norm.sf((upper - mean) / sigma)
        assert fallout == pytest.approx(p, rel=1e-8)

    _run("sigma_limit", inner, counter)


@SIZES
def test_single_requirement_allocations_are_verified_optima(size):
    """One requirement, any model, 2-40 contributors (mostly the exact dual)."""
    counter = Counter()

    @_settings("single", size)
    @_seeded
    @given(invented_cases(max_requirements=1))
    def inner(invented):
        counter.runs += 1
        note(repr(invented.case))
        result = allocate(invented.case, invented.model)
        counter(f"{invented.model} via {result.solver}")
        if not is_honest_failure(invented, result, counter):
            check_optimal(invented, result)

    _run("single", inner, counter, size)
    check_failures_are_rare(counter)


@SIZES
def test_several_requirements_allocations_are_verified_optima(size):
    """2-5 requirements sharing contributors (the conic solver, with cutting planes for
    mean shift); small cases so that many examples run quickly."""
    counter = Counter()

    @_settings("several", size)
    @_seeded
    @given(invented_cases(max_contributors=10, min_requirements=2, max_requirements=5))
    def inner(invented):
        counter.runs += 1
        note(repr(invented.case))
        result = allocate(invented.case, invented.model)
        counter(f"{invented.model} via {result.solver}")
        if not is_honest_failure(invented, result, counter):
            check_optimal(invented, result)

    _run("several", inner, counter, size)
    check_failures_are_rare(counter)


@SIZES
def test_allocations_are_no_dearer_than_slsqp(size):
    """The expensive property: an independent SLSQP solve never finds a cheaper
    feasible point (scipy.optimize.minimize, method SLSQP, three starts)."""
    counter = Counter()

    @_settings("slsqp", size)
    @_seeded
    @given(invented_cases(max_contributors=16, max_requirements=5))
    def inner(invented):
        counter.runs += 1
        note(repr(invented.case))
        result = allocate(invented.case, invented.model)
        if is_honest_failure(invented, result, counter):
            return
        check_optimal(invented, result, perturb=False)
        reference = slsqp_best(invented)
        if reference is None:
            counter("slsqp did not converge (skipped)")
            event("slsqp did not converge")
            return
        counter("compared with slsqp")
        assert result.total_cost <= reference * (1 + 1e-7) + 1e-12, (
            f"SLSQP found {reference!r} < {result.total_cost!r} ({result.solver})"
        )

    _run("slsqp", inner, counter, size)
    check_failures_are_rare(counter)
    compared = counter.events.get("compared with slsqp", 0)
    assert compared >= 0.5 * counter.runs, f"SLSQP converged in only {compared} of {counter.runs} examples"


def test_infeasible_cases_name_the_requirement():
    """Limits tighter than the spread at the tightest tolerances: 'infeasible', the
    requirement named, no tolerances returned."""
    counter = Counter()

    @_settings("infeasible")
    @_seeded
    @given(invented_cases(max_contributors=12, max_requirements=4, infeasible=True))
    def inner(invented):
        counter.runs += 1
        note(repr(invented.case))
        result = allocate(invented.case, invented.model)
        counter(invented.model)
        check_infeasible(invented, result)
        assert invented.broken in result.message

    _run("infeasible", inner, counter)


# --------------------------------------------------------------------------- through case text

def test_cases_written_as_text_load_and_allocate_the_same():
    """A few invented cases go through loads_case: the loaded case allocates to the same
    tolerances as the dataclasses it was written from, and passes the same checks."""
    counter = Counter()

    @_settings("text")
    @_seeded
    @given(invented_cases(max_contributors=12, max_requirements=3))
    def inner(invented):
        counter.runs += 1
        text = case_text(invented.case)
        note(text)
        loaded = loads_case(text, source="invented.toml")
        assert loaded.names == invented.case.names
        result = allocate(loaded, invented.model)
        t = check_optimal(Invented(loaded, invented.model, None), result, perturb=False)
        direct = allocate(invented.case, invented.model).allocated_array()
        np.testing.assert_allclose(t, direct, rtol=1e-12)

    _run("text", inner, counter)
