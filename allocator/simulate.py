"""Verification of a set of tolerances by Monte Carlo, with exact convolution for chains.

:func:`verify` draws whole assemblies: every contributor instance independently from its
own distribution (normal with σ = ``t / (3·cp)``, the cp of the process that makes it, see
:meth:`allocator.model.Case.sigma_factors_at`; uniform or symmetric triangular on ``±t``),
a contributor's value being the sum of its ``count`` instances, and evaluates each
requirement's exact response (the expression itself, not its linearisation). It counts the
assemblies outside the limits, gives an exact (Clopper–Pearson) confidence interval, and
sets beside it the analytic predictions (RSS, estimated mean shift) and, for linear chains,
the exact fallout by numerical convolution (:mod:`allocator.convolve`).

Mean shift. When a contributor has ``mean_shift > 0`` the simulation puts its mean where it
hurts: for each requirement separately, at ``nominal + s · sign(a_i) · mean_shift · t`` per
instance, with ``s = +1`` when the worst side is the upper limit (the end of the band
``ȳ ± δ`` with the larger normal fallout, as in :func:`allocator.stack.worst_mean_fallout`)
and ``s = −1`` otherwise. Requirements may have different worst sides, so each requirement
is evaluated with its own shift on the same random draws.

Reproducibility. The random stream is cut into blocks of a fixed size that depends only on
the case (2¹⁶ assemblies unless the case is very wide); block ``b`` draws from
``SeedSequence(seed, spawn_key=(b,))`` (the ``b``-th child of ``SeedSequence(seed).spawn``).
Chunks are whole numbers of blocks and every floating-point sum is taken per block, so the
same seed gives the same numbers whatever ``chunk_size`` is chosen. Memory is bounded by
the chunk, never by the number of samples.

Cautions: the results assume stable, capable processes with the stated distributions and
independent contributors; safety-critical fits are checked worst case and against the
applicable codes and a licensed engineering review.
"""

from __future__ import annotations

import math
import os
import sys
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Mapping, Union

import numpy as np
from numpy.typing import ArrayLike

from . import stack
from .chain import linearise, nominal_values
from .closure import ResponseEvaluator
from .convolve import linear_sum_distribution
from .errors import CaseError, UsageError, unknown_names
from .ppm import fraction_to_ppm

if TYPE_CHECKING:  # pandas is imported where it is used
    import pandas as pd

    from .model import Case
    from .parallel import Runner
    from .solve.result import Allocation

# what verify() accepts as tolerances: an allocation, name -> ± tolerance [length], an
# array in case order, or None for the case's current tolerances
Tolerances = Union["Allocation", Mapping[str, float], ArrayLike, None]

__all__ = [
    "BLOCK_SIZE",
    "CHUNK_BYTES",
    "clopper_pearson",
    "RequirementCheck",
    "Verification",
    "verify",
    "sample_responses",
    "plot_verification",
    "render_verification_plot",
]

BLOCK_SIZE = 2**16  # assemblies per random-stream block (fixed: results never depend on chunks)
CHUNK_BYTES = 64 * 2**20  # default memory budget of one chunk's arrays [bytes]
CONFIDENCE = 0.95
HISTOGRAM_BINS = 200
_HISTOGRAM_MARGIN = 0.05  # widen the histogram range by this fraction of its span each side
_HISTOGRAM_QUANTILES = (0.0005, 0.9995)  # of block 0, for responses the worst case misjudges


def clopper_pearson(failures: ArrayLike, trials: ArrayLike, confidence: float = CONFIDENCE) -> tuple[np.ndarray, np.ndarray]:
    """Exact two-sided confidence interval of a binomial proportion.

    Parameters
    ----------
    failures : int or array_like of int
        Number of failures ``k`` [-].
    trials : int or array_like of int
        Number of trials ``n ≥ 1`` [-].
    confidence : float
        Two-sided confidence level, e.g. 0.95 [-].

    Returns
    -------
    (low, high) : numpy.ndarray
        Bounds on the failure probability [-]; ``low = 0`` when ``k = 0`` and
        ``high = 1`` when ``k = n``.

    Notes
    -----
    With ``α = 1 − confidence``: ``low = B(α/2; k, n − k + 1)`` and
    ``high = B(1 − α/2; k + 1, n − k)``, ``B(p; a, b)`` the beta quantile. The interval
    inverts two one-sided binomial tests, so its coverage is at least ``confidence``
    for every true proportion.

    References
    ----------
    .. [1] Clopper, C. J. and Pearson, E. S. (1934). The use of confidence or fiducial
       limits illustrated in the case of the binomial. Biometrika 26(4), 404-413.

    Examples
    --------
    >>> low, high = clopper_pearson(0, 1_000_000)
    >>> float(low), round(float(high) * 1e6, 3)  # "rule of three": about 3/n
    (0.0, 3.689)
    """
    from scipy import special

    k = np.asarray(failures, dtype=float)
    n = np.asarray(trials, dtype=float)
    alpha = 1.0 - confidence
    with np.errstate(all="ignore"):
        low = np.where(k > 0, special.betaincinv(k, n - k + 1.0, alpha / 2.0), 0.0)
        high = np.where(k < n, special.betaincinv(k + 1.0, n - k, 1.0 - alpha / 2.0), 1.0)
    return low, high


def _prediction_dict(check) -> dict:
    """The keys every requirement check writes alike: target, verdict, analytic predictions, plan."""
    return {
        "target_ppm": check.target_ppm,
        "status": check.status,
        "decided": check.decided,
        "rss_ppm": check.rss_ppm,
        "mean_shift_ppm": check.mean_shift_ppm,
        "predicted_ppm": check.predicted_ppm,
        "model_disagrees": check.model_disagrees,
        "convolution_ppm": check.convolution_ppm,
        "convolution_note": check.convolution_note,
        "linear": check.linear,
        "lower": check.lower,
        "upper": check.upper,
        "nominal": check.nominal,
        "sigma": check.sigma,
        "shift_side": check.shift_side,
        "shifted_mean": check.shifted_mean,
    }


