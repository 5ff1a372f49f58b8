"""Tiny fallouts: importance sampling aimed at each limit, with FORM and SORM beside it.

Plain Monte Carlo needs about ``100/p`` assemblies to see a fallout ``p`` with ±20 %
precision: 10¹¹ for 1e-3 ppm. This module looks where the failures are instead.

Per requirement, the contributors are mapped to standard normal space and the most
probable failure point of each limit (lower and upper separately) is found by FORM, with
SORM's curvature correction (:mod:`allocator.form`). Mean shifts are placed as the Monte
Carlo places them (:mod:`allocator.simulate`, "Mean shift": per requirement, on the worse
side). Then assemblies are drawn from a mixture of unit normals centred at the design point
of each limit, plus a small share drawn from the true distribution (defensive mixture,
Hesterberg 1995); every sample carries the weight ``φ(u) / q(u)`` with ``q`` the whole
mixture (the balance heuristic: Veach & Guibas 1995; Owen & Zhou 2000). The estimate is
unbiased whatever FORM found; FORM only decides where the samples go. The confidence
interval comes from the sample variance of the weighted failure indicator within each
component (fixed sample counts per component).

The response is evaluated by an evaluator (:data:`allocator.form.Evaluator`): chains and
expressions by :func:`allocator.form.response_evaluator`; any other requirement kind (for
example one closed by equations, returning ``(y, closed)``) needs only its own, passed as
``verify_importance(..., evaluators={name: f})``.

Cautions: the results assume stable, capable processes with the stated distributions and
independent contributors; safety-critical fits are checked worst case and against the
applicable codes and a licensed engineering review. Far-tail estimates are only as good as
the stated distributions are in their tails.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Mapping

import numpy as np

from .form import BETA_MAX, Evaluator, LimitState, StandardSpace, design_point, response_evaluator, responses
from .ppm import fraction_to_ppm
from .simulate import (
    _assumption_note,
    _bin_range,
    _checked_run,
    _CheckedRun,
    _convolution,
    _plan,
    _prediction_dict,
    _prediction_fields,
    _progress_bar,
    _tolerance_array,
    _unpack,
    _verdict,
    clopper_pearson,
)

if TYPE_CHECKING:
    from .model import Case
    from .simulate import Tolerances

__all__ = [
    "LimitEstimate",
    "importance_estimate",
    "ImportanceCheck",
    "ImportanceVerification",
    "verify_importance",
]

CONFIDENCE = 0.95
DEFENSIVE_SHARE = 0.1  # of the samples drawn from the true distribution (bounds every weight by 10)
MIN_COMPONENT_SHARE = 0.1  # each reachable limit gets at least this share of the aimed samples
BLOCK = 2**15  # samples per random-stream block, fewer for very wide cases (see _block_rows)
BLOCK_VALUES = 2**22  # largest block × coordinates (32 MB per float array)
HISTOGRAM_BINS = 200


# --------------------------------------------------------------------------- importance sampling


@dataclass(frozen=True)
class LimitEstimate:
    """Importance-sampling estimate of one requirement's fallout (fractions, not ppm).

    Attributes
    ----------
    probability, std_error : float
        Estimate and its standard error [-].
    ci_low, ci_high : float
        Two-sided interval at :data:`CONFIDENCE` [-].
    below, above, undefined : float
        Estimates of the fallout under the lower limit, over the upper one and with no
        response (they add up to ``probability``) [-].
    samples : int
        Assemblies drawn in all [-].
    hits : int
        Drawn assemblies that fail [-].
    shares : dict
        Samples per mixture component ('defensive', 'lower', 'upper').
    histogram_edges, histogram_density : numpy.ndarray
        Weighted (unbiased) density of the response over fixed bins [1/response].
    """

    probability: float
    std_error: float
    ci_low: float
    ci_high: float
    below: float
    above: float
    undefined: float
    samples: int
    hits: int
    shares: dict
    histogram_edges: np.ndarray = field(repr=False)
    histogram_density: np.ndarray = field(repr=False)


def _block_rows(width: int) -> int:
    """Rows per random-stream block: :data:`BLOCK`, halved while a block passes the budget."""
    rows = BLOCK
    while rows > 256 and rows * width > BLOCK_VALUES:
        rows //= 2
    return rows


def _block_rng(seed: int, key: tuple) -> np.random.Generator:
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed, spawn_key=key)))


def importance_estimate(
    space: StandardSpace,
    evaluate: Evaluator,
    lower: float | None,
    upper: float | None,
    centres: Mapping[str, np.ndarray],
    weights: Mapping[str, float] | None = None,
    *,
    samples: int = 100_000,
    seed: int = 0,
    stream: int = 0,
    histogram_range: tuple[float, float] | None = None,
    bins: int = HISTOGRAM_BINS,
) -> LimitEstimate:
    """Fallout ``P(y < lower or y > upper or y undefined)`` by a defensive normal mixture.

    Parameters
    ----------
    space : StandardSpace
    evaluate : callable
        Contributor values (n, contributors) -> ``y`` or ``(y, closed)``.
    lower, upper : float or None
        Limits of the response (None: no such limit) [response].
    centres : mapping name -> numpy.ndarray
        Centre of a unit-normal component in u-space per aimed component (e.g. the FORM
        design point of each limit). A ``'defensive'`` component at the origin is
        always added.
    weights : mapping name -> float, optional
        Relative share of the aimed samples per centre (default equal).
    samples : int
        Assemblies drawn in all [-].
    seed, stream : int
        The random stream: block ``b`` of component ``k`` draws from
        ``SeedSequence(seed, spawn_key=(stream, k, b))``; a block is 2¹⁵ samples unless
        the case is very wide (it then depends on the number of coordinates only).
    histogram_range : (float, float), optional
        Range of the weighted histogram [response].

    Returns
    -------
    LimitEstimate

    Notes
    -----
    With ``n_k`` samples from component ``q_k`` (``Σ n_k = N``) and the mixture
    ``q = Σ (n_k/N) q_k``, the estimate ``p̂ = (1/N) Σ_i 1_F(u_i) φ(u_i)/q(u_i)`` is unbiased
    for every failure set F (each sample's weight uses the whole mixture: the balance
    heuristic). Its variance is ``Σ_k (n_k/N)² Var_k(1_F φ/q) / n_k``, estimated with the
    sample variance in each component; the interval is ``p̂ ± z·SE``. With no failure
    drawn, the upper bound is the Clopper–Pearson bound of the defensive samples
    (plain Monte Carlo). The defensive share bounds every weight by ``1/share``.

    References
    ----------
    .. [1] Hesterberg, T. (1995). Weighted average importance sampling and defensive
       mixture distributions. Technometrics 37(2), 185-194.
    .. [2] Veach, E. and Guibas, L. J. (1995). Optimally combining sampling techniques for
       Monte Carlo rendering. Proceedings of SIGGRAPH 95, 419-428.
    .. [3] Owen, A. and Zhou, Y. (2000). Safe and effective importance sampling. Journal of
       the American Statistical Association 95(449), 135-143.
    """
    from scipy import special, stats

    samples = int(samples)
    d = space.dimension
    names = ["defensive", *centres]
    means = np.array([np.zeros(d), *[np.asarray(c, dtype=float) for c in centres.values()]])
    if centres:
        given = np.array([1.0 if weights is None else float(weights[k]) for k in centres])
        share = np.concatenate([[DEFENSIVE_SHARE], (1.0 - DEFENSIVE_SHARE) * given / given.sum()])
    else:
        share = np.ones(1)
    counts = np.floor(share * samples).astype(int)
    counts[np.argmax(share)] += samples - counts.sum()
    log_pi = np.log(np.maximum(counts, 1) / samples)
    lo = -math.inf if lower is None else float(lower)
    hi = math.inf if upper is None else float(upper)

    k_sums = np.zeros((len(names), 4))  # Σ fw, Σ (fw)², Σ w·below, Σ w·above per component
    undefined_sum = 0.0
    hits = 0
    edges = None
    density = np.zeros(bins)
    if histogram_range is not None:
        edges = np.linspace(histogram_range[0], histogram_range[1], bins + 1)
    block = _block_rows(max(d, space.n))
    for k, n_k in enumerate(counts):
        for b, first in enumerate(range(0, n_k, block)):
            size = min(block, n_k - first)
            z = _block_rng(seed, (stream, k, b)).standard_normal((size, d))
            u = z + means[k]
            # log φ(u)/q(u), constants cancel: −½|u|² − log Σ_k π_k exp(−½|u − c_k|²)
            sq = ((u[:, None, :] - means[None, :, :]) ** 2).sum(axis=2)
            log_w = -0.5 * (u * u).sum(axis=1) - special.logsumexp(log_pi[None, :] - 0.5 * sq, axis=1)
            w = np.exp(log_w)
            y = responses(evaluate, space.values(u))
            with np.errstate(invalid="ignore"):
                below = y < lo
                above = y > hi
            nan = ~np.isfinite(y) & ~below & ~above
            fail = below | above | nan
            fw = np.where(fail, w, 0.0)
            hits += int(fail.sum())
            k_sums[k] += [fw.sum(), (fw * fw).sum(), w[below].sum(), w[above].sum()]
            undefined_sum += float(w[nan].sum())
            if edges is not None:
                ok = np.isfinite(y)
                density += np.histogram(y[ok], bins=edges, weights=w[ok])[0]
    total = k_sums[:, 0].sum() / samples
    variance = 0.0
    for k, n_k in enumerate(counts):
        if n_k > 1:
            s1, s2 = k_sums[k, 0], k_sums[k, 1]
            var_k = max(s2 - s1 * s1 / n_k, 0.0) / (n_k - 1)
            variance += (n_k / samples) ** 2 * var_k / n_k
    se = math.sqrt(variance)
    z = float(stats.norm.ppf(0.5 + CONFIDENCE / 2))
    if hits == 0:
        ci_low, ci_high = 0.0, float(clopper_pearson(0, counts[0], CONFIDENCE)[1])
    else:
        ci_low, ci_high = max(total - z * se, 0.0), total + z * se
    if edges is not None:
        density = density / (samples * np.diff(edges))
    else:
        edges = np.zeros(0)
    return LimitEstimate(
        probability=float(total),
        std_error=se,
        ci_low=float(ci_low),
        ci_high=float(ci_high),
        below=float(k_sums[:, 2].sum() / samples),
        above=float(k_sums[:, 3].sum() / samples),
        undefined=undefined_sum / samples,
        samples=samples,
        hits=hits,
        shares=dict(zip(names, (int(n) for n in counts))),
        histogram_edges=edges,
        histogram_density=density,
    )


# --------------------------------------------------------------------------- verification


@dataclass(frozen=True)
class ImportanceCheck:
    """Verification of one requirement by importance sampling (see :func:`verify_importance`).

    Fallouts are in ppm of assemblies. ``form_ppm`` / ``sorm_ppm`` add up the FORM and
    SORM estimates of both limits (None where a limit's design point was not found);
    ``beta_lower`` / ``beta_upper`` are the reliability indices (inf: unreachable, None:
    no such limit). ``design_points`` gives, per limit, each contributor's value (sum of
    its instances) at the most probable failure point.
    """

    name: str
    method: str
    linear: bool
    lower: float | None
    upper: float | None
    samples: int
    hits: int
    fallout_ppm: float
    ci_low_ppm: float
    ci_high_ppm: float
    std_error_ppm: float
    below_ppm: float
    above_ppm: float
    undefined_ppm: float
    form_ppm: float | None
    sorm_ppm: float | None
    beta_lower: float | None
    beta_upper: float | None
    form_note: str
    design_points: dict
    target_ppm: float
    rss_ppm: float
    mean_shift_ppm: float | None
    predicted_ppm: float
    convolution_ppm: float | None
    convolution_note: str
    nominal: float
    sigma: float
    shift_side: int
    shifted_mean: float
    model_disagrees: bool
    status: str
    decided: bool
    histogram_edges: np.ndarray = field(repr=False)
    histogram_density: np.ndarray = field(repr=False)
    exact_density: np.ndarray | None = field(default=None, repr=False)
    units: str = ""

    @property
    def relative_half_width(self) -> float:
        """Half-width of the interval over the estimate [-] (inf for a zero estimate)."""
        if self.fallout_ppm <= 0:
            return math.inf
        return (self.ci_high_ppm - self.ci_low_ppm) / (2.0 * self.fallout_ppm)

    def to_dict(self, histogram: bool = True) -> dict:
        """JSON-ready dict of the check (the weighted histogram too unless ``histogram=False``)."""
        out = {
            "name": self.name,
            "method": self.method,
            "samples": self.samples,
            "fallout_ppm": self.fallout_ppm,
            "ci_low_ppm": self.ci_low_ppm,
            "ci_high_ppm": self.ci_high_ppm,
            "std_error_ppm": self.std_error_ppm,
            "hits": self.hits,
            "below_ppm": self.below_ppm,
            "above_ppm": self.above_ppm,
            "undefined_ppm": self.undefined_ppm,
            "form_ppm": self.form_ppm,
            "sorm_ppm": self.sorm_ppm,
            "beta_lower": _json_number(self.beta_lower),
            "beta_upper": _json_number(self.beta_upper),
            "form_note": self.form_note,
            "design_points": self.design_points,
            **_prediction_dict(self),
            "units": self.units,
        }
        if histogram:
            out["histogram"] = {
                "edges": self.histogram_edges.tolist(),
                "density": self.histogram_density.tolist(),
            }
        return out


def _json_number(x):
    """JSON has no infinity: an unreachable limit's β is written as the string 'inf'."""
    if x is None or math.isfinite(x):
        return x
    return "inf" if x > 0 else "-inf"


