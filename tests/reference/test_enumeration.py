"""The discrete allocation against exact enumeration of every combination.

Invented cases (random, fixed seeds) with 4-6 contributors of 2-4 options each: ``choose``
tables, and processes with ``choose`` tables and their own cp. Every combination of options
is enumerated with ``itertools.product`` and checked in plain numpy / scipy.stats against the
contract's constraints (docs/methods.md "Worst case", "RSS", "Estimated mean shift"; count
semantics in docs/case-file.md):

- worst case: ``ȳ − Σ n|a|t ≥ L`` and ``ȳ + Σ n|a|t ≤ U``;
- rss: ``Φ((L − ȳ)/σ) + 1 − Φ((U − ȳ)/σ) ≤ p`` with ``σ² = Σ n (a f t)²``;
- mean shift: the same fallout with the mean at ``ȳ ± δ``, ``δ = Σ n|a|m t`` (worst end).

The cheapest feasible combination is the exact optimum (enumeration is the reference);
the solver must reach the same cost to 1e-9 relative.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from allocator.model import (
    AllocationSettings,
    Case,
    Contributor,
    CostCurve,
    Process,
    Requirement,
    sigma_factor,
)
from allocator.solve.discrete import DiscreteAllocation

CP_CHOICES = (0.8, 1.0, 1.33, 1.67)
COEFFS = (1.0, -1.0, 2.0, -0.5, 1.5)


def _choose(points, prices):
    return CostCurve("table", points_tolerance=tuple(points), points_cost=tuple(prices), between="choose")


def _random_contributor(rng, i, with_processes):
    distribution = "normal" if rng.random() < 0.7 else str(rng.choice(["uniform", "triangular"]))
    base = rng.uniform(0.01, 0.05)
    common = dict(
        name=f"c{i}",
        nominal=float(rng.uniform(5, 50)),
        mean_shift=float(rng.uniform(0.0, 0.4)),
        distribution=distribution,
        count=int(rng.integers(1, 3)),
    )
    if with_processes and rng.random() < 0.6:
        processes = []
        for k in range(2):
            points = np.sort(base * rng.uniform(0.3, 3.0, 2))
            prices = np.sort(rng.uniform(0.2, 3.0, 2))[::-1]
            cp = float(rng.choice(CP_CHOICES)) if distribution == "normal" else None
            processes.append(Process(name=f"p{k}", limits=(points[0], points[1]),
                                     cost=_choose(points, prices), cp=cp))
        tolerance = processes[0].limits[0]
        return Contributor(tolerance=tolerance, processes=tuple(processes), **common)
    k = int(rng.integers(2, 5))
    points = np.sort(base * rng.uniform(0.3, 3.0, k))
    # mostly cheaper when looser, sometimes not: the solver must not rely on it
    prices = np.sort(rng.uniform(0.2, 3.0, k))[::-1]
    if rng.random() < 0.3:
        prices = rng.permutation(prices)
    cp = float(rng.choice(CP_CHOICES)) if distribution == "normal" else 1.0
    return Contributor(tolerance=float(points[0]), limits=(points[0], points[-1]),
                       cost=_choose(points, prices), cp=cp, **common)


def _options(c):
    """(t, σ/t, unit cost, process) of every option, written out from the contract."""
    out = []
    processes = c.processes or (Process("", c.limits, c.cost, None),)
    for p in processes:
        cp = p.cp if p.cp is not None else c.cp
        f = sigma_factor(c.distribution, cp)
        for t, price in zip(p.cost.points_tolerance, p.cost.points_cost):
            if p.limits[0] <= t <= p.limits[1]:
                out.append((t, f, price, p.name))
    return out


def _spreads(contributors, coeffs, choice_t, choice_f):
    n = np.array([c.count for c in contributors], dtype=float)
    m = np.array([c.mean_shift for c in contributors])
    a = np.abs(coeffs)
    w = (n * a * choice_t).sum(axis=-1)
    sigma = np.sqrt((n * (coeffs * choice_f * choice_t) ** 2).sum(axis=-1))
    delta = (n * a * m * choice_t).sum(axis=-1)
    return w, sigma, delta


def _fallout(mean, sigma, lower, upper):
    below = stats.norm.cdf(lower, loc=mean, scale=sigma) if lower is not None else 0.0
    above = stats.norm.sf(upper, loc=mean, scale=sigma) if upper is not None else 0.0
    return below + above


def _feasible(model, nominal, lower, upper, p, w, sigma, delta):
    if model == "worst-case":
        ok = np.ones_like(w, dtype=bool)
        if lower is not None:
            ok &= nominal - w >= lower
        if upper is not None:
            ok &= nominal + w <= upper
        return ok
    if model == "rss":
        return _fallout(nominal, sigma, lower, upper) <= p
    worst = np.maximum(_fallout(nominal - delta, sigma, lower, upper),
                       _fallout(nominal + delta, sigma, lower, upper))
    return worst <= p


def _limits_between(rng, model, nominal, tight, loose, p, two_sided):
    """Limits that the tightest combination meets and the loosest does not (mostly)."""
    u = rng.uniform(0.15, 0.6)
    if model == "worst-case":
        half = tight[0] + u * (loose[0] - tight[0])
    else:
        sigma = tight[1] + u * (loose[1] - tight[1])
        delta = tight[2] + u * (loose[2] - tight[2]) if model == "mean-shift" else 0.0
        z = stats.norm.isf(p / 2)  # both sides at this distance: fallout ≤ p
        half = delta + z * sigma
    if two_sided:
        return nominal - half * rng.uniform(1.0, 1.4), nominal + half
    return None, nominal + half


def _random_case(seed, model, with_processes=True, two_requirements=True):
    rng = np.random.default_rng(seed)
    size = int(rng.integers(4, 7))
    contributors = [_random_contributor(rng, i, with_processes) for i in range(size)]
    chains = [{c.name: float(rng.choice(COEFFS)) for c in contributors}]
    if two_requirements:
        shared = rng.choice(size, size=int(rng.integers(2, size)), replace=False)
        chains.append({contributors[k].name: float(rng.choice(COEFFS)) for k in sorted(shared)})
    requirements = []
    for r, chain in enumerate(chains):
        coeffs = np.array([chain.get(c.name, 0.0) for c in contributors])
        nominal = float(sum(coeffs[i] * c.count * c.nominal for i, c in enumerate(contributors)))
        options = [_options(c) for c in contributors]
        tight_t = np.array([min(o[0] for o in opts) for opts in options])
        tight_f = np.array([min(o[0] * o[1] for o in opts) for opts in options]) / tight_t
        loose_t = np.array([max(o[0] for o in opts) for opts in options])
        loose_f = np.array([max(o[0] * o[1] for o in opts) for opts in options]) / loose_t
        p = float(rng.choice([100e-6, 2700e-6, 0.01]))
        tight = _spreads(contributors, coeffs, tight_t, tight_f)
        loose = _spreads(contributors, coeffs, loose_t, loose_f)
        lower, upper = _limits_between(rng, model, nominal, tight, loose, p, rng.random() < 0.7)
        requirements.append(Requirement(name=f"r{r}", chain=chain, lower=lower, upper=upper,
                                        fallout_ppm=p * 1e6))
    return Case(title="invented enumeration case", contributors=tuple(contributors),
                requirements=tuple(requirements), allocation=AllocationSettings(models=(model,)))


def enumerate_optimum(case, model):
    """Cheapest feasible combination by checking every one (itertools.product)."""
    contributors = case.contributors
    options = [_options(c) for c in contributors]
    combos = np.array(list(itertools.product(*[range(len(o)) for o in options])))
    table = lambda k: np.array([[opts[j][k] for j in combos[:, i]] for i, opts in enumerate(options)]).T  # noqa: E731
    t, f, price = table(0), table(1), table(2)
    n = np.array([c.count for c in contributors], dtype=float)
    cost = (n * price).sum(axis=1)
    ok = np.ones(len(combos), dtype=bool)
    for req in case.requirements:
        coeffs = np.array([req.chain.get(c.name, 0.0) for c in contributors])
        nominal = float(sum(coeffs[i] * c.count * c.nominal for i, c in enumerate(contributors)))
        w, sigma, delta = _spreads(contributors, coeffs, t, f)
        ok &= _feasible(model, nominal, req.lower, req.upper, req.fallout_ppm * 1e-6, w, sigma, delta)
    if not ok.any():
        return None, None, ok
    best = np.flatnonzero(ok)[np.argmin(cost[ok])]
    return float(cost[best]), t[best], ok


def _check_against_enumeration(case, model):
    expected, t_best, ok = enumerate_optimum(case, model)
    result = DiscreteAllocation(case, model).solve()
    if expected is None:
        assert result.status == "infeasible"
        return result, ok
    assert result.status == "optimal", result.message
    assert result.total_cost == pytest.approx(expected, rel=1e-9)
    assert result.gap <= 1e-12  # a proven optimum: HiGHS's own gap is round-off at most
    # the returned tolerances meet every requirement in the independent check too
    t = result.allocated_array()
    for req in case.requirements:
        coeffs = np.array([req.chain.get(c.name, 0.0) for c in case.contributors])
        nominal = float(sum(coeffs[i] * c.count * c.nominal for i, c in enumerate(case.contributors)))
        f = np.array([
            sigma_factor(c.distribution, _process_cp(c, result.processes[c.name])) for c in case.contributors
        ])
        w, sigma, delta = _spreads(case.contributors, coeffs, t, f)
        p = req.fallout_ppm * 1e-6
        assert _feasible(model, nominal, req.lower, req.upper, p * (1 + 1e-6), w, sigma, delta)
    return result, ok


def _process_cp(c, name):
    if not c.processes:
        return c.cp
    p = next(p for p in c.processes if p.name == name)
    return p.cp if p.cp is not None else c.cp


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
# seeds 2-4 draw the largest cases (seconds each with mean shift): CI runs them, the fast loop not
@pytest.mark.parametrize("seed", [pytest.param(s, marks=pytest.mark.slow) if s in (2, 3, 4) else s for s in range(6)])
def test_same_optimum_as_enumeration(model, seed):
    case = _random_case(seed, model)
    result, ok = _check_against_enumeration(case, model)
    # the cases are meant to be constrained: not every combination is feasible
    assert not ok.all()


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
def test_choose_tables_only_one_requirement(model):
    case = _random_case(100, model, with_processes=False, two_requirements=False)
    _check_against_enumeration(case, model)


def test_two_sided_mean_shift_with_shifts_is_binding():
    # a case where the mean shift matters: the rss optimum fails the mean-shift check
    for seed in range(200, 240):
        case = _random_case(seed, "mean-shift")
        if all(r.lower is not None for r in case.requirements) and any(
            c.mean_shift > 0.2 for c in case.contributors
        ):
            break
    rss_cost, _, _ = enumerate_optimum(case, "rss")
    ms_cost, _, _ = enumerate_optimum(case, "mean-shift")
    assert ms_cost >= rss_cost
    _check_against_enumeration(case, "mean-shift")


# --------------------------------------------------------------------------- rounding


def _rounding_case(step, model):
    rng = np.random.default_rng(7)
    contributors = []
    for i in range(5):
        lo = float(rng.uniform(0.004, 0.012))
        hi = lo + float(rng.uniform(0.01, 0.02))
        contributors.append(Contributor(
            name=f"d{i}", nominal=float(rng.uniform(5, 40)), tolerance=hi, limits=(lo, hi),
            cost=CostCurve("reciprocal", a=float(rng.uniform(0.1, 1.0)), b=float(rng.uniform(0.002, 0.01))),
            mean_shift=0.2,
        ))
    chain = {c.name: c for c in contributors}
    coeffs = {name: float(rng.choice(COEFFS)) for name in chain}
    nominal = sum(coeffs[c.name] * c.nominal for c in contributors)
    a = np.abs([coeffs[c.name] for c in contributors])
    lo = np.array([c.limits[0] for c in contributors])
    hi = np.array([c.limits[1] for c in contributors])
    if model == "worst-case":
        half = a @ (lo + 0.4 * (hi - lo))
    else:  # about 4σ at 40 % of the way from the tightest to the loosest
        half = 4.0 * np.sqrt(np.sum((a * (lo + 0.4 * (hi - lo)) / 3) ** 2))
        half += 0.2 * (a @ lo) if model == "mean-shift" else 0.0
    req = Requirement(name="gap", chain=coeffs, lower=nominal - 1.2 * half, upper=nominal + half,
                      fallout_ppm=100.0)
    return Case(title="invented rounding case", contributors=tuple(contributors), requirements=(req,),
                allocation=AllocationSettings(models=(model,), rounding=step))


@pytest.mark.parametrize("model", ["worst-case", "rss", "mean-shift"])
def test_rounded_optimum_equals_enumeration_of_rounded_values(model):
    step = 0.004
    case = _rounding_case(step, model)
    # every multiple of the step inside the limits, by hand (not through grades.py)
    values = []
    for c in case.contributors:
        k = np.arange(int(np.ceil(c.limits[0] / step - 1e-9)), int(np.floor(c.limits[1] / step + 1e-9)) + 1)
        values.append(k * step)
    combos = np.array(list(itertools.product(*values)))
    curves = [c.cost for c in case.contributors]
    cost = sum(curve.a + curve.b / combos[:, i] for i, curve in enumerate(curves))
    req = case.requirements[0]
    coeffs = np.array([req.chain[c.name] for c in case.contributors])
    nominal = float(coeffs @ [c.nominal for c in case.contributors])
    f = np.full(len(curves), 1 / 3)
    w, sigma, delta = _spreads(case.contributors, coeffs, combos, f)
    ok = _feasible(model, nominal, req.lower, req.upper, req.fallout_ppm * 1e-6, w, sigma, delta)
    assert ok.any() and not ok.all()
    expected = float(cost[ok].min())

    result = DiscreteAllocation(case, model).solve()
    assert result.status == "optimal", result.message
    assert result.total_cost == pytest.approx(expected, rel=1e-9)
    t = result.allocated_array()
    assert np.allclose(t / step, np.round(t / step), atol=1e-9)
    # rounding can only cost: the unrounded (continuous) optimum is cheaper or equal
    assert result.unrounded_cost <= result.total_cost * (1 + 1e-9)
    assert result.rounding_cost == pytest.approx(result.total_cost - result.unrounded_cost)