@dataclass(frozen=True)
class RequirementCheck:
    """Verification of one requirement (see :class:`Verification`).

    Fallouts are in ppm of assemblies. ``below`` / ``above`` / ``undefined`` count the
    sampled assemblies under the lower limit, over the upper limit and with a response
    that is not a number (e.g. ``sqrt`` of a negative value; counted as failures).
    ``not_closed`` counts, for a response through closure equations (``through_loop``),
    the assemblies whose loop cannot close (no solution near the nominal one): they
    cannot be built and are counted as failures too, apart from ``undefined``.
    """

    name: str
    linear: bool
    lower: float | None
    upper: float | None
    samples: int
    below: int
    above: int
    undefined: int
    fallout_ppm: float
    ci_low_ppm: float
    ci_high_ppm: float
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
    mean: float
    std: float
    model_disagrees: bool
    status: str
    decided: bool
    histogram_edges: np.ndarray = field(repr=False)
    histogram_counts: np.ndarray = field(repr=False)
    underflow: int = 0
    overflow: int = 0
    units: str = ""  # label of the response, its limits, mean, std and histogram edges
    through_loop: bool = False  # the response names unknowns of the closure equations
    not_closed: int = 0  # assemblies whose loop cannot close (failures, not in undefined)
    # the convolved exact density averaged over each histogram bin (linear chains; else None)
    exact_density: np.ndarray | None = field(default=None, repr=False)

    @property
    def failures(self) -> int:
        """Assemblies outside the limits: below + above + undefined + not_closed."""
        return self.below + self.above + self.undefined + self.not_closed

    def to_dict(self, histogram: bool = True) -> dict:
        """JSON-ready dict of the check (the histogram too unless ``histogram=False``)."""
        out = {
            "name": self.name,
            "samples": self.samples,
            "fallout_ppm": self.fallout_ppm,
            "ci_low_ppm": self.ci_low_ppm,
            "ci_high_ppm": self.ci_high_ppm,
            "below": self.below,
            "above": self.above,
            "undefined": self.undefined,
            **_prediction_dict(self),
            "mean": self.mean,
            "std": self.std,
            "units": self.units,
        }
        if self.through_loop:  # only for responses through closure equations (keeps v1 output)
            out["through_loop"] = True
            out["not_closed"] = self.not_closed
        if histogram:
            out["histogram"] = {
                "edges": self.histogram_edges.tolist(),
                "counts": self.histogram_counts.tolist(),
                "underflow": self.underflow,
                "overflow": self.overflow,
            }
        return out


class _CheckedRun:
    """What a verification result does with its requirement checks (lookup, dict, frame).

    A subclass is a frozen dataclass with the fields ``status``, ``success``, ``message``,
    ``confidence``, ``shift_means``, ``tolerances``, ``requirements``, ``allocated_with`` and
    ``assumption_note``; :meth:`_settings` gives its own run settings for :meth:`to_dict`.
    """

    _FRAME_DROP: tuple = ()  # check keys left out of to_frame (not one value per cell)

    def __getitem__(self, name: str):
        for check in self.requirements:
            if check.name == name:
                return check
        raise KeyError(name)

    def _settings(self) -> dict:
        raise NotImplementedError

    def to_dict(self, histogram: bool = True) -> dict:
        """JSON-ready dict: status, seed, settings and one entry per requirement check."""
        return {
            "status": self.status,
            "success": self.success,
            "message": self.message,
            **self._settings(),
            "confidence": self.confidence,
            "shift_means": self.shift_means,
            "tolerances": dict(self.tolerances),
            "allocated_with": self.allocated_with,
            "assumption_note": self.assumption_note,
            "requirements": [c.to_dict(histogram) for c in self.requirements],
        }

    def to_frame(self) -> pd.DataFrame:
        """One row per requirement (pandas DataFrame, index ``requirement``)."""
        import pandas as pd

        rows = [c.to_dict(histogram=False) for c in self.requirements]
        for row in rows:
            for key in self._FRAME_DROP:
                row.pop(key)
        return pd.DataFrame(rows).set_index("name").rename_axis("requirement")


@dataclass(frozen=True)
class Verification(_CheckedRun):
    """Result of :func:`verify`, read like :class:`scipy.optimize.OptimizeResult`.

    Attributes
    ----------
    status : {'pass', 'fail'}
        'fail' when some requirement's fallout exceeds its target beyond the confidence
        interval (``ci_low_ppm > target_ppm``).
    success : bool
        ``status == 'pass'``.
    message : str
        One line for people.
    seed : int
        Seed of the run; ``verify(..., seed=seed)`` repeats it exactly.
    samples, block_size, chunk_size : int
        Assemblies simulated, the fixed stream block and the chunk used [-].
    confidence : float
        Level of the Clopper–Pearson intervals [-].
    tolerances : dict
        ± tolerance per contributor used [length].
    requirements : list of RequirementCheck
    allocated_with : str or None
        The stack model the tolerances were allocated with, when the caller said so.
    assumption_note : str
        One line, empty when there is nothing to say: set when the simulation assumes
        something the allocation did not (an ``rss`` allocation simulated with the
        case's mean shifts in place), with what to run instead.
    """

    status: str
    success: bool
    message: str
    seed: int
    samples: int
    block_size: int
    chunk_size: int
    confidence: float
    shift_means: bool
    tolerances: dict
    requirements: list
    allocated_with: str | None = None
    assumption_note: str = ""

    def __getitem__(self, name: str) -> RequirementCheck:
        return super().__getitem__(name)

    def _settings(self) -> dict:
        return {"seed": self.seed, "samples": self.samples, "block_size": self.block_size,
                "chunk_size": self.chunk_size}

    def _repr_html_(self) -> str:
        from .display import result_html

        return result_html(f"Verification: {self.status} ({self.samples} samples, seed {self.seed})",
                           self.to_frame(), self.message)

    def __repr__(self) -> str:
        lines = [
            f"Verification(status={self.status!r}, samples={self.samples}, seed={self.seed})",
            f"  message: {self.message}",
        ]
        if self.assumption_note:
            lines.append(f"  note: {self.assumption_note}")
        for c in self.requirements:
            conv = "—" if c.convolution_ppm is None else f"{c.convolution_ppm:.4g}"
            lines.append(
                f"  {c.name}: {c.fallout_ppm:.4g} ppm [{c.ci_low_ppm:.4g}, {c.ci_high_ppm:.4g}]"
                f" predicted {c.predicted_ppm:.4g} convolution {conv} target {c.target_ppm:g}"
                f" -> {c.status}"
            )
        return "\n".join(lines)