@dataclass(frozen=True)
class ImportanceVerification(_CheckedRun):
    """Result of :func:`verify_importance`, read like :class:`allocator.simulate.Verification`.

    Attributes
    ----------
    status : {'pass', 'fail'}
        'fail' when some requirement's fallout exceeds its target beyond the interval.
    success : bool
    message : str
    method : str
        ``'importance'``.
    seed : int
    samples : int
        Assemblies drawn per requirement [-].
    confidence : float
    shift_means : bool
    tolerances : dict
    requirements : list of ImportanceCheck
    allocated_with : str or None
    assumption_note : str
    """

    status: str
    success: bool
    message: str
    method: str
    seed: int
    samples: int
    confidence: float
    shift_means: bool
    tolerances: dict
    requirements: list
    allocated_with: str | None = None
    assumption_note: str = ""

    _FRAME_DROP = ("design_points",)

    def __getitem__(self, name: str) -> ImportanceCheck:
        return super().__getitem__(name)

    def _settings(self) -> dict:
        return {"method": self.method, "seed": self.seed, "samples": self.samples}

    def _repr_html_(self) -> str:
        from .display import result_html

        return result_html(
            f"Verification by importance sampling: {self.status} ({self.samples} samples per requirement, "
            f"seed {self.seed})",
            self.to_frame(),
            self.message,
        )

    def __repr__(self) -> str:
        lines = [
            f"ImportanceVerification(status={self.status!r}, samples={self.samples}, seed={self.seed})",
            f"  message: {self.message}",
        ]
        for c in self.requirements:
            form_text = "—" if c.form_ppm is None else f"{c.form_ppm:.4g}"
            sorm_text = "—" if c.sorm_ppm is None else f"{c.sorm_ppm:.4g}"
            lines.append(
                f"  {c.name}: {c.fallout_ppm:.4g} ppm [{c.ci_low_ppm:.4g}, {c.ci_high_ppm:.4g}]"
                f" FORM {form_text} SORM {sorm_text} target {c.target_ppm:g} -> {c.status}"
            )
        return "\n".join(lines)


