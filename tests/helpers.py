"""Shared test code: builders for invented cases and the tests' own reference math.

- small builders for hand-written invented cases (no file needed);
- ``Reference``: a case as plain arrays with vectorised, independent checks (numpy and
  scipy.stats only) of limits, requirements and cost;
- ``build_case``: random invented cases (used through Hypothesis in test_properties.py,
  with fixed seeds in test_scaling.py);
- ``case_text``: an invented case written as case-file text.
- ``PROCESS_TOML``: an invented part with two processes of different cp, and the exact
  fallout of its chain (``gap_fallout_ppm``).

Test modules import from here, never from each other.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy import stats

from allocator.model import AllocationSettings, Case, Contributor, CostCurve, Requirement


def reciprocal(a=0.0, b=0.01):
    return CostCurve(curve="reciprocal", a=a, b=b)


def contributor(name, nominal=10.0, tolerance=0.05, limits=(0.005, 0.2), **kw):
    kw.setdefault("cost", reciprocal())
    return Contributor(name=name, nominal=nominal, tolerance=tolerance, limits=limits, **kw)


def make_case(contributors, requirements, models=("worst-case", "rss"), **kw):
    return Case(
        title=kw.pop("title", "invented test case"),
        contributors=tuple(contributors),
        requirements=tuple(requirements),
        allocation=AllocationSettings(models=tuple(models)),
        **kw,
    )


def chain_requirement(name, chain, lower=None, upper=None, fallout_ppm=2700.0):
    return Requirement(name=name, chain=dict(chain), lower=lower, upper=upper, fallout_ppm=fallout_ppm)


# --------------------------------------------------------------------------- independent math
# Written for the tests from the case-file contract (docs/case-file.md, "count semantics") and
# the models in docs/methods.md (worst case, RSS, estimated mean shift), with scipy.stats.norm
# as the normal reference; never the project's stack.py or checker. Used by the property,
# scaling and solver-discipline tests.


def body_hub_plate_case(models, *, lower=2.25, upper=2.35, mean_shift=0.0, plate="normal") -> Case:
    """Invented: a bore made by one of three processes, a hub by one of two, a plain plate;
    clearance ``body − hub − plate`` in ``[lower, upper]`` at 100 ppm."""
    from allocator.model import Process

    body = Contributor(name="body", nominal=40.0, tolerance=0.03, mean_shift=mean_shift, processes=(
        Process("turning", (0.02, 0.10), CostCurve("reciprocal", a=3.0, b=0.05)),
        Process("boring", (0.008, 0.03), CostCurve("reciprocal-power", a=5.0, b=0.0006, k=1.2)),
        Process("grinding", (0.002, 0.01), CostCurve("reciprocal", a=9.0, b=0.02), cp=1.33)))
    hub = Contributor(name="hub", nominal=25.0, tolerance=0.02, mean_shift=mean_shift, processes=(
        Process("cast", (0.03, 0.12), CostCurve("exponential", a=0.8, b=4.0, c=30.0)),
        Process("machined", (0.005, 0.08), CostCurve("exponential", a=1.2, b=6.0, c=60.0))))
    plate = Contributor(name="plate", nominal=12.7, tolerance=0.03, limits=(0.01, 0.1), distribution=plate,
                        mean_shift=mean_shift, cost=CostCurve("reciprocal", a=0.8, b=0.01))
    req = Requirement(name="clearance", chain={"body": 1, "hub": -1, "plate": -1},
                      lower=lower, upper=upper, fallout_ppm=100)
    return Case(title="invented", contributors=(body, hub, plate), requirements=(req,),
                allocation=AllocationSettings(models=tuple(models)))


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


# --------------------------------------------------------------------------- invented cases


def slsqp_in_log_t(ref: Reference, margin, *, jac=None, margin_jac=None, accept=None,
                   starts: int = 3, seed: int = 0) -> float | None:
    """Least cost SLSQP finds over ``x = log t`` of the free parts (None: none accepted).

    ``margin(x)`` (>= 0 where the requirements are met) is the constraint, with optional
    Jacobians ``jac`` (of the cost) and ``margin_jac``. The first start is the tightest
    tolerances, the others random in the tighter half (``seed``). ``accept(x, full)``
    returns the ``x`` to cost (e.g. moved onto the tests' own check), or None to drop a
    run; the default keeps the clipped answer as it is.
    """
    from scipy import optimize

    free = ~ref.fixed
    lo, hi = np.log(ref.lo[free]), np.log(ref.hi[free])

    def full(x):
        t = ref.held.copy()
        t[free] = np.exp(x)
        return t

    def cost(x):
        return float(ref.cost(full(x))[0])

    rng = np.random.default_rng(seed)
    best = None
    constraint = {"type": "ineq", "fun": lambda x: margin(full(x))}
    if margin_jac is not None:
        constraint["jac"] = lambda x: margin_jac(full(x))
    for k in range(starts):
        x0 = lo if k == 0 else rng.uniform(lo, 0.5 * (lo + hi))
        out = optimize.minimize(cost, x0, jac=None if jac is None else (lambda x: jac(full(x))),
                                method="SLSQP", bounds=list(zip(lo, hi)), constraints=[constraint],
                                options={"ftol": 1e-14, "maxiter": 500})
        x = np.clip(out.x, lo, hi)
        x = x if accept is None else accept(x, full)
        if x is not None and (best is None or cost(x) < best):
            best = cost(x)
    return best


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


def with_offers(rng, case: Case, n: int = 3) -> Case:
    """The case with ``n`` invented offers (many-digit prices) at tolerances its contributors can hold."""
    from allocator.model import Offer
    from allocator.offers import tolerance_problem

    able = [c for c in case.contributors if tolerance_problem(c, c.tolerance) is None]
    picks = rng.choice(len(able), size=n) if able else []
    offers = tuple(Offer(able[i].name, able[i].tolerance, float(rng.lognormal(0, 1)),
                         "" if k % 2 else f"invented offer {k}") for k, i in enumerate(picks))
    return replace(case, offers=offers)


# --------------------------------------------------------------------------- case text


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


# --------------------------------------------------------------------------- a part with processes

# Invented case: a bore that can be turned (no cp of its own: the contributor's cp 1.0) or
# ground (cp 1.67), and a pin; the gap must stay within 0.1 ± 0.03.
PROCESS_TOML = """
title = "invented bore and pin (verification test)"

[[contributor]]
name = "bore"
nominal = 20.0
tolerance = 0.05

[[contributor.process]]
name = "turning"
limits = [0.035, 0.2]
cost = { curve = "reciprocal", a = 0.1, b = 0.01 }

[[contributor.process]]
name = "grinding"
limits = [0.004, 0.04]
cp = 1.67
cost = { curve = "reciprocal", a = 0.5, b = 0.01 }

[[contributor]]
name = "pin"
nominal = 19.9
tolerance = 0.02
limits = [0.01, 0.2]
cost = { curve = "reciprocal", a = 0.0, b = 0.02 }

[[requirement]]
name = "gap"
chain = { bore = 1, pin = -1 }
lower = 0.07
upper = 0.13
fallout_ppm = 2700

[allocation]
models = ["rss"]
"""
GAP_HALF = 0.03  # the limits are 0.1 ± 0.03 around the nominal gap 0.1


def gap_fallout_ppm(t_bore: float, cp_bore: float, t_pin: float) -> float:
    """Exact fallout of the centred normal gap, from σ_i = t_i/(3·cp_i) (scipy.stats.norm)."""
    sigma = math.hypot(t_bore / (3.0 * cp_bore), t_pin / 3.0)
    return (stats.norm.cdf(-GAP_HALF, 0.0, sigma) + stats.norm.sf(GAP_HALF, 0.0, sigma)) * 1e6


# --------------------------------------------------------------------------- a user's terminal


def run_on_a_terminal(args, cwd):
    """Run the command line in a fresh process with stderr on a pseudo-terminal.

    Returns (exit code, stdout text, everything written to the terminal). The terminal
    is 100 columns wide, as a user's would be.
    """
    import fcntl
    import os
    import pty
    import site
    import struct
    import subprocess
    import sys
    import termios
    import threading
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(root), *site.getsitepackages()]))
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 30, 100, 0, 0))
    chunks = []

    def read():
        while True:
            try:
                data = os.read(master, 4096)
            except OSError:  # the other end closed
                return
            if not data:
                return
            chunks.append(data)

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    try:
        done = subprocess.run([sys.executable, "-m", "allocator", *map(str, args)], cwd=cwd, env=env,
                              stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=slave,
                              timeout=300)
    finally:
        os.close(slave)
        reader.join(timeout=10)
        os.close(master)
    return done.returncode, done.stdout.decode(), b"".join(chunks).decode(errors="replace")


# An invented three-part bracket stack with one requirement (text of a case file; `{lower}`
# is filled in by the test). Not real product data.
BRACKET = """\
# Invented test case, not real product data.
title = "Invented bracket stack"
units = "mm"
currency = "EUR"

[[contributor]]
name = "plate"
nominal = 12.0
tolerance = 0.05
limits = [0.01, 0.2]
cost = { curve = "reciprocal", a = 0.5, b = 0.01 }

[[contributor]]
name = "washer"
nominal = 1.5
tolerance = 0.02
limits = [0.005, 0.1]
count = 2
cost = { curve = "exponential", a = 0.05, b = 0.4, c = 30.0 }

[[contributor]]
name = "boss"
nominal = 8.8
tolerance = 0.04
limits = [0.01, 0.15]
cost = { curve = "reciprocal-power", a = 1.0, b = 0.0002, k = 2.0 }

[[requirement]]
name = "clearance"
chain = { plate = 1, washer = -1, boss = -1 }
lower = {lower}
upper = 0.35
fallout_ppm = 100

[allocation]
models = ["worst-case", "rss"]
"""
