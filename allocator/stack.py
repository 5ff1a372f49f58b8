"""Stack models: worst case, RSS and estimated mean shift (pure functions).

All functions take numpy arrays over contributors: sensitivities ``a`` [response/length],
instance counts ``n`` [-], tolerances ``t`` [length] (± half-widths), σ/t factors ``f``
[-] and mean-shift fractions ``m`` [-]. They never look at a case file.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "LIMIT_RTOL",
    "normal_quantile",
    "room",
    "limit_margin",
    "beyond_limits",
    "worst_case_excess",
    "worst_case_half_width",
    "worst_case_range",
    "rss_sigma",
    "mean_shift_delta",
    "normal_fallout",
    "worst_mean_fallout",
    "sigma_limit",
    "mean_shift_sigma_limit",
]


#: Relative round-off margin for judging a stack against a limit [-] (see
#: :func:`limit_margin`).
LIMIT_RTOL = 1e-9


def room(
    nominal: float | np.ndarray,
    lower: float | np.ndarray | None = None,
    upper: float | np.ndarray | None = None,
    delta: float = 0.0,
) -> tuple:
    """Room between the response (or its mean band) and each limit [response].

    Parameters
    ----------
    nominal : float or numpy.ndarray
        Nominal response ȳ (or any single response value, e.g. a mean) [response].
    lower, upper : float, numpy.ndarray or None
        Limits; ``None`` is a missing limit.
    delta : float
        Half-width δ ≥ 0 of a band ``[ȳ − δ, ȳ + δ]`` around the nominal (the mean-shift
        band of :func:`mean_shift_delta`) [response]; 0 for the nominal itself.

    Returns
    -------
    (below, above) : (float, float)
        ``ȳ − δ − L`` and ``U − ȳ − δ``, the distances from the band's ends to the
        limits, evaluated left to right in exactly that order; ``inf`` for a missing
        limit. ``min(below, above)`` is the room a worst-case half-width may use; a
        value ≤ 0 means the band reaches (or passes) that limit.

    Notes
    -----
    Every room in the package (worst-case constraints, Cpk, σ limits and z-scores,
    sweep ranges, Monte Carlo counts) comes from here, so the solvers, the analysis and
    the report see the same bits. With ``δ = 0`` the subtraction of ``δ`` is exact, so
    the values are ``ȳ − L`` and ``U − ȳ`` to the last bit, and ``−below`` is ``L − ȳ``
    to the last bit. How far a worst-case end passes a limit (:func:`beyond_limits`,
    ``L − (ȳ − W)``) is a different sum and rounds differently. Limits given as arrays
    must not hold ``None`` (use ``±inf`` for a missing side).

    Examples
    --------
    >>> room(0.3, 0.05, 0.6)
    (0.25, 0.3)
    >>> room(10.0, upper=10.5, delta=0.5)
    (inf, 0.0)
    """
    below = math.inf if lower is None else nominal - delta - lower
    above = math.inf if upper is None else upper - nominal - delta
    return below, above


def limit_margin(*magnitudes: float | None) -> float:
    """Round-off margin for comparing a stack value with a limit [response].

    Parameters
    ----------
    *magnitudes : float or None
        The numbers the comparison is made of: nominal response, lower and upper limit,
        worst-case half-width (or any other spread) [response]. ``None`` and non-finite
        values are ignored.

    Returns
    -------
    float
        ``LIMIT_RTOL · max |magnitude|`` (0 when every magnitude is 0).

    Notes
    -----
    A worst-case end ``ȳ − Σ n|a|t`` is computed in binary floating point from decimal
    inputs that are not exact binary fractions (0.05, 0.6, ...). Its error is a few
    units in the last place of the largest number involved, about ``1e-16`` relative per
    operation. Every judgement of a stack against a limit in the package (analysis
    verdicts, the CLI and the report, a response whose spread is zero) counts a value
    within ``LIMIT_RTOL = 1e-9`` of the largest magnitude involved as *at* the limit,
    i.e. inside it. The margin is ten million times the round-off of a single operation
    and far below anything measurable: 1 nm on a 1 m nominal. A value beyond a limit by
    more than this is outside, and the excess is reported. The allocation solvers accept
    a worst case at most ``1e-9`` of the room ``min(ȳ − L, U − ȳ)`` beyond its limit,
    which is inside this margin, so an allocation they call feasible is judged inside.

    Examples
    --------
    >>> limit_margin(0.3, 0.05, 0.6, 0.25)
    6e-10
    """
    finite = [abs(float(v)) for v in magnitudes if v is not None and math.isfinite(v)]
    return LIMIT_RTOL * max(finite, default=0.0)


def beyond_limits(low: float, high: float, lower: float | None = None, upper: float | None = None, *, margin: float = 0.0) -> tuple[float, float]:
    """How far a range ``[low, high]`` reaches past each limit [response].

    Parameters
    ----------
    low, high : float
        Ends of the range (``low <= high``) [response].
    lower, upper : float or None
        Limits; a missing limit is never passed.
    margin : float
        Round-off margin (:func:`limit_margin`) [response], ≥ 0.

    Returns
    -------
    (float, float)
        ``(lower − low, high − upper)`` where that exceeds ``margin``, else 0.0 per side:
        ``(0.0, 0.0)`` means the range is inside the limits.

    Examples
    --------
    >>> beyond_limits(0.04999999999999982, 0.55, 0.05, 0.6, margin=6e-10)
    (0.0, 0.0)
    >>> beyond_limits(0.0499, 0.55, 0.05, 0.6, margin=6e-10)[0] > 0
    True
    """
    below = lower - low if lower is not None and low < lower - margin else 0.0
    above = high - upper if upper is not None and high > upper + margin else 0.0
    return float(below), float(above)


def worst_case_excess(nominal: float, half_width: float, lower: float | None = None, upper: float | None = None) -> tuple[float, float]:
    """How far the worst-case range ``ȳ ± W`` passes each limit, round-off excused.

    Parameters
    ----------
    nominal : float
        Nominal response ȳ [response].
    half_width : float
        Worst-case half-width W (:func:`worst_case_half_width`) [response].
    lower, upper : float or None
        Limits.

    Returns
    -------
    (float, float)
        Amount below ``lower`` and above ``upper`` [response]; 0.0 on a side that holds,
        including a side met within :func:`limit_margin` of ``(ȳ, L, U, W)``.

    Examples
    --------
    >>> worst_case_excess(0.3, 0.25, 0.05, 0.6)   # 0.3 − 0.25 is 0.04999999999999999
    (0.0, 0.0)
    """
    margin = limit_margin(nominal, lower, upper, half_width)
    return beyond_limits(nominal - half_width, nominal + half_width, lower, upper, margin=margin)


_SQRT_HALF = math.sqrt(0.5)


def _norm_cdf(z):
    # Φ(z) = erfc(−z/√2)/2 keeps full relative accuracy in the lower tail (math.erfc, so
    # the stack models need no scipy import: it costs more than a whole allocation)
    return 0.5 * math.erfc(-z * _SQRT_HALF)


@functools.lru_cache(maxsize=1024)
def normal_quantile(p: float) -> float:
    """Standard normal quantile ``Φ⁻¹(p)`` for ``0 < p < 1`` [-].

    Notes
    -----
    Abramowitz & Stegun's rational approximation 26.2.23 (error below 4.5e-4) as the
    start, then Halley steps on ``Q(z) = erfc(z/√2)/2 = p`` (cubic convergence; ``Q`` from
    :func:`math.erfc` with full relative accuracy in the tail) to round-off. The tests
    check it against ``scipy.special.ndtri``. Kept per ``p`` (a pure function): the
    mean-shift solvers ask for the same one or two values thousands of times per solve.

    References
    ----------
    .. [1] Abramowitz, M. and Stegun, I. A. (1964). Handbook of Mathematical Functions,
       formula 26.2.23. National Bureau of Standards.

    Examples
    --------
    >>> round(normal_quantile(0.975), 12)
    1.95996398454
    """
    if not 0.0 < p < 1.0:
        raise ValueError(f"probability must be in (0, 1), got {p!r}")
    if p == 0.5:
        return 0.0
    tail = min(p, 1.0 - p) if p > 0.5 else p  # upper-tail probability of |z|
    u = math.sqrt(-2.0 * math.log(tail))
    z = u - (2.515517 + u * (0.802853 + u * 0.010328)) / (1.0 + u * (1.432788 + u * (0.189269 + u * 0.001308)))
    for _ in range(8):
        q = 0.5 * math.erfc(z * _SQRT_HALF)
        density = math.exp(-0.5 * z * z) / math.sqrt(2.0 * math.pi)
        step = (q - tail) / density
        step /= 1.0 - 0.5 * z * step
        z += step
        if abs(step) <= 1e-16 * abs(z):
            break
    return z if p > 0.5 else -z


def worst_case_half_width(a: ArrayLike, n: ArrayLike, t: ArrayLike) -> float:
    """Worst-case half-width of the response.

    Parameters
    ----------
    a : array_like
        Sensitivities ∂y/∂x_i [response/length].
    n : array_like
        Instances per assembly [-].
    t : array_like
        ± tolerances [length].

    Returns
    -------
    float
        ``Σ n_i·|a_i|·t_i`` [response].

    Notes
    -----
    Every contributor at the end of its tolerance that pushes ``y`` the same way:
    ``y ∈ [ȳ − W, ȳ + W]``, ``W = Σ n_i |a_i| t_i``.

    References
    ----------
    .. [1] Fortini, E. T. (1967). Dimensioning for Interchangeable Manufacture.
       Industrial Press, New York.

    Examples
    --------
    >>> worst_case_half_width([1, -1], [1, 2], [0.1, 0.05])
    0.2
    """
    a, n, t = (np.asarray(v, dtype=float) for v in (a, n, t))
    return float(np.sum(n * np.abs(a) * t))


def worst_case_range(nominal: float, a: ArrayLike, n: ArrayLike, t: ArrayLike) -> tuple[float, float]:
    """``(ȳ − W, ȳ + W)`` with ``W`` from :func:`worst_case_half_width` [response]."""
    w = worst_case_half_width(a, n, t)
    return nominal - w, nominal + w


def rss_sigma(a: ArrayLike, n: ArrayLike, sigma: ArrayLike) -> float:
    """Standard deviation of the response by root sum of squares.

    Parameters
    ----------
    a : array_like
        Sensitivities [response/length].
    n : array_like
        Independent instances per assembly [-].
    sigma : array_like
        Contributor standard deviations σ_i [length] (``f_i · t_i``).

    Returns
    -------
    float
        ``σ_y = sqrt(Σ n_i · (a_i · σ_i)²)`` [response].

    Notes
    -----
    Variances of independent contributors add; first order in the sensitivities
    (exact for a linear chain).

    References
    ----------
    .. [1] Evans, D. H. (1974). Statistical tolerancing: the state of the art, Part I.
       Journal of Quality Technology 6(4), 188-195.

    Examples
    --------
    >>> round(rss_sigma([1, 1], [1, 1], [0.03, 0.04]), 12)
    0.05
    """
    a, n, s = (np.asarray(v, dtype=float) for v in (a, n, sigma))
    return float(math.sqrt(np.sum(n * (a * s) ** 2)))


def mean_shift_delta(a: ArrayLike, n: ArrayLike, m: ArrayLike, t: ArrayLike) -> float:
    """Band within which the response mean may sit: ``δ = Σ n_i·|a_i|·m_i·t_i``.

    Parameters
    ----------
    a, n, t : array_like
        Sensitivities [response/length], counts [-], ± tolerances [length].
    m : array_like
        Mean-shift fractions, ``|μ_i − nominal_i| ≤ m_i · t_i`` [-], 0..1.

    References
    ----------
    .. [1] Greenwood, W. H. and Chase, K. W. (1987). A new tolerance analysis method for
       designers and manufacturers. Journal of Engineering for Industry 109(2), 112-116.
    """
    a, n, m, t = (np.asarray(v, dtype=float) for v in (a, n, m, t))
    return float(np.sum(n * np.abs(a) * m * t))


def normal_fallout(mean: float, sigma: float, lower: float | None = None, upper: float | None = None) -> tuple[float, float]:
    """Fraction of a normal response below ``lower`` and above ``upper``.

    Parameters
    ----------
    mean : float
        Response mean [response].
    sigma : float
        Response standard deviation [response], ≥ 0.
    lower, upper : float or None
        Limits; a missing limit contributes 0.

    Returns
    -------
    (float, float)
        ``(Φ((L − μ)/σ), 1 − Φ((U − μ)/σ))`` as fractions (multiply by 1e6 for ppm).

    Notes
    -----
    With σ = 0 the response is the mean itself: fallout 1 on a side the mean passes by
    more than the round-off margin :func:`limit_margin`.

    References
    ----------
    .. [1] Montgomery, D. C. (2009). Introduction to Statistical Quality Control, 6th ed.
       Wiley, ch. 8 (process capability).

    Examples
    --------
    >>> below, above = normal_fallout(0.0, 1.0, -3.0, 3.0)
    >>> round((below + above) * 1e6)
    2700
    """
    below = above = 0.0
    if sigma <= 0:
        out_below, out_above = beyond_limits(mean, mean, lower, upper, margin=limit_margin(mean, lower, upper))
        return float(out_below > 0), float(out_above > 0)
    d_low, d_up = room(mean, lower, upper)
    if lower is not None:
        below = float(_norm_cdf(-d_low / sigma))  # −(μ − L) is L − μ to the bit
    if upper is not None:
        above = float(_norm_cdf(-d_up / sigma))
    return below, above


def worst_mean_fallout(
    nominal: float, delta: float, sigma: float, lower: float | None = None, upper: float | None = None
) -> tuple[float, float, float]:
    """Fallout with the mean at the worst place in ``[ȳ − δ, ȳ + δ]``.

    Returns
    -------
    (below, above, mean) : (float, float, float)
        Fractions at the worst mean, and that mean [response].

    Notes
    -----
    For fixed σ the total normal fallout is unimodal in the mean with its minimum at
    the middle of the limits (one-sided: monotone), so the worst mean is an end of
    the band. With ``δ = 0`` this is :func:`normal_fallout` at ``ȳ`` (plain RSS).

    References
    ----------
    .. [1] Greenwood, W. H. and Chase, K. W. (1987). A new tolerance analysis method for
       designers and manufacturers. Journal of Engineering for Industry 109(2), 112-116.
    """
    candidates = [nominal] if delta <= 0 else [nominal - delta, nominal + delta]
    best = None
    for mu in candidates:
        below, above = normal_fallout(mu, sigma, lower, upper)
        if best is None or below + above > best[0] + best[1]:
            best = (below, above, mu)
    return best


def _two_sided_sigma(d_near: float, d_far: float, p: float) -> float:
    """σ at which ``Φ(−d_near/σ) + Φ(−d_far/σ) = p`` (0 < d_near ≤ d_far)."""
    one_sided = d_near / -normal_quantile(p)  # far side ignored: an upper bound on σ
    if not math.isfinite(d_far):
        return one_sided
    lo = d_near / -normal_quantile(p / 2.0)  # both sides as close as the near one: lower bound
    f = lambda s: _norm_cdf(-d_near / s) + _norm_cdf(-d_far / s) - p  # noqa: E731
    if f(one_sided) <= 0:
        return one_sided
    if f(lo) >= 0:
        # symmetric limits (d_far == d_near up to round-off): lo is the root itself, and
        # round-off may put f(lo) a hair above 0, leaving brentq no sign change
        return lo
    return _increasing_root(f, lo, one_sided, -d_near, -d_far)


def _increasing_root(f, lo: float, hi: float, a: float, b: float) -> float:
    """Root of ``f(s) = Φ(a/s) + Φ(b/s) − p`` (increasing in s) in ``[lo, hi]``, ``f(lo) < 0 < f(hi)``.

    Newton steps with the exact slope ``−(a φ(a/s) + b φ(b/s))/s²``, kept inside the
    bracket (a bisection step where Newton leaves it), to ``1e-15`` relative.
    """
    s = hi
    for _ in range(200):
        value = f(s)
        if value == 0.0:
            return s
        if value > 0:
            hi = s
        else:
            lo = s
        slope = -(a * math.exp(-0.5 * (a / s) ** 2) + b * math.exp(-0.5 * (b / s) ** 2)) / (
            math.sqrt(2.0 * math.pi) * s * s)
        new = s - value / slope if slope > 0 else 0.5 * (lo + hi)
        if not lo < new < hi:
            new = 0.5 * (lo + hi)
        if abs(new - s) <= 1e-15 * hi or hi - lo <= 1e-15 * hi:
            return new
        s = new
    return s


def sigma_limit(mean: float, fallout: float, lower: float | None = None, upper: float | None = None) -> float:
    """Largest response σ whose normal fallout with this mean is at most ``fallout``.

    Parameters
    ----------
    mean : float
        Response mean [response].
    fallout : float
        Allowed fraction outside the limits (ppm · 1e-6), 0 < fallout < 1.
    lower, upper : float or None
        Limits (at least one).

    Returns
    -------
    float
        σ_max [response]; 0 when the mean is on or outside a limit; ``inf`` when
        there is no limit.

    Notes
    -----
    One-sided: ``σ_max = (U − μ)/z`` with ``z = Φ⁻¹(1 − p)``. Two-sided: the 1-D root of
    ``Φ((L − μ)/σ) + Φ((μ − U)/σ) = p`` (increasing in σ), bracketed between the
    one-sided value and the value with both limits at the nearer distance.

    References
    ----------
    .. [1] Chase, K. W., Greenwood, W. H., Loosli, B. G. and Hauglund, L. F. (1990).
       Least cost tolerance allocation for mechanical assemblies with automated process
       selection. Manufacturing Review 3(1), 49-59.

    Examples
    --------
    >>> round(sigma_limit(0.0, 0.0027, -3.0, 3.0), 3)
    1.0
    """
    if not 0.0 < fallout < 1.0:
        raise ValueError("fallout must be strictly between 0 and 1")
    d_low, d_up = room(mean, lower, upper)
    if d_low == math.inf and d_up == math.inf:
        return math.inf
    d_near, d_far = min(d_low, d_up), max(d_low, d_up)
    if d_near <= 0:
        return 0.0
    return _two_sided_sigma(d_near, d_far, fallout)


def mean_shift_sigma_limit(
    nominal: float, delta: float, fallout: float, lower: float | None = None, upper: float | None = None
) -> float:
    """Largest σ meeting ``fallout`` with the mean anywhere in ``[ȳ − δ, ȳ + δ]``.

    The worst mean is the end of the band nearest a limit (see
    :func:`worst_mean_fallout`), so this is :func:`sigma_limit` at that end; it is
    decreasing in δ.

    References
    ----------
    .. [1] Greenwood, W. H. and Chase, K. W. (1987). A new tolerance analysis method for
       designers and manufacturers. Journal of Engineering for Industry 109(2), 112-116.
    """
    if delta <= 0:
        return sigma_limit(nominal, fallout, lower, upper)
    return min(
        sigma_limit(nominal - delta, fallout, lower, upper),
        sigma_limit(nominal + delta, fallout, lower, upper),
    )