def _sum_or_none(values) -> float | None:
    values = [v for v in values if v is not None]
    if any(not math.isfinite(v) for v in values):
        return None
    return float(sum(values))


def _check_requirement(case, plan, t, f, evaluate, samples, seed, stream, bins) -> ImportanceCheck:
    req = plan.requirement
    space = StandardSpace([c.distribution for c in case.contributors], case.counts, t, f,
                          _base_values(case) + plan.shift)
    scale = plan.sigma if plan.sigma > 0 else 1.0
    steps = 1e-4 * t * np.sqrt(case.counts)
    points, centres, weights, notes = {}, {}, {}, []
    betas = {"lower": None, "upper": None}
    form_sum, sorm_sum = [], []
    for side_name, limit, side in (("lower", req.lower, -1), ("upper", req.upper, 1)):
        if limit is None:
            continue
        design = design_point(LimitState(space, evaluate, float(limit), side, scale, steps, plan.linear))
        betas[side_name] = design.beta if design.status != "not-converged" else None
        if design.status == "not-converged":
            notes.append(f"{side_name}: FORM did not converge; samples aimed at its last point")
            form_sum.append(math.nan)
            sorm_sum.append(math.nan)
            centres[side_name] = design.u
            weights[side_name] = math.nan  # no FORM probability: equal shares
            continue
        form_sum.append(design.form)
        sorm_sum.append(design.sorm if math.isfinite(design.sorm) else (design.form if design.beta == math.inf
                                                                          else math.nan))
        if design.status == "unreachable":
            notes.append(f"{side_name}: no failure within β ≤ {BETA_MAX:g} (FORM probability 0)")
            continue
        if design.note:
            notes.append(f"{side_name}: {design.note}")
        x = space.values(design.u)[0]
        points[side_name] = dict(zip(case.names, (float(v) for v in x)))
        centres[side_name] = design.u
        weights[side_name] = design.form
    if centres:
        raw = np.array([weights[k] for k in centres])
        raw = raw / raw.sum() if np.isfinite(raw).all() and raw.sum() > 0 else np.ones(len(raw)) / len(raw)
        raw = np.maximum(raw, MIN_COMPONENT_SHARE)
        weights = dict(zip(centres, raw / raw.sum()))
    design_y = [float(responses(evaluate, space.values(u))[0]) for u in centres.values()]
    edges_range = _bin_range(plan, t, case, (req.lower, req.upper, *design_y))
    estimate = importance_estimate(space, evaluate, req.lower, req.upper, centres, weights, samples=samples,
                                   seed=seed, stream=stream, histogram_range=edges_range, bins=bins)

    conv_ppm, conv_note, dist = _convolution(case, t, f, plan)
    exact_density = (None if dist is None
                     else dist.bin_probabilities(estimate.histogram_edges) / np.diff(estimate.histogram_edges))
    ppm = fraction_to_ppm
    lo_ppm, hi_ppm = ppm(estimate.ci_low), ppm(estimate.ci_high)
    form_total, sorm_total = _sum_or_none(form_sum), _sum_or_none(sorm_sum)
    return ImportanceCheck(
        **_prediction_fields(case, plan, lo_ppm, hi_ppm),
        method="importance",
        samples=estimate.samples,
        hits=estimate.hits,
        fallout_ppm=float(ppm(estimate.probability)),
        ci_low_ppm=float(lo_ppm),
        ci_high_ppm=float(hi_ppm),
        std_error_ppm=float(ppm(estimate.std_error)),
        below_ppm=float(ppm(estimate.below)),
        above_ppm=float(ppm(estimate.above)),
        undefined_ppm=float(ppm(estimate.undefined)),
        form_ppm=None if form_total is None else float(ppm(form_total)),
        sorm_ppm=None if sorm_total is None else float(ppm(sorm_total)),
        beta_lower=betas["lower"],
        beta_upper=betas["upper"],
        form_note="; ".join(notes),
        design_points=points,
        convolution_ppm=None if conv_ppm is None else float(conv_ppm),
        convolution_note=conv_note,
        histogram_edges=estimate.histogram_edges,
        histogram_density=estimate.histogram_density,
        exact_density=exact_density,
    )