# --------------------------------------------------------------------------- sampling


class _Sampler:
    """Column layout of one block's random draws and the maps from draws to responses.

    A block draws ``Z`` (rows × normal contributors, standard normal) and ``U``
    (rows × uniform columns, U(0, 1)): one column per uniform instance and two per
    triangular instance (the sum of two uniforms is triangular).
    """

    def __init__(self, case, tolerances: np.ndarray, sigma_factors: np.ndarray):
        kinds = [c.distribution for c in case.contributors]
        counts = case.counts.astype(int)
        self.n = len(kinds)
        self.normal = np.array([i for i, k in enumerate(kinds) if k == "normal"], dtype=int)
        # σ of the sum of `count` normal instances is σ·√count: one draw per contributor
        self.normal_scale = (
            sigma_factors[self.normal] * tolerances[self.normal] * np.sqrt(counts[self.normal])
        )
        owner, scale, offset = [], [], []
        for i, kind in enumerate(kinds):
            if kind == "uniform":  # t·(2u − 1)
                per = 1
                col_scale, col_offset = 2.0 * tolerances[i], -tolerances[i]
            elif kind == "triangular":  # t·(u1 + u2 − 1)
                per = 2
                col_scale, col_offset = tolerances[i], -0.5 * tolerances[i]
            else:
                continue
            columns = per * counts[i]
            owner += [i] * columns
            scale += [col_scale] * columns
            offset += [col_offset] * columns
        self.uniform_owner = np.array(owner, dtype=int)
        self.uniform_scale = np.array(scale, dtype=float)
        self.uniform_offset = np.array(offset, dtype=float)
        self.bounded = np.unique(self.uniform_owner)
        # first column of each bounded contributor, for np.add.reduceat
        self.bounded_starts = np.searchsorted(self.uniform_owner, self.bounded)

    @property
    def n_normal(self) -> int:
        return len(self.normal)

    @property
    def n_uniform(self) -> int:
        return len(self.uniform_owner)

    def draw(self, rng, z_out: np.ndarray, u_out: np.ndarray) -> None:
        """Fill one block: the normal columns, then the uniform columns (fixed order)."""
        if self.n_normal:
            rng.standard_normal(out=z_out)
        if self.n_uniform:
            rng.random(out=u_out)

    def linear_weights(self, a_matrix: np.ndarray):
        """Weights so that ``y − ȳ − shift = Z @ wz + U @ wu + offset`` for each chain.

        ``a_matrix`` is contributors × requirements.
        """
        wz = a_matrix[self.normal] * self.normal_scale[:, None]
        wu = a_matrix[self.uniform_owner] * self.uniform_scale[:, None]
        offset = (a_matrix[self.uniform_owner] * self.uniform_offset[:, None]).sum(axis=0)
        return wz, wu, offset

    def deviations(self, z: np.ndarray, u: np.ndarray) -> np.ndarray:
        """Deviation of each contributor's value (sum of its instances) from nominal."""
        dev = np.empty((z.shape[0], self.n))
        if self.n_normal:
            dev[:, self.normal] = z * self.normal_scale
        if self.n_uniform:
            v = u * self.uniform_scale + self.uniform_offset
            dev[:, self.bounded] = np.add.reduceat(v, self.bounded_starts, axis=1)
        return dev


@dataclass
class _Plan:
    """Per-requirement quantities fixed before sampling."""

    requirement: object
    linear: bool
    nominal: float
    a: np.ndarray
    sigma: float
    delta: float
    side: int
    shift: np.ndarray  # added to each contributor's value (sum of instances)
    shifted_mean: float
    rss_ppm: float
    mean_shift_ppm: float | None
    lower: float
    upper: float


def _tolerance_array(case, tolerances) -> np.ndarray:
    if tolerances is None:
        t = case.current_tolerances
    elif isinstance(tolerances, Mapping) or hasattr(tolerances, "items"):
        t = case.current_tolerances.copy()
        given = dict(tolerances.items())
        problem = unknown_names("contributor", given, case.names)
        if problem:  # a wrong argument, as in analyze and allocate
            raise UsageError(f"tolerances: {problem}")
        for name, value in given.items():
            t[case.index(name)] = float(value)
    else:
        t = np.asarray(tolerances, dtype=float).copy()
        if t.shape != (len(case.contributors),):
            raise CaseError(
                f"expected {len(case.contributors)} tolerances (one per contributor), got {t.size}",
                field="tolerances",
            )
    for name, value in zip(case.names, t):
        if not (math.isfinite(value) and value > 0):
            raise CaseError(f"must be a positive finite number, got {value!r}", field=f"tolerances.{name}")
    return t


def _unpack(tolerances, processes, allocated_with):
    """``(tolerances, processes, allocated_with)``, taken from an Allocation when given one.

    Explicit ``processes`` / ``allocated_with`` arguments win over the allocation's.
    """
    if hasattr(tolerances, "allocated_array") and hasattr(tolerances, "processes"):
        allocation = tolerances
        values = allocation.allocated_array()
        if values is None:
            raise CaseError(
                f"the allocation has no tolerances to verify (status {allocation.status}: "
                f"{allocation.message})",
                field="tolerances",
            )
        if processes is None:
            processes = allocation.processes
        if allocated_with is None:
            allocated_with = allocation.model
        tolerances = dict(zip(allocation.names, (float(x) for x in values)))
    return tolerances, processes, allocated_with


