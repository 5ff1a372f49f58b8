"""Branch and bound over the options with Lagrangian bounds: one requirement, in numpy.

With one constrained requirement the mixed-integer allocation of :mod:`.discrete` is
solved without a MILP. Every contributor's options are *entries*: one per listed value
(a choose table, rounded values, a held tolerance) and one per continuous process. A
*node* allows a subset of each contributor's entries; its bound is the Lagrangian dual
of the requirement (Everett 1963; Fisher 1981)

.. math:: L(λ) = \\sum_i \\min_{e \\text{ allowed}} \\left(n_i C_e(t) + λ W_i(e) t^m\\right) − λ S

maximised over ``λ ≥ 0`` (bisection on its slope; each inner minimum exact: closed forms
per curve family, every breakpoint and piece of a table, the listed value of a point),
so ``L`` is at most the least cost of any choice in the node (weak duality). For worst
case and rss the requirement itself is the constraint (``W = n|a|``, ``m = 1``; ``W =
n a² f²``, ``m = 2``); for mean shift it is a tangent cut ``u·σ − g'(δ*) δ ≤ g(δ*) −
g'(δ*) δ*``, valid for every choice that meets the requirement (``g`` concave and
decreasing, Cauchy-Schwarz for ``u·σ ≤ ‖σ‖``), taken at good solutions.

Nodes are explored best bound first. At each node the bound prices every allowed entry
(the bound with that entry forced is ``L − min_i + total_e`` at the same ``λ``): entries
whose bound reaches the incumbent's cost are removed (reduced-cost fixing). A node
whose contributors each keep one entry is a *leaf*: listed values only, its cost is
exact and the requirement is checked in numpy; with continuous processes the conic
solver polishes the tolerances with those entries held (a convex problem, whose own
Lagrangian bound then equals its optimum). The proven lower bound is the least bound of
any node left unexplored; the search stops once the incumbent is within the gap target
of it. Any case it cannot finish (a node budget, a polish that fails where the bound
cannot rule the leaf out) returns None, and :mod:`.discrete` solves it by MILP.

References: Everett, H. (1963), Generalized Lagrange multiplier method for solving
problems of optimum allocation of resources, Operations Research 11(3), 399-417.
Fisher, M. L. (1981), The Lagrangian relaxation method for solving integer programming
problems, Management Science 27(1), 1-18. Land, A. H. and Doig, A. G. (1960), An
automatic method of solving discrete programming problems, Econometrica 28(3), 497-520.
"""

from __future__ import annotations

import heapq
import math
from dataclasses import dataclass, field

import numpy as np

from .. import costs, stack
from .problem import mean_shift_allowance

__all__ = ["OptionSearch", "MAX_NODES"]

MAX_NODES = 150  # node budget; beyond it the MILP path decides (a weak bound: give up early)
BISECTION_STEPS = 64  # most halvings of the bracket e^±40 around the scale of λ
LOG_LAMBDA_TOL = 1e-10  # bisection stops at this width in log λ (any λ gives a valid bound) ...
LOG_LAMBDA_TOL_POLISHED = 1e-7  # ... or this one with continuous processes (gap target 1e-5)
GATE_COMBINATIONS = 1e5
GATE_NODES = 20
ROOT_GAP_LIMIT = 0.02  # mean shift, listed values, more combinations than GATE_COMBINATIONS: a root
# bound further than this below the incumbent after GATE_NODES nodes leaves the case to the MILP
EXACT_RTOL = 1e-10  # listed values only: a gap below this is the rounding of the sums (reported 0)
TANGENT_MAX_FALLOUT = 0.49  # as in .discrete: g is concave for targets up to here
CHECK_RTOL = 1e-9  # as in .discrete: a choice meets the requirement within this
WALK_STEPS, WALK_FACTOR = 40, 1.25  # listed values: multipliers tried for a first incumbent
CACHED_MULTIPLIERS = 2048  # per relaxation: each entry's minimiser at these λ is kept
LEAF_KELLEY = 3  # mean shift with an incumbent: tangents tried on a leaf before it is polished
ENOUGH_RTOL = 1e-10  # a warm-started bound stops this close (relative) below the incumbent's cost
WARM_STEP = 0.05  # first step in log λ when a bracket is grown around a neighbouring bound's λ
KELLEY_ROUNDS = 6  # mean shift: tangents tried at the root before the search (2 in a sweep,
# which starts from the last point's choice)