def _base_values(case) -> np.ndarray:
    from .chain import nominal_values

    at = nominal_values(case)
    return np.array([at[name] for name in case.names])


def verify_importance(
    case: Case,
    tolerances: Tolerances = None,
    *,
    samples: int = 100_000,
    seed: int | None = None,
    shift_means: bool = True,
    allocated_with: str | None = None,
    processes: Mapping[str, str] | None = None,
    evaluators: Mapping[str, Evaluator] | None = None,
    bins: int = HISTOGRAM_BINS,
    progress: bool = False,
) -> ImportanceVerification:
    """Check tolerances by importance sampling aimed at each limit, with FORM and SORM beside it.

    Parameters
    ----------
    case : allocator.model.Case
    tolerances : Allocation, mapping name -> float, array_like or None
        As in :func:`allocator.simulate.verify` [length].
    samples : int
        Assemblies drawn per requirement [-], ≥ 1.
    seed : int or None
        Non-negative seed; ``None`` draws fresh entropy, reported in the result.
    shift_means : bool
        Mean shifts on the worse side of each requirement, as the Monte Carlo places them.
    allocated_with : str or None
        The stack model the tolerances come from (for the assumption note).
    processes : mapping name -> process name, optional
        The process that makes each contributor (its cp), as in :func:`~allocator.simulate.verify`.
    evaluators : mapping requirement name -> callable, optional
        Response evaluators replacing :func:`allocator.form.response_evaluator` for the named requirements.
    bins : int
        Bins of the weighted response histogram.
    progress : bool
        Show a progress bar (one step per requirement) on stderr when it is a terminal.

    Returns
    -------
    ImportanceVerification

    Notes
    -----
    See the module notes and docs/verification.md, *Tiny fallouts: importance sampling*.
    A requirement fails when the lower end of the interval exceeds its target.

    References
    ----------
    .. [1] Rackwitz, R. and Fiessler, B. (1978). Computers & Structures 9(5), 489-494.
    .. [2] Breitung, K. (1984). Journal of Engineering Mechanics 110(3), 357-366.
    .. [3] Owen, A. and Zhou, Y. (2000). Journal of the American Statistical Association
       95(449), 135-143.

    Examples
    --------
    Two normal parts, the gap 6σ from its upper limit: FORM is exact for a linear normal
    limit (Φ(−6) = 0.000987 ppm), and the sampled interval holds it.

    >>> from allocator.model import Case, Contributor, Requirement
    >>> parts = (Contributor(name="a", nominal=10.0, tolerance=0.03),
    ...          Contributor(name="b", nominal=5.0, tolerance=0.04))
    >>> sigma = (0.01**2 + (0.04 / 3) ** 2) ** 0.5
    >>> gap = Requirement(name="gap", chain={"a": 1, "b": -1}, upper=5.0 + 6 * sigma)
    >>> check = verify_importance(Case(title="invented", contributors=parts, requirements=(gap,)),
    ...                           samples=20_000, seed=1)["gap"]
    >>> round(check.form_ppm, 6), check.ci_low_ppm < check.form_ppm < check.ci_high_ppm
    (0.000987, True)
    """
    from .errors import CaseError

    samples, seed = _checked_run(samples, seed)
    if not case.requirements:
        raise CaseError("the case has no requirement to verify", field="requirement")
    tolerances, processes, allocated_with = _unpack(tolerances, processes, allocated_with)
    t = _tolerance_array(case, tolerances)
    f = case.sigma_factors_at(t, processes)
    evaluators = dict(evaluators or {})
    checks = []
    with _progress_bar(progress, samples * len(case.requirements)) as bar:
        for j, req in enumerate(case.requirements):
            plan = _plan(case, req, t, f, shift_means)
            evaluate = evaluators.get(req.name) or response_evaluator(case, req)
            checks.append(_check_requirement(case, plan, t, f, evaluate, samples, seed, j, bins))
            if bar is not None:
                bar.update(samples)
    status, message = _verdict(checks)
    return ImportanceVerification(
        status=status,
        success=status == "pass",
        message=message,
        method="importance",
        seed=seed,
        samples=samples,
        confidence=CONFIDENCE,
        shift_means=shift_means,
        tolerances=dict(zip(case.names, (float(x) for x in t))),
        requirements=checks,
        allocated_with=allocated_with,
        assumption_note=_assumption_note(case, checks, allocated_with, shift_means),
    )
