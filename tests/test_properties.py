"""Property tests: random invented cases, every answer re-checked outside the project.

Hypothesis draws cases with 2-40 contributors and 1-5 linear requirements that share
contributors (coefficients ±[0.2, 3], limits placed around the nominal response), random
cost curves (reciprocal, reciprocal-power with k in [0.5, 3], exponential, convex tables),
limits, counts 1-4, distributions, fixed contributors, the three stack models (mean
shift 0-0.5) and fallout targets of 1-10000 ppm. For every 'optimal' allocation the test
checks, with its own numpy code and ``scipy.stats.norm`` (never the project's
``stack.py`` or checker):

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
from dataclasses import dataclass, replace

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, event, given, note, seed, settings
from hypothesis import strategies as st
from scipy import optimize, special, stats

from allocator import stack
from allocator.case import loads_case
from allocator.model import AllocationSettings, Case, Contributor, CostCurve, Requirement
from allocator.solve import allocate

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


def _examples(key: str) -> int:
    return max(1, int(round(EXAMPLES[key] * SCALE)))


def _settings(key: str):
    """Per-test settings: fixed example count, no deadline, reproducible examples."""
    return settings(
        max_examples=_examples(key),
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


def _run(key: str, inner, counter: Counter) -> None:
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
    assert counter.runs >= _examples(key), f"only {counter.runs} of {_examples(key)} examples ran"


# --------------------------------------------------------------------------- independent math
# Everything below is written for these tests from the case-file contract
# (/work/shared/CASE-FORMAT.md), with scipy.stats.norm as the normal reference.


def sigma_over_t(c: Contributor) -> float:
    """σ/t: normal t/(3 cp), uniform t/√3, triangular t/√6 (contract conventions)."""
    return {"normal": 1.0 / (3.0 * c.cp), "uniform": 1.0 / math.sqrt(3.0),
            "triangular": 1.0 / math.sqrt(6.0)}[c.distribution]


def unit_cost(curve: CostCurve | None, t):
    """Unit cost from the published formulas (Chase et al. 1990; Sutherland & Roth 1975;
    Speckhart 1972) or piecewise-linear interpolation of a table; t is an array."""
    t = np.asarray(t, dtype=float)
    if curve is None:
        return np.zeros_like(t)
    if curve.curve == "reciprocal":
        return curve.a + curve.b / t
    if curve.curve == "reciprocal-power":
        return curve.a + curve.b / t**curve.k
    if curve.curve == "exponential":
        return curve.a + curve.b * np.exp(-curve.c * t)
    return np.interp(t, curve.points_tolerance, curve.points_cost)


def unit_cost_slope(curve: CostCurve | None, t):
    t = np.asarray(t, dtype=float)
    if curve is None:
        return np.zeros_like(t)
    if curve.curve == "reciprocal":
        return -curve.b / t**2
    if curve.curve == "reciprocal-power":
        return -curve.k * curve.b / t ** (curve.k + 1)
    if curve.curve == "exponential":
        return -curve.b * curve.c * np.exp(-curve.c * t)
    x, y = np.asarray(curve.points_tolerance), np.asarray(curve.points_cost)
    j = np.clip(np.searchsorted(x, t, side="right") - 1, 0, len(x) - 2)
    return (y[j + 1] - y[j]) / (x[j + 1] - x[j])


class Reference:
    """The case as plain arrays, with vectorised checks over many tolerance vectors."""

    def __init__(self, case: Case, model: str):
        self.case, self.model = case, model
        cs = case.contributors
        self.names = [c.name for c in cs]
        self.n = np.array([c.count for c in cs], dtype=float)
        self.f = np.array([sigma_over_t(c) for c in cs])
        self.m = np.array([c.mean_shift for c in cs]) if model == "mean-shift" else np.zeros(len(cs))
        self.fixed = np.array([c.fixed for c in cs])
        self.held = np.array([c.tolerance for c in cs])
        self.lo = np.array([c.tolerance if c.fixed else c.limits[0] for c in cs])
        self.hi = np.array([c.tolerance if c.fixed else c.limits[1] for c in cs])
        self.curves = [c.cost for c in cs]
        index = {name: i for i, name in enumerate(self.names)}
        self.a = np.zeros((len(case.requirements), len(cs)))
        for r, req in enumerate(case.requirements):
            for name, coeff in req.chain.items():
                self.a[r, index[name]] = coeff
        nominal_sum = np.array([c.count * c.nominal for c in cs])  # a name stands for Σ of its count
        self.y0 = self.a @ nominal_sum
        self.lower = [req.lower for req in case.requirements]
        self.upper = [req.upper for req in case.requirements]
        self.p = np.array([req.fallout_ppm * 1e-6 for req in case.requirements])

    def cost(self, t) -> np.ndarray:
        """Σ n·cost(t) for each row of ``t`` (shape (k, n) or (n,))."""
        t = np.atleast_2d(t)
        total = np.zeros(t.shape[0])
        for i, curve in enumerate(self.curves):
            total += self.n[i] * unit_cost(curve, t[:, i])
        return total

    def spreads(self, t):
        """Worst-case half-width W, σ and mean band δ per requirement and row."""
        t = np.atleast_2d(t)
        abs_a = np.abs(self.a)
        half = (t * self.n) @ abs_a.T
        sigma = np.sqrt((t * self.f) ** 2 * self.n @ (self.a**2).T)
        delta = (t * self.n * self.m) @ abs_a.T
        return half, sigma, delta

    def fallout(self, t, band_points: int = 9) -> np.ndarray:
        """Largest normal fallout over means across ȳ ± δ (rows × requirements)."""
        _, sigma, delta = self.spreads(t)
        shifts = np.linspace(-1.0, 1.0, band_points) if self.model == "mean-shift" else np.zeros(1)
        worst = np.zeros_like(sigma)
        for r in range(self.a.shape[0]):
            mean = self.y0[r] + delta[:, r, None] * shifts[None, :]
            s = sigma[:, r, None]
            total = np.zeros_like(mean)
            if self.lower[r] is not None:
                total = total + stats.norm.cdf((self.lower[r] - mean) / s)
            if self.upper[r] is not None:
                total = total + stats.norm.sf((self.upper[r] - mean) / s)
            worst[:, r] = total.max(axis=1)
        return worst

    def room(self) -> np.ndarray:
        """Worst-case allowance min(ȳ − L, U − ȳ) per requirement."""
        out = []
        for r in range(len(self.y0)):
            lo = math.inf if self.lower[r] is None else self.y0[r] - self.lower[r]
            up = math.inf if self.upper[r] is None else self.upper[r] - self.y0[r]
            out.append(min(lo, up))
        return np.array(out)

    def excess(self, t) -> np.ndarray:
        """Relative violation per row and requirement (≤ 0: met)."""
        t = np.atleast_2d(t)
        if self.model == "worst-case":
            half, _, _ = self.spreads(t)
            return half / self.room() - 1.0
        return self.fallout(t) / self.p - 1.0

    def feasible(self, t, rtol: float = 0.0) -> np.ndarray:
        return np.all(self.excess(t) <= rtol, axis=1)

    def within_limits(self, t) -> bool:
        t = np.asarray(t, dtype=float)
        slack = 1e-12 * self.hi
        free = ~self.fixed
        ok = np.all(t[free] >= self.lo[free] - slack[free]) and np.all(t[free] <= self.hi[free] + slack[free])
        return bool(ok and np.allclose(t[self.fixed], self.held[self.fixed], rtol=1e-12, atol=0))

    def tightest(self) -> np.ndarray:
        return self.lo.copy()

    def random_points(self, rng, k: int) -> np.ndarray:
        """``k`` points inside the limits, from near the tightest to near the loosest."""
        span = np.log(self.hi / self.lo)
        level = rng.uniform(0.0, 1.0, size=(k, 1))  # how loose this point is overall
        jitter = rng.uniform(0.0, 1.0, size=(k, len(self.lo)))
        u = np.clip(level * (0.5 + jitter), 0.0, 1.0)
        return self.lo * np.exp(u * span)


def rtol_for(model: str) -> float:
    # what 'meets the requirement' may mean after floating-point round-off
    return 1e-9 if model == "worst-case" else 1e-6


# --------------------------------------------------------------------------- strategies
# Hypothesis draws the shape of a case (model, sizes, which requirement is broken) and a
# seed; the parameters come from numpy with that seed. Drawing every one of up to 40
# contributors' dozen parameters through Hypothesis costs ~4 ms each, which would eat the
# time budget; a shrunk failure is still small (fewer contributors and requirements) and
# its full case is printed by note().


def _pick(rng, options, weights=None):
    return options[int(rng.choice(len(options), p=weights))]


def _log_uniform(rng, low: float, high: float) -> float:
    return float(math.exp(rng.uniform(math.log(low), math.log(high))))


def random_cost_curve(rng, lo: float, hi: float) -> CostCurve:
    """A convex, decreasing cost over [lo, hi] (variable part 1e-2..1e2 at mid)."""
    kind = _pick(rng, ["reciprocal", "reciprocal-power", "exponential", "table"])
    mid = math.sqrt(lo * hi)
    level = _log_uniform(rng, 1e-2, 1e2)
    a = _pick(rng, [0.0, 0.1, 1.0, 5.0]) * level
    if kind == "reciprocal":
        return CostCurve("reciprocal", a=a, b=level * mid)
    if kind == "reciprocal-power":
        k = _pick(rng, [0.5, 1.0, 2.0, 3.0, float(rng.uniform(0.5, 3.0))])
        return CostCurve("reciprocal-power", a=a, b=level * mid**k, k=k)
    if kind == "exponential":
        c = float(rng.uniform(0.3, 6.0)) / mid
        return CostCurve("exponential", a=a, b=level * math.exp(c * mid), c=c)
    # convex table: slopes negative and rising toward 0 from the tightest point
    inner = np.unique(np.round(rng.uniform(0.05, 0.95, size=int(rng.integers(0, 5))), 3))
    xs = np.concatenate([[lo], lo * (hi / lo) ** inner, [hi]])
    magnitudes = np.sort(rng.uniform(0.05, 5.0, size=len(xs) - 1))[::-1]
    if rng.random() < 0.2:
        magnitudes[:] = magnitudes[0]  # a straight line (convex, not strictly)
    ys = [float(rng.uniform(0.0, 2.0)) * level]
    for j in range(len(xs) - 2, -1, -1):  # walk back from the loosest point
        ys.insert(0, ys[0] + magnitudes[j] * level / mid * (xs[j + 1] - xs[j]))
    return CostCurve("table", points_tolerance=tuple(float(x) for x in xs),
                     points_cost=tuple(float(y) for y in ys))


def random_contributor(rng, index: int, model: str) -> Contributor:
    lo = _log_uniform(rng, 1e-3, 5e-2)
    hi = lo * _log_uniform(rng, 1.5, 40.0)
    cost = random_cost_curve(rng, lo, hi)
    fixed = rng.random() < 0.1
    tolerance = lo * (hi / lo) ** _pick(rng, [0.0, 1.0, float(rng.random())], [0.1, 0.1, 0.8])
    distribution = _pick(rng, ["normal", "uniform", "triangular"], [0.6, 0.2, 0.2])
    cp = _pick(rng, [1.0, 0.8, 1.33, 2.0]) if distribution == "normal" else 1.0
    mean_shift = 0.0
    if model == "mean-shift":
        mean_shift = _pick(rng, [0.0, 0.1, 0.25, 0.5, float(rng.uniform(0.0, 0.5))])
    limits = (lo, hi)
    if fixed and rng.random() < 0.5:
        limits, cost = None, None  # a bought-in part: fixed, no cost
    return Contributor(
        name=f"c{index}",
        nominal=round(float(rng.uniform(-50.0, 50.0)), 3),
        tolerance=tolerance,
        limits=limits,
        cost=cost,
        cp=cp,
        mean_shift=mean_shift,
        distribution=distribution,
        count=int(rng.integers(1, 5)),
        fixed=fixed,
    )


@dataclass(frozen=True)
class Invented:
    case: Case
    model: str
    broken: str | None  # the requirement built to be infeasible, if any


def _reference_spread(ref: Reference, r: int, t, one_sided: bool) -> float:
    """Half-width the limits need at tolerances ``t`` for requirement ``r``.

    worst case: Σ n|a|t; statistical: z·σ (+ δ), z for the target on one side (a sure
    bound for infeasibility) or split over two sides (a sure bound for feasibility).
    """
    half, sigma, delta = (x[0, r] for x in ref.spreads(t))
    if ref.model == "worst-case":
        return half
    p = ref.p[r]
    z = stats.norm.isf(p if one_sided else p / 2.0)
    return z * sigma + (delta if ref.model == "mean-shift" else 0.0)


def build_case(rng, model: str, size: int, count: int, broken: int | None) -> Invented:
    """An invented case: ``size`` contributors, ``count`` requirements sharing them.

    Requirement limits sit around the nominal response: wide enough for the tightest
    tolerances (feasible), up to beyond what the loosest need (not binding); the
    ``broken`` requirement's limits are narrower than the tightest tolerances' spread.
    """
    people = [random_contributor(rng, i, model) for i in range(size)]
    if all(c.fixed for c in people):
        c = people[0]
        lo, hi = c.limits or (0.005, 0.05)
        people[0] = replace(c, fixed=False, limits=(lo, hi), tolerance=min(max(c.tolerance, lo), hi),
                            cost=c.cost or CostCurve("reciprocal", a=0.0, b=0.01))
    shapes = []
    for r in range(count):
        members = rng.choice(size, size=int(rng.integers(1, min(size, 12) + 1)), replace=False)
        chain = {f"c{i}": float(rng.uniform(0.2, 3.0) * rng.choice([-1.0, 1.0])) for i in sorted(members)}
        sides = _pick(rng, ["both", "upper", "lower"], [0.6, 0.2, 0.2])
        ppm = _log_uniform(rng, 1.0, 1e4)
        shapes.append((chain, sides, ppm))
    provisional = Case(
        title="invented", contributors=tuple(people),
        requirements=tuple(Requirement(f"r{r}", chain=chain, lower=-1.0, upper=1.0, fallout_ppm=ppm)
                           for r, (chain, _, ppm) in enumerate(shapes)),
    )
    ref = Reference(provisional, model)
    tight = np.where(ref.fixed, ref.held, ref.lo)
    loose = np.where(ref.fixed, ref.held, ref.hi)
    requirements = []
    for r, (chain, sides, ppm) in enumerate(shapes):
        if r == broken:
            room = _reference_spread(ref, r, tight, one_sided=True) * rng.uniform(0.1, 0.95)
        else:
            need_tight = _reference_spread(ref, r, tight, one_sided=False)
            need_loose = _reference_spread(ref, r, loose, one_sided=False)
            room = need_tight * 1.02 + _pick(rng, [0.0, float(rng.uniform(0, 1.3))], [0.1, 0.9]) * (need_loose - need_tight)
        wider = room * (1.0 + _pick(rng, [0.0, float(rng.uniform(0.0, 1.0))], [0.3, 0.7]))
        y0, room, wider = float(ref.y0[r]), float(room), float(wider)
        lower, upper = (y0 - wider, y0 + room) if rng.random() < 0.5 else (y0 - room, y0 + wider)
        if sides == "upper":
            lower, upper = None, y0 + room
        elif sides == "lower":
            lower, upper = y0 - room, None
        requirements.append(Requirement(f"r{r}", chain=chain, lower=lower, upper=upper, fallout_ppm=ppm))
    case = replace(provisional, requirements=tuple(requirements),
                   allocation=AllocationSettings(models=(model,)))
    return Invented(case, model, f"r{broken}" if broken is not None else None)


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


def test_single_requirement_allocations_are_verified_optima():
    """One requirement, any model, 2-40 contributors (mostly the exact dual)."""
    counter = Counter()

    @_settings("single")
    @_seeded
    @given(invented_cases(max_requirements=1))
    def inner(invented):
        counter.runs += 1
        note(repr(invented.case))
        result = allocate(invented.case, invented.model)
        counter(f"{invented.model} via {result.solver}")
        if not is_honest_failure(invented, result, counter):
            check_optimal(invented, result)

    _run("single", inner, counter)
    check_failures_are_rare(counter)


def test_several_requirements_allocations_are_verified_optima():
    """2-5 requirements sharing contributors (the conic solver, with cutting planes for
    mean shift); small cases so that many examples run quickly."""
    counter = Counter()

    @_settings("several")
    @_seeded
    @given(invented_cases(max_contributors=10, min_requirements=2, max_requirements=5))
    def inner(invented):
        counter.runs += 1
        note(repr(invented.case))
        result = allocate(invented.case, invented.model)
        counter(f"{invented.model} via {result.solver}")
        if not is_honest_failure(invented, result, counter):
            check_optimal(invented, result)

    _run("several", inner, counter)
    check_failures_are_rare(counter)


def test_allocations_are_no_dearer_than_slsqp():
    """The expensive property: an independent SLSQP solve never finds a cheaper
    feasible point (scipy.optimize.minimize, method SLSQP, three starts)."""
    counter = Counter()

    @_settings("slsqp")
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

    _run("slsqp", inner, counter)
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


def _toml_value(x) -> str:
    if isinstance(x, bool):
        return "true" if x else "false"
    if isinstance(x, (int,)):
        return str(x)
    if isinstance(x, float):
        return repr(x)
    if isinstance(x, str):
        return '"' + x + '"'
    if isinstance(x, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in x) + "]"
    raise TypeError(type(x))


def case_text(case: Case) -> str:
    """The case as case-file text (the format in docs/case-file.md)."""
    lines = [f'title = "{case.title}"', ""]
    for c in case.contributors:
        lines += ["[[contributor]]", f'name = "{c.name}"', f"nominal = {c.nominal!r}",
                  f"tolerance = {c.tolerance!r}", f'distribution = "{c.distribution}"',
                  f"count = {c.count}", f"fixed = {_toml_value(c.fixed)}",
                  f"mean_shift = {c.mean_shift!r}"]
        if c.distribution == "normal":
            lines.append(f"cp = {c.cp!r}")
        if c.cost is not None and c.cost.curve != "table":
            lines.append(f"limits = {_toml_value(c.limits)}")
        if c.cost is not None:
            cur = c.cost
            if cur.curve == "table":
                parts = ["curve = \"table\"", f"tolerance = {_toml_value(cur.points_tolerance)}",
                         f"cost = {_toml_value(cur.points_cost)}"]
            else:
                parts = [f'curve = "{cur.curve}"', f"a = {cur.a!r}", f"b = {cur.b!r}"]
                if cur.curve == "exponential":
                    parts.append(f"c = {cur.c!r}")
                if cur.curve == "reciprocal-power":
                    parts.append(f"k = {cur.k!r}")
            lines.append("cost = { " + ", ".join(parts) + " }")
        lines.append("")
    for r in case.requirements:
        chain = ", ".join(f"{k} = {v!r}" for k, v in r.chain.items())
        lines += ["[[requirement]]", f'name = "{r.name}"', "chain = { " + chain + " }"]
        if r.lower is not None:
            lines.append(f"lower = {r.lower!r}")
        if r.upper is not None:
            lines.append(f"upper = {r.upper!r}")
        lines += [f"fallout_ppm = {r.fallout_ppm!r}", ""]
    lines += ["[allocation]", f"models = {_toml_value(list(case.allocation.models))}", ""]
    return "\n".join(lines)


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