@dataclass
class SearchOutcome:
    """What the search found: the incumbent and the proven lower bound."""

    cost: float  # [currency]
    bound: float  # [currency]
    gap: float
    options: list  # chosen _Option per contributor
    tolerances: np.ndarray  # [length]
    labels: list  # grade label per contributor ('' where none)
    allocation: object  # the polish's Allocation (None for listed values only)
    nodes: int
    exact: bool  # listed values only (no polish)


class _Entries:
    """Every entry of every contributor, sorted by contributor."""

    def __init__(self, solver):
        from .problem import CurveSet

        self.n = solver.counts.astype(float)
        owner, opts, kind, t_pt, c_pt, labels = [], [], [], [], [], []
        for i, options in enumerate(solver.options):
            for o in options:
                if o.kind == "points":
                    costs_ = np.nan_to_num(np.asarray(o.point_costs, dtype=float))
                    labs = o.labels if len(o.labels) == o.points.size else ("",) * o.points.size
                    for x, c, lab in zip(o.points, costs_, labs):
                        owner.append(i), opts.append(o), kind.append(0)
                        t_pt.append(float(x)), c_pt.append(float(c)), labels.append(lab)
                else:
                    if o.curve is None:
                        k = 3
                    elif costs.family_of(o.curve).piecewise:
                        k = 2
                    else:
                        k = 1
                    owner.append(i), opts.append(o), kind.append(k)
                    t_pt.append(np.nan), c_pt.append(0.0), labels.append("")
        self.owner = np.array(owner, dtype=int)
        self.opts, self.labels = opts, labels
        self.kind = np.array(kind, dtype=int)
        self.t_point, self.c_point = np.array(t_pt), np.array(c_pt)
        self.size = self.owner.size
        self.n_owner = len(solver.options)
        self.starts = np.searchsorted(self.owner, np.arange(self.n_owner))
        self.count = self.n[self.owner]
        self.factor = np.array([o.factor for o in opts], dtype=float)
        self.points = np.flatnonzero(self.kind == 0)
        self.formula = np.flatnonzero(self.kind == 1)
        self.free = np.flatnonzero(self.kind == 3)
        self.lo = np.array([o.limits[0] for o in opts], dtype=float)
        self.hi = np.array([o.limits[1] for o in opts], dtype=float)
        self.curves = CurveSet([opts[k].curve for k in self.formula]) if self.formula.size else None
        self.tables = []
        for k in np.flatnonzero(self.kind == 2):  # linear between breakpoints
            o = opts[k]
            x = np.asarray(costs.family_of(o.curve).kinks(o.curve), dtype=float)
            x = np.union1d(x[(x > o.limits[0]) & (x < o.limits[1])], o.limits)
            c = np.asarray(costs.cost_value(o.curve, x), dtype=float)
            self.tables.append((k, x, np.nan_to_num(c)))
        self.continuous = self.kind != 0

    def per_entry(self, lam, weight, m):
        """(cost part n·C, constraint part W·t^m, t) of each entry's minimiser at ``lam``."""
        cost, t = np.zeros(self.size), np.zeros(self.size)
        n = self.count
        price = lam * weight / n
        k = self.points
        t[k], cost[k] = self.t_point[k], n[k] * self.c_point[k]
        if self.formula.size:
            from .exact import minimise_price

            k = self.formula
            t[k], ck = minimise_price(self.curves, price[k], self.lo[k], self.hi[k], m)
            cost[k] = n[k] * ck
        k = self.free
        t[k] = np.where(weight[k] > 0, self.lo[k], self.hi[k])
        for k, x, c in self.tables:
            xs, cs = [x], [c]
            if m == 2 and price[k] > 0:  # each piece: c0 + slope (t − x0) + price t²
                slope = np.diff(c) / np.diff(x)
                stat = np.clip(-slope / (2.0 * price[k]), x[:-1], x[1:])
                xs.append(stat), cs.append(c[:-1] + slope * (stat - x[:-1]))
            xs, cs = np.concatenate(xs), np.concatenate(cs)
            j = int(np.argmin(cs + price[k] * xs**m))
            t[k], cost[k] = xs[j], n[k] * cs[j]
        return cost, weight * t**m, t


@dataclass
class _Relaxation:
    """The requirement (or a tangent cut of it) as ``Σ W_e t^m ≤ rhs``."""

    weight: np.ndarray  # per entry
    m: int
    rhs: float
    cache: dict = field(default_factory=dict)  # λ -> each entry's (cost, use, t)