def _plan(case, requirement, t: np.ndarray, sigma_factors: np.ndarray, shift_means: bool) -> _Plan:
    lin = linearise(case, requirement)
    counts = case.counts
    sigma = stack.rss_sigma(lin.sensitivity, counts, sigma_factors * t)
    delta = stack.mean_shift_delta(lin.sensitivity, counts, case.mean_shifts, t) if shift_means else 0.0
    lower, upper = requirement.lower, requirement.upper
    rss_below, rss_above = stack.normal_fallout(lin.nominal, sigma, lower, upper)
    shift_below, shift_above, worst_mean = stack.worst_mean_fallout(lin.nominal, delta, sigma, lower, upper)
    side = 0 if delta <= 0 else (1 if worst_mean > lin.nominal else -1)
    # per instance: s·sign(a_i)·m_i·t_i; the contributor's value carries count instances
    shift = side * np.sign(lin.sensitivity) * case.mean_shifts * t * counts if shift_means else np.zeros_like(t)
    return _Plan(
        requirement=requirement,
        linear=lin.linear,
        nominal=lin.nominal,
        a=lin.sensitivity,
        sigma=sigma,
        delta=delta,
        side=side,
        shift=shift,
        shifted_mean=lin.nominal + side * delta,
        rss_ppm=fraction_to_ppm(rss_below + rss_above),
        mean_shift_ppm=fraction_to_ppm(shift_below + shift_above) if delta > 0 else None,
        lower=-math.inf if lower is None else float(lower),
        upper=math.inf if upper is None else float(upper),
    )


def _block_size(columns: int) -> int:
    """Stream block: 2¹⁶ assemblies unless a block of this width would pass the budget."""
    size = BLOCK_SIZE
    while size > 1024 and size * columns * 8 > CHUNK_BYTES:
        size //= 2
    return size


def _block_rng(entropy: int, block: int) -> np.random.Generator:
    # the block-th child of SeedSequence(entropy).spawn(...), built directly
    return np.random.Generator(np.random.PCG64(np.random.SeedSequence(entropy, spawn_key=(block,))))


def _histogram_range(plan: _Plan, t: np.ndarray, case, first_block: np.ndarray) -> tuple[float, float]:
    """Fixed bins: the (shifted) worst-case range, widened by block 0's spread if needed."""
    finite = first_block[np.isfinite(first_block)]
    spread = [float(q) for q in np.quantile(finite, _HISTOGRAM_QUANTILES)] if finite.size else []
    return _bin_range(plan, t, case, spread)


def _bin_range(plan: _Plan, t: np.ndarray, case, values) -> tuple[float, float]:
    """The (shifted) worst-case range of ``plan``'s response, widened to hold the finite ``values``
    and then by :data:`_HISTOGRAM_MARGIN` of its span each side."""
    half = stack.worst_case_half_width(plan.a, case.counts, t)
    lo, hi = plan.shifted_mean - half, plan.shifted_mean + half
    for x in values:
        if x is not None and math.isfinite(x):
            lo, hi = min(lo, x), max(hi, x)
    span = hi - lo
    if not span > 0:
        span = max(abs(plan.shifted_mean), 1.0) * 1e-9
    return lo - _HISTOGRAM_MARGIN * span, hi + _HISTOGRAM_MARGIN * span