@dataclass
class _Bound:
    value: float
    lam: float
    totals: np.ndarray  # per entry at lam (inf where not allowed)
    pick: np.ndarray  # entry per contributor at lam
    feasible_pick: np.ndarray  # entry per contributor at the bracket's feasible end
    t: np.ndarray  # per entry at lam
    rough: bool = False  # stopped early: the node could not be pruned at that incumbent


class OptionSearch:
    """Branch and bound over a :class:`~allocator.solve.discrete.DiscreteAllocation`'s options.

    Parameters
    ----------
    solver : DiscreteAllocation
    limits : list of RequirementLimits
    r : int
        The one requirement with limits.
    polish : callable
        ``polish(options, held, lam) -> Allocation or None``: the conic optimum with those
        options (and the listed tolerances ``held``) held; ``lam`` is the multiplier of
        the worst-case or rss bound that picked them (None: none), where its root is.
    gap_target : float
    """

    def __init__(self, solver, limits, r, polish, gap_target):
        self.solver = solver
        self.model = solver.model
        # the entries depend only on the options: kept on the solver for the next solve
        if getattr(solver, "_entries", None) is None:
            solver._entries = _Entries(solver)
        self.entries = solver._entries
        self.limits, self.r = limits, r
        self.req, self.lim = solver.requirements[r], limits[r]
        self.room = min(stack.room(self.req.nominal, self.lim.lower, self.lim.upper))
        self.a = np.abs(solver.sensitivity[r])
        self.polish = polish
        self.exact = not self.entries.continuous.any()
        self.gap_target = EXACT_RTOL if self.exact else max(float(gap_target), EXACT_RTOL)
        self.log_tol = LOG_LAMBDA_TOL if self.exact else LOG_LAMBDA_TOL_POLISHED
        self.nodes = 0
        self.best = None  # (cost, entries, t, allocation)
        self.relaxations: list[_Relaxation] = []
        self._seen = set()

    # ------------------------------------------------------------------ relaxations

    def applies(self) -> bool:
        if not self.room > 0:
            return False
        if self.model == "mean-shift":
            return self.lim.fallout <= TANGENT_MAX_FALLOUT
        return True

    def _plain(self) -> _Relaxation | None:
        e = self.entries
        a = self.a[e.owner]
        # the entries' minimisers at each λ do not depend on the limits (only S does): one
        # cache per requirement on the solver, shared by the points of a sweep
        kept = getattr(self.solver, "_plain_caches", None)
        if kept is None:
            kept = self.solver._plain_caches = {}
        cache = kept.setdefault(self.r, {})
        if self.model == "worst-case":
            return _Relaxation(e.count * a, 1, self.room, cache)
        sigma_max = stack.sigma_limit(self.req.nominal, self.lim.fallout, self.lim.lower, self.lim.upper)
        return _Relaxation(e.count * (a * e.factor) ** 2, 2, sigma_max**2, cache)

    def _tangent(self, entry_pick, t) -> _Relaxation | None:
        """Mean shift: the tangent cut at the choice ``entry_pick`` with tolerances ``t``."""
        e, n = self.entries, self.solver.counts
        f = e.factor[entry_pick]
        sigma_i = np.sqrt(n) * self.a * f * t
        sigma = float(np.sqrt(np.sum(sigma_i**2)))
        delta = float(np.sum(n * self.a * self.solver.mean_shifts * t))
        if not sigma > 0:
            return None
        delta = min(max(delta, 0.0), self.room * (1 - 1e-12))
        g, slope, _ = mean_shift_allowance(self.req.nominal, delta, self.lim)
        slope = min(slope, 0.0)
        u = sigma_i / sigma
        o = e.owner
        weight = u[o] * np.sqrt(e.count) * self.a[o] * e.factor - slope * e.count * self.a[o] * self.solver.mean_shifts[o]
        rhs = g - slope * delta
        if not (math.isfinite(rhs) and rhs > 0):
            return None
        return _Relaxation(weight, 1, rhs)

    # ------------------------------------------------------------------ bounds

    def _totals(self, lam, rel, mask):
        # each entry's minimiser at λ does not depend on the node: the bisections of
        # different nodes share their first midpoints, so they are kept per relaxation
        cache = rel.cache
        if lam in cache:
            cost, use, t = cache[lam]
        else:
            cost, use, t = self.entries.per_entry(lam, rel.weight, rel.m)
            if len(cache) < CACHED_MULTIPLIERS:
                cache[lam] = (cost, use, t)
        total = np.where(mask, cost + lam * use, np.inf)
        order = np.lexsort((total, self.entries.owner))
        pick = order[self.entries.starts]
        return total, pick, use, t, cost

    def _bound(self, rel: _Relaxation, mask, precise: bool = False) -> _Bound:
        """The Lagrangian bound of the node ``mask`` under ``rel`` (maximised over λ).

        Any λ gives a valid bound. The maximiser is where the slope ``Σ W t^m − S``
        changes sign: by bisection in log λ over a wide bracket, or, where an earlier
        bound of a sweep left its λ (at the previous point, or the previous node), by a bracket grown outward from that λ and closed by regula falsi on the
        log of the spread (the Illinois variant, with a bisection step whenever the
        bracket does not halve), stopping at the same width in log λ.
        """
        rhs, rough = rel.rhs, False
        total, pick, use, t, cost = self._totals(0.0, rel, mask)
        best = (float(np.sum(total[pick])), 0.0, total, pick, t, cost, use)
        feasible = pick if float(np.sum(use[pick])) <= rhs else None
        if feasible is None:
            # a sweep (the solver has a plan of points): start from the last bound's λ
            hint = getattr(self.solver, "_lambda_hint", None) if getattr(self.solver, "_plan", ()) else None
            if hint is not None and hint > 0 and math.isfinite(hint):
                best, feasible, rough = self._warm_bisection(rel, mask, rhs, best, math.log(hint), precise)
            else:
                best, feasible = self._bisection(rel, mask, rhs, best)
            if best[1] > 0:
                self.solver._lambda_hint = best[1]
        value, lam, total, pick, t, cost, use = best
        if not math.isfinite(value):
            return _Bound(math.inf, lam, total, pick, feasible, t)
        # a margin for the rounding of the sums (the bound must never exceed the optimum)
        margin = 1e-12 * float(np.sum(np.abs(cost[pick]) + lam * use[pick]) + lam * rhs)
        return _Bound(value - margin, lam, total, pick, feasible, t, rough)

    def _at(self, x, rel, mask, rhs, best):
        """Evaluate the dual at log λ = x: (slope Σ W t^m − S, value L, pick, best so far)."""
        lam = math.exp(x)
        total, pick, use, t, cost = self._totals(lam, rel, mask)
        spread = float(np.sum(use[pick]))
        value = float(np.sum(total[pick])) - lam * rhs
        if value > best[0]:
            best = (value, lam, total, pick, t, cost, use)
        return spread - rhs, value, pick, best

    def _bisection(self, rel, mask, rhs, best):
        feasible = None
        scale = float(np.sum(self.entries.n)) / rhs
        lo, hi = math.log(scale) - 40.0, math.log(scale) + 40.0
        for _ in range(BISECTION_STEPS):
            mid = 0.5 * (lo + hi)
            slope, _, pick, best = self._at(mid, rel, mask, rhs, best)
            if slope > 0:
                lo = mid
            else:
                hi = mid
                feasible = pick
            if hi - lo < self.log_tol:
                break
        return best, (feasible if feasible is not None else best[3])

    def _warm_bisection(self, rel, mask, rhs, best, x0, precise=False):
        """As :meth:`_bisection`, from a bracket grown around ``x0`` = log λ of a
        neighbouring bound.

        The bracket ``[λ_lo, λ_hi]`` (slope positive at ``λ_lo``, not positive at
        ``λ_hi``) is closed at the crossing of the two ends' supporting lines
        ``L(λ_e) + g_e (λ − λ_e)`` (``g`` the slope), with a bisection step whenever it
        does not halve in three steps. ``L`` is concave, so the lines' crossing value is
        at least ``max L``: the search stops once that is within :data:`ENOUGH_RTOL` of
        the best value met (or the bracket is as narrow as the bisection's, or the bound
        is that close below the incumbent's cost), or, unless ``precise``, once it is
        below what would prune the node: no λ rules the node out, it will be split,
        and any λ's bound is valid. Returns ``(best, feasible pick, rough)``, ``rough``
        true in that last case (the node's bound is then only used where it reaches the
        incumbent's cost itself: :meth:`_settles`).
        """
        scale = float(np.sum(self.entries.n)) / rhs
        floor, ceiling = math.log(scale) - 40.0, math.log(scale) + 40.0
        x0 = min(max(x0, floor), ceiling)
        g, v, pick, best = self._at(x0, rel, mask, rhs, best)
        feasible = None
        # the bound cannot usefully pass the incumbent's cost: stop once it is that close
        enough = math.inf if self.best is None else self.best[0] - ENOUGH_RTOL * abs(self.best[0])
        cost = None if self.best is None or precise else self.best[0]
        hopeless = None if cost is None else cost - self.gap_target * abs(cost)
        if g > 0:
            lo, hi = (x0, v, g), None
            step = WARM_STEP
            while hi is None:
                if best[0] >= enough:
                    return best, best[3], False
                x = min(lo[0] + step, ceiling)
                g, v, pick, best = self._at(x, rel, mask, rhs, best)
                if g <= 0:
                    hi, feasible = (x, v, g), pick
                elif x >= ceiling:
                    return best, best[3], False  # not even the largest λ meets it: as bisection would
                else:
                    lo, step = (x, v, g), 4.0 * step
        else:
            hi, lo, feasible = (x0, v, g), None, pick
            step = WARM_STEP
            while lo is None:
                if best[0] >= enough:
                    return best, feasible, False
                x = max(hi[0] - step, floor)
                g, v, pick, best = self._at(x, rel, mask, rhs, best)
                if g > 0:
                    lo = (x, v, g)
                elif x <= floor:
                    return best, feasible, False
                else:
                    hi, feasible, step = (x, v, g), pick, 4.0 * step
        last = [lo, hi]  # the two latest evaluations, for the secant step
        stalls = 0
        for _ in range(BISECTION_STEPS):
            x_lo, v_lo, g_lo = lo
            x_hi, v_hi, g_hi = hi
            if x_hi - x_lo < self.log_tol or best[0] >= enough:
                break
            l_lo, l_hi = math.exp(x_lo), math.exp(x_hi)
            cross = (v_hi - v_lo + g_lo * l_lo - g_hi * l_hi) / (g_lo - g_hi)
            upper = v_lo + g_lo * (cross - l_lo)
            if math.isfinite(upper) and math.isfinite(best[0]) and upper - best[0] <= ENOUGH_RTOL * abs(best[0]):
                break  # no λ in the bracket gives a bound more than that above the best
            if hopeless is not None and upper < hopeless:
                return best, feasible, True  # no λ brings the node within reach: it is split
            (x1, _, g1), (x2, _, g2) = last
            x = x2 - g2 * (x2 - x1) / (g2 - g1) if g2 != g1 else math.nan  # secant on the slope
            inner = 0.01 * (x_hi - x_lo)
            if stalls >= 2 or not (x_lo + inner <= x <= x_hi - inner):
                x = math.log(cross) if cross > 0 and stalls < 2 else 0.5 * (x_lo + x_hi)
                x = min(max(x, x_lo + inner), x_hi - inner)
                stalls = 0 if stalls >= 2 else stalls
            g, v, pick, best = self._at(x, rel, mask, rhs, best)
            # a step that does not halve the slope counts as a stall (two: bisect)
            stalls = stalls + 1 if abs(g) > 0.5 * min(abs(g1), abs(g2)) else 0
            last = [last[1], (x, v, g)]
            if g > 0:
                lo = (x, v, g)
            else:
                hi, feasible = (x, v, g), pick
        return best, feasible, False

    def _node_bound(self, mask, precise: bool = False) -> _Bound:
        out = None
        for rel in self.relaxations:
            b = self._bound(rel, mask, precise)
            if out is None or b.value > out.value:
                out = b
        return out

    # ------------------------------------------------------------------ leaves

    def _check(self, pick, t) -> bool:
        """The requirement at listed tolerances ``t``, exactly (within CHECK_RTOL)."""
        n, a, f = self.solver.counts, self.a, self.entries.factor[pick]
        if self.model == "worst-case":
            return float(np.sum(n * a * t)) <= self.room * (1 + CHECK_RTOL)
        sigma = float(np.sqrt(np.sum(n * (a * f * t) ** 2)))
        if self.model == "rss":
            sigma_max = stack.sigma_limit(self.req.nominal, self.lim.fallout, self.lim.lower, self.lim.upper)
            return sigma <= sigma_max * (1 + CHECK_RTOL)
        delta = float(np.sum(n * a * self.solver.mean_shifts * t))
        if not delta < self.room:
            return False
        allowed = mean_shift_allowance(self.req.nominal, delta, self.lim)[0]
        return sigma <= allowed * (1 + CHECK_RTOL)

    def _evaluate(self, pick, lam=None, screen=False):
        """Cost and tolerances of the choice ``pick`` (entry per contributor), or None.

        ``lam``: the multiplier of the bound that picked it (the polish's root is there
        when the pick is the bound's own choice throughout its last bracket). ``screen``:
        a choice to polish only if its own bound does not rule it out
        (:meth:`_worth_polishing`)."""
        key = tuple(int(k) for k in pick)
        if key in self._seen:
            return None
        self._seen.add(key)
        e = self.entries
        if not e.continuous[pick].any():
            t = e.t_point[pick]
            if not self._check(pick, t):
                return None
            return float(np.sum(e.n * e.c_point[pick])), t, None
        if screen and not self._worth_polishing(pick):
            return None  # ruled out at the incumbent's cost or above (it only falls)
        held = dict(self.solver.fix)
        for c, k in zip(self.solver.case.contributors, pick):
            if not e.continuous[k] and not c.fixed:
                held[c.name] = float(e.t_point[k])
        if self.model == "mean-shift" or not (lam is not None and 0.0 < lam < math.inf):
            lam = None  # a tangent cut's multiplier is not the polish's
        alloc = self.polish([e.opts[k] for k in pick], held, lam)
        if alloc is None or not alloc.success or alloc.total_cost is None:
            return None
        return float(alloc.total_cost), np.asarray(alloc.allocated_array(), dtype=float), alloc

    def _offer(self, pick, lam=None, screen=False) -> bool:
        """Evaluate ``pick`` (``lam``, ``screen``: as :meth:`_evaluate`); keep it if it
        beats the incumbent. True when it did."""
        out = self._evaluate(pick, lam, screen)
        if out is None:
            return False
        cost, t, alloc = out
        if self.best is not None and cost >= self.best[0]:
            return False
        self.best = (cost, np.array(pick), t, alloc)
        if self.model == "mean-shift":
            rel = self._tangent(np.array(pick), t)
            if rel is not None:
                self.relaxations = (self.relaxations + [rel])[-1:]
        return True

    # ------------------------------------------------------------------ search

    def run(self, start=None) -> SearchOutcome | None:
        """The search; ``start`` (entry per contributor) is tried first as an incumbent."""
        if not self.applies():
            return None
        e = self.entries
        root = np.ones(e.size, dtype=bool)
        if self.model != "mean-shift":
            self.relaxations = [self._plain()]
        # a sweep's last choice, met at these limits: its tangent is the root's relaxation
        # (the node's own Kelley steps follow), no rounds of tangents first
        started = start is not None and self._offer(start)
        if self.model == "mean-shift":
            # tangents at the tightest choice, then at each relaxation's own choice
            # (Kelley's cutting planes, one multiplier each); the best are kept
            if self.best is not None:
                pick, t = self.best[1], self.best[2]
            else:
                pick = self._tightest()
                t = self._loose_t(pick, None)
            kept = []
            for _ in range(KELLEY_ROUNDS if start is None else 0 if started else 2):
                rel = self._tangent(pick, t)
                if rel is None:
                    break
                b = self._bound(rel, root)
                kept.append((b.value, rel))
                if not self._offer(b.feasible_pick) and self.exact and b.lam > 0:
                    self._walk_up(rel, root, b.lam)
                pick, t = b.pick, self._loose_t(b.pick, b.t)
            if not kept and not self.relaxations:
                return None
            kept.sort(key=lambda x: -x[0])
            self.relaxations = self.relaxations[-1:] or [rel for _, rel in kept[:1]]
        counts_all = np.diff(np.append(e.starts, e.size))
        gated = self.exact and self.model == "mean-shift" and (
            np.sum(np.log(counts_all)) > math.log(GATE_COMBINATIONS)
        )
        root_value = -math.inf
        counter = 0
        heap = [(-math.inf, counter, root, False)]
        lower = math.inf  # least bound of the nodes pruned or finished
        while heap:
            key, _, mask, rough = heapq.heappop(heap)
            if self.best is not None and self._settles(key, rough):
                lower = min(lower, key)
                break
            self.nodes += 1
            if self.nodes > MAX_NODES:
                return None
            b = self._node_bound(mask)
            if self.model == "mean-shift" and self.nodes > 1 and (self.best is None or not self._pruned(b.value)):
                # Kelley's step at the node: the tangent at the relaxation's own choice
                rel = self._tangent(b.pick, self._loose_t(b.pick, b.t))
                if rel is not None:
                    b2 = self._bound(rel, mask)
                    if b2.value > b.value:
                        b = b2
            value = max(b.value, key)
            if self.nodes == 1:
                root_value = value
            if gated and self.best is not None and self.nodes >= GATE_NODES and (
                root_value < self.best[0] * (1 - ROOT_GAP_LIMIT)
            ):
                # a tangent cut far from tight over many listed values: the search would
                # run into its node budget; the MILP's interval rows are the better tool
                # (pruned by the incumbent found here)
                return None
            if self.best is None and not math.isfinite(value):
                continue  # nothing in this node meets the requirement
            if (self.nodes == 1 and not (started and self._pruned(value))) or not e.continuous[b.feasible_pick].any():
                # the dual's choice as an incumbent (a polish each with continuous
                # processes: at the root only, the leaves polish the rest; not where a
                # sweep's last choice already leaves the root within the gap target)
                self._offer(b.feasible_pick, b.lam, screen=True)
            if not e.continuous[b.pick].any():
                self._offer(b.pick)
            if self.best is not None and self._pruned(value) and b.rough:
                # stopped early against the last incumbent: closed fully before it counts
                b = self._node_bound(mask, precise=True)
                value = max(b.value, key)
            if self.best is not None and self._pruned(value):
                lower = min(lower, value)
                continue
            # reduced-cost fixing: the bound with entry k forced
            min_i = b.totals[b.pick][e.owner]
            forced = b.value - min_i + b.totals
            if self.best is not None:
                keep = mask & ~self._settles(forced, b.rough)
                lower = min(lower, float(np.min(forced[mask & ~keep], initial=math.inf)))
            else:
                keep = mask & np.isfinite(forced)
            counts = np.add.reduceat(keep.astype(int), e.starts)
            if np.any(counts == 0):
                continue  # some contributor has no entry left: the node is ruled out
            if np.all(counts == 1):
                settled = self._leaf(np.flatnonzero(keep), value)
                if settled is None:
                    return None
                lower = min(lower, settled)
                continue
            # branch on the contributor whose two cheapest entries are closest
            ranked = np.where(keep, forced, np.inf)
            order = np.lexsort((ranked, e.owner))
            first = ranked[order[e.starts]]
            second = ranked[order[np.minimum(e.starts + 1, e.size - 1)]]
            closeness = np.where(counts > 1, second - first, np.inf)
            i = int(np.argmin(closeness))
            lo_, hi_ = e.starts[i], e.starts[i] + counts_all[i]
            for k in range(lo_, hi_):
                if keep[k]:
                    child = keep.copy()
                    child[lo_:hi_] = False
                    child[k] = True
                    counter += 1
                    heapq.heappush(heap, (max(value, float(forced[k])), counter, child, b.rough))
        if self.best is None:
            return None
        cost = self.best[0]
        lower = min(lower, cost)
        gap = max(0.0, (cost - lower) / cost) if cost > 0 else 0.0
        if self.exact and gap <= EXACT_RTOL:
            gap = 0.0  # every node ruled out up to the rounding of the sums
        _, pick, t, alloc = self.best
        return SearchOutcome(cost=cost, bound=lower if gap else cost, gap=gap,
                             options=[e.opts[k] for k in pick], tolerances=t,
                             labels=[e.labels[k] for k in pick], allocation=alloc,
                             nodes=self.nodes, exact=self.exact)

    def _leaf(self, leaf, value):
        """A node with one entry per contributor: the lower bound it leaves, or None when
        it cannot be settled (neither ruled out by its bound nor the incumbent)."""
        e = self.entries
        if not e.continuous[leaf].any():
            self._offer(leaf)
            return math.inf  # listed values: evaluated exactly (met or not)
        tightest = np.where(e.continuous[leaf], e.lo[leaf], e.t_point[leaf])
        if not self._check(leaf, tightest):
            # every requirement grows with every tolerance: if the tightest values of
            # these entries miss it, nothing in the leaf meets it
            return math.inf
        mask = np.zeros(e.size, dtype=bool)
        mask[leaf] = True
        b = self._node_bound(mask)
        value = max(value, b.value)
        if self.best is not None and self._pruned(value):
            return value  # ruled out by its bound: no polish needed
        value, b = self._kelley_leaf(leaf, mask, value, b)
        if self.best is not None and self._settles(value, True):
            return value
        self._offer(leaf, b.lam)
        alloc = self.best[3] if self.best is not None and tuple(self.best[1]) == tuple(leaf) else None
        if alloc is not None and alloc.gap is not None and alloc.total_cost is not None:
            # the leaf is the incumbent: its polish's own dual bound is a bound on the leaf
            # (its bound above may have stopped early, hopeless against the last incumbent)
            value = max(value, float(alloc.total_cost) * (1.0 - float(alloc.gap)))
        if self.model == "mean-shift":
            # the polished leaf's own tangent makes its bound its optimum
            t = self._evaluate_again(leaf)
            rel = None if t is None else self._tangent(leaf, t)
            if rel is not None:
                value = max(value, self._bound(rel, mask).value)
        if self.best is not None and (self._pruned(value) or tuple(self.best[1]) == tuple(leaf)):
            return value
        return None

    def _kelley_leaf(self, leaf, mask, value, b):
        """Mean shift with an incumbent: a leaf's bound after up to :data:`LEAF_KELLEY`
        tangents, each at the last relaxation's own tolerances (a leaf is one convex
        problem: the tangents close on its optimum), stopping once it reaches the
        incumbent's cost. A polish costs some fifteen bounds; most leaves a sweep meets
        are ruled out here, and only at or above the incumbent's cost (the proven lower
        bound stays what polishing them gave). Returns ``(value, bound)``, both unchanged
        in the other cases."""
        if self.model != "mean-shift" or self.best is None:
            return value, b
        for _ in range(LEAF_KELLEY):
            rel = self._tangent(leaf, self._loose_t(leaf, b.t))
            if rel is None:
                break
            b = self._bound(rel, mask)
            value = max(value, b.value)
            if self._settles(value, True):
                break
        return value, b

    def _worth_polishing(self, pick) -> bool:
        """False when the choice ``pick`` is ruled out by its own bound (:meth:`_kelley_leaf`)."""
        if self.model != "mean-shift" or self.best is None:
            return True
        mask = np.zeros(self.entries.size, dtype=bool)
        mask[pick] = True
        value, _ = self._kelley_leaf(pick, mask, -math.inf, self._node_bound(mask))
        return not self._settles(value, True)

    def _evaluate_again(self, leaf):
        """Tolerances of an already polished leaf (from the polish cache), or None."""
        e = self.entries
        held = dict(self.solver.fix)
        for c, k in zip(self.solver.case.contributors, leaf):
            if not e.continuous[k] and not c.fixed:
                held[c.name] = float(e.t_point[k])
        alloc = self.polish([e.opts[k] for k in leaf], held, None)
        if alloc is None or not alloc.success:
            return None
        return np.asarray(alloc.allocated_array(), dtype=float)

    def _walk_up(self, rel, mask, lam):
        """Listed values: the dual's choices at rising multipliers until one meets the
        requirement (each tighter than the last, as a rule): a first incumbent."""
        for _ in range(WALK_STEPS):
            lam *= WALK_FACTOR
            _, pick, _, _, _ = self._totals(lam, rel, mask)
            key = tuple(int(k) for k in pick)
            if key in self._seen:
                continue
            if self._offer(pick) or key in self._seen and self._check(pick, self.entries.t_point[pick]):
                return

    def _pruned(self, value) -> bool:
        cost = self.best[0]
        return value >= cost - self.gap_target * abs(cost)

    def _settles(self, values, rough):
        """Which bounds ``values`` rule their nodes out: within the gap target of the
        incumbent's cost, or at least that cost for a bound stopped early (``rough``:
        the proven lower bound stays as tight as the closed bounds make it)."""
        cost = self.best[0]
        return values >= (cost if rough else cost - self.gap_target * abs(cost))

    def _tightest(self):
        """Entry per contributor with the least σ (the tightest choice)."""
        e = self.entries
        spread = np.where(e.continuous, e.lo, e.t_point) * e.factor
        order = np.lexsort((spread, e.owner))
        return order[e.starts]

    def _loose_t(self, pick, t):
        """Tolerances of a choice: listed values, or the relaxation's (or tightest) value."""
        e = self.entries
        out = np.where(e.continuous[pick], e.lo[pick], e.t_point[pick])
        if t is not None:
            out = np.where(e.continuous[pick], t[pick], out)
        return out