class _Engine:
    """Draws chunks of assemblies and evaluates every requirement's response on them.

    Responses are returned relative to ``centre`` (each requirement's shifted mean),
    columns in :attr:`order` (chains first). Shared by :func:`verify` and
    :func:`sample_responses` so both see the same random stream.
    """

    def __init__(self, case, t: np.ndarray, shift_means: bool, samples: int, seed: int, chunk_size, processes=None):
        self.case = case
        self.t = t
        self.samples = samples
        self.seed = seed
        # σ/t per contributor: the cp of the process that makes it (docs/verification.md)
        self.sigma_factors = f = case.sigma_factors_at(t, processes)
        plans = [_plan(case, r, t, f, shift_means) for r in case.requirements]
        self.sampler = sampler = _Sampler(case, t, f)
        self.linear = [p for p in plans if p.linear]
        self.nonlinear = [p for p in plans if not p.linear]
        self.order = self.linear + self.nonlinear
        n_req = len(plans)

        columns = sampler.n_normal + sampler.n_uniform
        row_bytes = 8 * (columns + (sampler.n if self.nonlinear else 0) + 3 * n_req) + n_req
        self.block = block = _block_size(max(row_bytes // 8, 1))
        # the closure's Newton arrays per row count toward the chunk only: the stream's
        # blocks stay those of the same case solved by hand
        m = len(case.unknowns)
        if m and self.nonlinear:
            row_bytes += 8 * (6 * m + 2 * m * m)
        if chunk_size is None:
            chunk_blocks = max(1, CHUNK_BYTES // (row_bytes * block))
        else:
            chunk_blocks = max(1, math.ceil(int(chunk_size) / block))
        self.n_blocks = math.ceil(samples / block)
        self.chunk_blocks = min(chunk_blocks, self.n_blocks)
        self.chunk_rows = self.chunk_blocks * block

        a_lin = np.column_stack([p.a for p in self.linear]) if self.linear else np.zeros((sampler.n, 0))
        self.wz, self.wu, offset = sampler.linear_weights(a_lin)
        self.centre = np.array([p.shifted_mean for p in self.order])
        self.lin_const = offset  # the chains' shifted means cancel against the centre
        self.evaluator = ResponseEvaluator(case) if self.nonlinear else None
        nominal_at = nominal_values(case)
        self.base_values = np.array([nominal_at[name] for name in case.names])
        # per column of `order`: assemblies whose closure loop could not close
        self.not_closed = np.zeros(n_req, dtype=np.int64)
        self.through_loop = np.array(
            [self.evaluator is not None and not p.linear and self.evaluator.through_loop(p.requirement)
             for p in self.order]
        )

    def chunks(self, blocks: range | None = None):
        """Yield ``(y, spans)`` per chunk: responses minus centre, and the blocks
        ``(index, first row, rows)`` it holds. ``y`` is reused between chunks.

        ``blocks``: only these stream blocks (default: all), e.g. one task's share."""
        sampler, block, samples = self.sampler, self.block, self.samples
        n_lin = len(self.linear)
        z_buf = np.empty((self.chunk_rows, sampler.n_normal))
        u_buf = np.empty((self.chunk_rows, sampler.n_uniform))
        y_buf = np.empty((self.chunk_rows, len(self.order)))
        wanted = range(self.n_blocks) if blocks is None else blocks
        for first in range(wanted.start, wanted.stop, self.chunk_blocks):
            blocks = range(first, min(first + self.chunk_blocks, wanted.stop))
            spans = [(b, (b - first) * block, min(block, samples - b * block)) for b in blocks]
            rows = spans[-1][1] + spans[-1][2]
            for b, start, size in spans:
                sampler.draw(_block_rng(self.seed, b), z_buf[start : start + size], u_buf[start : start + size])
            z, u, y = z_buf[:rows], u_buf[:rows], y_buf[:rows]
            # products per block, so every number is bit-identical for any chunk size;
            # einsum, not BLAS: threaded BLAS on thin matrices is slower and spin-waits
            # badly on a busy machine
            for _, start, size in spans:
                part = slice(start, start + size)
                if n_lin:
                    y_lin = y[part, :n_lin]
                    np.einsum("ij,jk->ik", z[part], self.wz, out=y_lin)
                    if sampler.n_uniform:
                        y_lin += np.einsum("ij,jk->ik", u[part], self.wu)
                    y_lin += self.lin_const
                if self.nonlinear:
                    dev = sampler.deviations(z[part], u[part])
                    solved = {}  # one closure solve per distinct mean-shift placement
                    for j, plan in enumerate(self.nonlinear):
                        values = dev + (self.base_values + plan.shift)
                        unknowns = None
                        if self.through_loop[n_lin + j]:
                            key = plan.shift.tobytes()
                            if key not in solved:
                                solved[key] = self.evaluator.solve(values)
                            unknowns = solved[key]
                        response, closed = self.evaluator(plan.requirement, values, unknowns=unknowns)
                        y[part, n_lin + j] = response - plan.shifted_mean
                        self.not_closed[n_lin + j] += size - np.count_nonzero(closed)
            yield y, spans


def sample_responses(
    case: Case,
    tolerances: Tolerances = None,
    *,
    samples: int = 10_000,
    seed: int = 0,
    shift_means: bool = True,
    processes: Mapping[str, str] | None = None,
) -> dict[str, np.ndarray]:
    """The simulated responses themselves, one array per requirement.

    Uses exactly the random stream of :func:`verify` with the same ``seed`` (and the same
    ``tolerances`` and ``processes`` arguments, an Allocation included); holds all
    ``samples × requirements`` values in memory, so it is meant for modest sample counts
    (plots, tests, notebooks).

    Returns
    -------
    dict
        requirement name -> numpy.ndarray of ``samples`` responses [response].
    """
    samples = int(samples)
    if samples < 1:
        raise ValueError("samples must be at least 1")
    tolerances, processes, _ = _unpack(tolerances, processes, None)
    t = _tolerance_array(case, tolerances)
    engine = _Engine(case, t, shift_means, samples, int(seed), None, processes)
    parts = [np.array(y) + engine.centre for y, _ in engine.chunks()]
    data = np.concatenate(parts, axis=0)
    return {p.requirement.name: data[:, j] for j, p in enumerate(engine.order)}


def verify(
    case: Case,
    tolerances: Tolerances = None,
    *,
    samples: int = 1_000_000,
    seed: int | None = None,
    chunk_size: int | None = None,
    progress: bool = False,
    shift_means: bool = True,
    bins: int = HISTOGRAM_BINS,
    allocated_with: str | None = None,
    processes: Mapping[str, str] | None = None,
    map_blocks: Runner | None = None,
) -> Verification:
    """Check tolerances by Monte Carlo simulation of whole assemblies.

    Parameters
    ----------
    case : allocator.model.Case
    tolerances : Allocation, mapping name -> float, pandas Series, array_like or None
        ± tolerances to check [length]; a mapping may name only some contributors
        (the others keep their current tolerance). ``None``: the case's current ones.
        An :class:`~allocator.solve.Allocation` gives its tolerances, the processes it
        chose and its model (for ``allocated_with``).
    samples : int
        Assemblies to simulate [-], ≥ 1.
    seed : int or None
        Non-negative seed; ``None`` draws fresh entropy, reported in the result.
    chunk_size : int or None
        Assemblies per vectorised step, rounded up to whole stream blocks; default:
        as many blocks as fit in about 64 MB. Results do not depend on it.
    progress : bool
        Show a progress bar on stderr when it is a terminal.
    shift_means : bool
        Place contributor means at their worst-side mean shift (see module notes);
        ``False`` simulates centred processes.
    bins : int
        Histogram bins kept per requirement.
    allocated_with : str or None
        The stack model the tolerances come from (``'worst-case'``, ``'rss'``,
        ``'mean-shift'``), if they are an allocation. An ``'rss'`` allocation assumes
        centred processes; simulated with the case's mean shifts in place it can miss its
        target for that reason alone, and :attr:`Verification.assumption_note` says so
        (see docs/verification.md, *Which assumptions are simulated*).
    processes : mapping name -> process name, optional
        The process that makes each named contributor (e.g. ``Allocation.processes``);
        a normal contributor is simulated with that process's cp. Contributors not named
        (or named with ``""``) are made by the cheapest of their processes that holds
        their tolerance (:meth:`allocator.model.Case.making_processes`); see
        docs/verification.md, *Which process makes a tolerance*.
    map_blocks : callable, optional
        Where the chunks of stream blocks are simulated: a runner ``map_blocks(function,
        items)`` returning the results in the order of the items (see
        :mod:`allocator.parallel`, e.g. the workers of a Dask cluster). Each chunk is
        tallied where it runs and the tallies are added here in block order, so the result
        is bit-identical to a run without it (the default: every chunk in this process).

    Returns
    -------
    Verification

    Raises
    ------
    UsageError
        ``tolerances`` names a contributor the case does not have (with a did-you-mean).
    CaseError
        A tolerance that is not a positive finite number (field ``tolerances.<name>``), an
        array of the wrong length, an allocation without tolerances, or an unknown process.

    Notes
    -----
    The fallout estimate is ``p̂ = k/N`` with a Clopper–Pearson interval (see
    :func:`clopper_pearson`). A requirement fails when the lower bound exceeds the
    target. ``model_disagrees`` is set when the analytic prediction (RSS, or estimated
    mean shift when shifts are simulated) lies outside the interval: expected in about
    5 % of runs by chance, systematically when the normal or linear model is wrong.

    References
    ----------
    .. [1] Metropolis, N. and Ulam, S. (1949). The Monte Carlo method. Journal of the
       American Statistical Association 44(247), 335-341.
    .. [2] Clopper, C. J. and Pearson, E. S. (1934). Biometrika 26(4), 404-413.
    .. [3] Greenwood, W. H. and Chase, K. W. (1987). A new tolerance analysis method for
       designers and manufacturers. Journal of Engineering for Industry 109(2), 112-116.
    """
    samples, seed = _checked_run(samples, seed)
    if not case.requirements:
        raise CaseError("the case has no requirement to verify", field="requirement")
    tolerances, processes, allocated_with = _unpack(tolerances, processes, allocated_with)
    t = _tolerance_array(case, tolerances)
    engine = _Engine(case, t, shift_means, samples, seed, chunk_size, processes)
    tally = _Tally(engine, case, t, bins)
    with _progress_bar(progress, samples) as bar:
        if map_blocks is None:
            for y, spans in engine.chunks():
                tally.add(y, spans)
                if bar is not None:
                    bar.update(len(y))
        else:
            for part in _tally_elsewhere(engine, tally, map_blocks, (case, t, shift_means, processes, bins)):
                tally.merge(part)
                if bar is not None:
                    bar.update(part.rows)
    tally.finish()

    failures = tally.below + tally.above + tally.undefined  # undefined holds the unclosed loops
    ci_low, ci_high = clopper_pearson(failures, samples)
    checks = [
        _requirement_check(case, engine, t, tally, j, (float(ci_low[j]), float(ci_high[j])))
        for j in range(len(engine.order))
    ]
    by_name = {c.name: c for c in checks}
    checks = [by_name[r.name] for r in case.requirements]  # back to case order
    status, message = _verdict(checks)
    return Verification(
        status=status,
        success=status == "pass",
        message=message,
        seed=seed,
        samples=samples,
        block_size=engine.block,
        chunk_size=engine.chunk_rows,
        confidence=CONFIDENCE,
        shift_means=shift_means,
        tolerances=dict(zip(case.names, (float(x) for x in t))),
        requirements=checks,
        allocated_with=allocated_with,
        assumption_note=_assumption_note(case, checks, allocated_with, shift_means),
    )


def _checked_run(samples, seed) -> tuple[int, int]:
    """``(samples, seed)`` as checked integers; a ``None`` seed becomes fresh OS entropy."""
    samples = int(samples)
    if samples < 1:
        raise ValueError("samples must be at least 1")
    if seed is None:
        # fresh OS entropy, folded to 64 bits so that it is easy to type back in
        seed = int(np.random.SeedSequence().entropy) % 2**64
    seed = int(seed)
    if seed < 0:
        raise ValueError("seed must be a non-negative integer")
    return samples, seed


@contextmanager
def _progress_bar(progress: bool, samples: int):
    """A tqdm bar on stderr when asked for and stderr is a terminal, else None; closed on exit."""
    bar = None
    if progress and sys.stderr.isatty():
        from tqdm import tqdm

        bar = tqdm(total=samples, unit="assemblies", unit_scale=True, file=sys.stderr, leave=False)
    try:
        yield bar
    finally:
        if bar is not None:
            bar.close()


class _Tally:
    """Running counts, sums and histograms of the simulated responses, chunk by chunk.

    Columns follow ``engine.order``; responses are relative to ``engine.centre``. Sums are
    taken per stream block so that they do not depend on the chunking. A tally of some
    blocks made elsewhere (``keep_blocks``: it keeps each block's sums) is added to the
    whole one by :meth:`merge`.
    """

    def __init__(self, engine: _Engine, case, t: np.ndarray, bins: int, keep_blocks: bool = False):
        self.engine, self.case, self.t, self.bins = engine, case, t, bins
        self.block_sums = [] if keep_blocks else None  # (sum1, sum2) per block, in order
        self.rows = 0
        n_req = len(engine.order)
        self.lower = np.array([p.lower for p in engine.order])
        self.upper = np.array([p.upper for p in engine.order])
        self.below = np.zeros(n_req, dtype=np.int64)
        self.above = np.zeros(n_req, dtype=np.int64)
        self.undefined = np.zeros(n_req, dtype=np.int64)
        self.sum1 = np.zeros(n_req)
        self.sum2 = np.zeros(n_req)
        self.valid = np.zeros(n_req, dtype=np.int64)
        self.hist = np.zeros((n_req, bins + 2), dtype=np.int64)  # [underflow, bins…, overflow]
        self.hist_lo = self.hist_scale = None

    def add(self, y: np.ndarray, spans) -> None:
        """Count one chunk of responses ``y`` (rows: assemblies; ``spans``: its stream blocks)."""
        centre, bins, n_req = self.engine.centre, self.bins, len(self.engine.order)
        finite = np.isfinite(y)
        if self.hist_lo is None:
            self._fix_bins(y[: spans[0][2]])
        room_below, room_above = stack.room(centre, self.lower, self.upper)  # ±inf limits: no None
        self.below += np.count_nonzero(y < -room_below, axis=0)
        self.above += np.count_nonzero(y > room_above, axis=0)
        self.undefined += np.count_nonzero(np.isnan(y), axis=0)
        self.valid += np.count_nonzero(finite, axis=0)
        self.rows += len(y)
        clean = np.where(finite, y, 0.0)
        for _, start, size in spans:  # float sums per block: independent of chunking
            part = clean[start : start + size]
            sum1, sum2 = part.sum(axis=0), (part * part).sum(axis=0)
            self.sum1 += sum1
            self.sum2 += sum2
            if self.block_sums is not None:
                self.block_sums.append((sum1, sum2))
        # histogram of all requirements in one bincount; NaN goes to "underflow"
        # and is removed again in finish()
        index = np.floor((np.nan_to_num(y, nan=-np.inf) - self.hist_lo) * self.hist_scale)
        index = np.clip(index, -1, bins).astype(np.int64) + 1
        index += np.arange(n_req) * (bins + 2)
        self.hist += np.bincount(index.ravel(), minlength=n_req * (bins + 2)).reshape(n_req, bins + 2)

    def _fix_bins(self, first_block: np.ndarray) -> None:
        """Histogram ranges from block 0 alone, so that bins are the same for every chunking."""
        centre = self.engine.centre
        ranges = np.array(
            [
                _histogram_range(p, self.t, self.case, first_block[:, j] + centre[j])
                for j, p in enumerate(self.engine.order)
            ]
        )
        self.hist_lo = ranges[:, 0] - centre
        self.hist_scale = self.bins / (ranges[:, 1] - ranges[:, 0])

    def merge(self, part: _Tally) -> None:
        """Add the tally of the next blocks, made elsewhere (the same bins; ``keep_blocks``).

        Counts are whole numbers; the float sums are added block by block, in block order,
        exactly as :meth:`add` adds them, so the totals have the same bits.
        """
        self.below += part.below
        self.above += part.above
        self.undefined += part.undefined
        self.valid += part.valid
        self.hist += part.hist
        for sum1, sum2 in part.block_sums:
            self.sum1 += sum1
            self.sum2 += sum2
        self.rows += part.rows

    def __getstate__(self):
        # what travels back from a worker: the numbers, not the engine or the case
        state = dict(self.__dict__)
        state["engine"] = state["case"] = state["t"] = None
        return state

    def finish(self) -> None:
        """Take the undefined (NaN) responses back out of the underflow counts."""
        self.hist[:, 0] -= self.undefined

    def moments(self, j: int) -> tuple[float, float]:
        """Sample mean and variance of requirement column ``j`` over its finite responses."""
        centre, sum1, sum2, valid = self.engine.centre, self.sum1, self.sum2, self.valid
        mean = centre[j] + sum1[j] / valid[j] if valid[j] else math.nan
        var = (sum2[j] - sum1[j] ** 2 / valid[j]) / (valid[j] - 1) if valid[j] > 1 else math.nan
        return mean, var

    def edges(self, j: int) -> np.ndarray:
        """Histogram bin edges of requirement column ``j`` [response]."""
        lo = self.hist_lo[j] + self.engine.centre[j]
        return np.linspace(lo, lo + self.bins / self.hist_scale[j], self.bins + 1)


@dataclass(frozen=True)
class _BlockJob:
    """One chunk of stream blocks to simulate and tally elsewhere (plain, picklable data)."""

    case: object
    t: np.ndarray
    shift_means: bool
    samples: int
    seed: int
    chunk_rows: int
    processes: object
    bins: int
    hist_lo: np.ndarray
    hist_scale: np.ndarray
    blocks: range


def _tally_blocks(job: _BlockJob) -> _Tally:
    """Simulate and tally the blocks of ``job`` (runs on a worker; module level to pickle)."""
    engine = _Engine(job.case, job.t, job.shift_means, job.samples, job.seed, job.chunk_rows, job.processes)
    tally = _Tally(engine, job.case, job.t, job.bins, keep_blocks=True)
    tally.hist_lo, tally.hist_scale = job.hist_lo, job.hist_scale
    for y, spans in engine.chunks(job.blocks):
        tally.add(y, spans)
    return tally


def _tally_elsewhere(engine: _Engine, tally: _Tally, map_blocks, setup):
    """The tallies of every chunk, made by ``map_blocks``, in block order.

    The histogram bins come from block 0 (:meth:`_Tally._fix_bins`), drawn here first so
    that every worker counts into the same bins.
    """
    case, t, shift_means, processes, bins = setup
    processes = None if processes is None else dict(processes)  # a read-only mapping does not pickle
    y, spans = next(engine.chunks(range(0, 1)))
    tally._fix_bins(y[: spans[0][2]])
    step = engine.chunk_blocks
    jobs = [
        _BlockJob(case, t, shift_means, engine.samples, engine.seed, engine.chunk_rows, processes, bins,
                  tally.hist_lo, tally.hist_scale, range(first, min(first + step, engine.n_blocks)))
        for first in range(0, engine.n_blocks, step)
    ]
    return map_blocks(_tally_blocks, jobs)


def _convolution(case, t: np.ndarray, sigma_factors: np.ndarray, plan: _Plan):
    """Exact fallout [ppm] of a linear chain by numerical convolution (None if nonlinear), a note
    and the distribution (None if nonlinear)."""
    if not plan.linear:
        return None, "not available: the expression is nonlinear (convolution needs a linear chain)", None
    dist = linear_sum_distribution(
        plan.a,
        case.counts,
        t,
        [c.distribution for c in case.contributors],
        sigma_factors,
        mean=plan.shifted_mean,
    )
    conv_below, conv_above = dist.fallout(plan.requirement.lower, plan.requirement.upper)
    note = "exact distribution of the linear chain by numerical convolution"
    return fraction_to_ppm(conv_below + conv_above), note, dist


def _requirement_check(case, engine: _Engine, t: np.ndarray, tally: _Tally, j: int, ci) -> RequirementCheck:
    """The result for requirement column ``j``: counts, interval ``ci`` (fractions), predictions, histogram."""
    plan, samples = engine.order[j], engine.samples
    not_closed = int(engine.not_closed[j])  # nan responses, counted apart from undefined
    failures = tally.below[j] + tally.above[j] + tally.undefined[j]
    fallout_ppm = fraction_to_ppm(failures / samples)
    lo_ppm, hi_ppm = fraction_to_ppm(ci[0]), fraction_to_ppm(ci[1])
    convolution_ppm, note, dist = _convolution(case, t, engine.sigma_factors, plan)
    edges = tally.edges(j)
    mean, var = tally.moments(j)
    hist = tally.hist
    return RequirementCheck(
        **_prediction_fields(case, plan, lo_ppm, hi_ppm),
        samples=samples,
        below=int(tally.below[j]),
        above=int(tally.above[j]),
        undefined=int(tally.undefined[j]) - not_closed,
        fallout_ppm=float(fallout_ppm),
        ci_low_ppm=lo_ppm,
        ci_high_ppm=hi_ppm,
        convolution_ppm=None if convolution_ppm is None else float(convolution_ppm),
        convolution_note=note,
        mean=float(mean),
        std=float(math.sqrt(max(var, 0.0))) if math.isfinite(var) else math.nan,
        histogram_edges=edges,
        histogram_counts=hist[j, 1:-1].copy(),
        underflow=int(hist[j, 0]),
        overflow=int(hist[j, -1]),
        through_loop=bool(engine.through_loop[j]),
        not_closed=not_closed,
        exact_density=None if dist is None else dist.bin_probabilities(edges) / np.diff(edges),
    )


def _prediction_fields(case, plan: _Plan, lo_ppm: float, hi_ppm: float) -> dict:
    """The check fields every verification method fills alike from the requirement's plan and
    the interval ``[lo_ppm, hi_ppm]`` of its fallout: limits, target, analytic predictions,
    the verdict (fail when the interval lies above the target) and the units."""
    req = plan.requirement
    predicted = plan.mean_shift_ppm if plan.mean_shift_ppm is not None else plan.rss_ppm
    return {
        "name": req.name,
        "linear": plan.linear,
        "lower": req.lower,
        "upper": req.upper,
        "target_ppm": float(req.target_ppm),
        "rss_ppm": float(plan.rss_ppm),
        "mean_shift_ppm": None if plan.mean_shift_ppm is None else float(plan.mean_shift_ppm),
        "predicted_ppm": float(predicted),
        "nominal": float(plan.nominal),
        "sigma": float(plan.sigma),
        "shift_side": int(plan.side),
        "shifted_mean": float(plan.shifted_mean),
        "model_disagrees": bool(predicted < lo_ppm or predicted > hi_ppm),
        "status": "fail" if lo_ppm > req.target_ppm else "pass",
        "decided": bool(lo_ppm > req.target_ppm or hi_ppm <= req.target_ppm),
        "units": case.requirement_units(req.name),
    }


def _verdict(checks) -> tuple[str, str]:
    """``(status, message)`` of the whole verification from its requirement checks."""
    failed = [c.name for c in checks if c.status == "fail"]
    undecided = [c.name for c in checks if not c.decided]
    if failed:
        message = f"fallout above target beyond the {CONFIDENCE:.0%} interval: {', '.join(failed)}"
    elif undecided:
        message = (
            f"no requirement fails; target inside the {CONFIDENCE:.0%} interval for "
            f"{', '.join(undecided)} (more samples would decide)"
        )
    else:
        message = f"every requirement meets its target at {CONFIDENCE:.0%} confidence"
    disagree = [c.name for c in checks if c.model_disagrees]
    if disagree:
        message += f"; analytic prediction outside the interval for {', '.join(disagree)}"
    return ("fail" if failed else "pass"), message


def _assumption_note(case, checks, allocated_with: str | None, shift_means: bool) -> str:
    """One line when the simulation places mean shifts that an rss allocation left out.

    The rss model takes every process as centred (Evans 1974); the case's ``mean_shift``
    is the mean-shift model's input (Greenwood & Chase 1987). Verifying an rss allocation
    with the shifts in place tests it against an assumption it was not designed for.
    """
    if allocated_with != "rss" or not shift_means:
        return ""
    shifted = [c.name for c in checks if c.shift_side != 0]
    if not shifted:
        return ""
    movers = [c.name for c in case.contributors if c.mean_shift > 0]
    shown = ", ".join(movers[:4]) + (f" and {len(movers) - 4} more" if len(movers) > 4 else "")
    return (
        f"the simulation places the case's mean shifts ({shown}) on the worse side of "
        f"{', '.join(shifted)}, which the rss allocation did not assume (rss takes centred "
        "processes); verify it with --centred to check it under its own assumption, or "
        "allocate with --model mean-shift to allow for the shifts"
    )


# --------------------------------------------------------------------------- plotting


def render_verification_plot(result: Verification, fmt: str = "png") -> bytes:
    """The histogram figure of ``result`` as PNG or SVG bytes (matplotlib, Agg)."""
    import io

    fmt = fmt.lower().lstrip(".")
    if fmt not in ("png", "svg"):
        raise ValueError(f"plot format must be png or svg, got {fmt!r}")
    from .plots import verification_figure

    buffer = io.BytesIO()
    verification_figure(result).savefig(buffer, format=fmt, dpi=120)
    return buffer.getvalue()


def plot_verification(result: Verification, path: str | os.PathLike) -> Path:
    """Write the response histograms of ``result`` to ``path`` (``.png`` or ``.svg``).

    One panel per requirement: the Monte Carlo density, the limits as dashed lines and
    the RSS normal approximation. Written to a temporary file and renamed into place.
    """
    from .files import atomic_write

    return atomic_write(path, render_verification_plot(result, Path(path).suffix))
