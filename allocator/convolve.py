"""Exact distribution of a linear chain by numerical convolution (no sampling noise).

A linear response ``y = Σ a_i · Σ_j x_ij`` of independent contributors is split into

- a **normal part**: every normal instance together is one normal with
  ``σ_N² = Σ count_i · (a_i · σ_i)²`` (sums of independent normals are normal, exactly);
- a **bounded part**: the uniform and triangular instances, each of half-width ``|a_i|·t_i``.

The bounded part is discretised on a common grid of step ``h``: each instance becomes the
exact probability of each grid bin ``[(k − ½)h, (k + ½)h)`` (from its closed-form CDF), and
the bins of all instances are convolved at once by multiplying their discrete Fourier
transforms (``count`` identical instances: the transform raised to the power ``count``).
Probabilities then follow without any subtraction from 1:

- with a normal part, ``P(y > u) = Σ_k q_k · Φ((μ + k·h − u) / σ_N)`` with ``Φ`` evaluated
  by :func:`scipy.special.ndtr`, which keeps its full relative accuracy far in the tails;
- without one, the cumulative bin probabilities are interpolated linearly between bin
  edges, summed from the nearer end so that small tails keep their relative accuracy.

Rounding every instance to the grid changes the variance by about ``h²/12`` per instance,
so the error is of second order in ``h``; the grid is chosen fine enough for ~1e-10
absolute error in the bulk and ~1e-5 relative error at 7σ of the normal part
(see docs/verification.md). Expressions are not linear, so this does not apply to them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np
from numpy.typing import ArrayLike
from scipy import fft, special

__all__ = [
    "uniform_cdf",
    "triangular_cdf",
    "bin_masses",
    "LinearSumDistribution",
    "linear_sum_distribution",
    "band_fallout",
    "characteristic_function",
    "inversion_sf",
    "uniform_sum_sf",
    "uniform_halves",
    "chain_fallout",
    "EXACT_INSTANCES",
]

# a chain of at most this many uniform instances (a triangular counts as two) and no normal
# part is summed exactly (2**n subsets at most): the grid cannot resolve its tails below
# about 1/BULK_POINTS, where the fallout is a polynomial of the distance to the support end
EXACT_INSTANCES = 12

# grid points across the bounded part's support: CDF error ~1e-10 for Irwin–Hall sums
BULK_POINTS = 2**18
# grid steps per σ of the normal part: relative tail error ~ (h/σ_N)² · z² / 24 ≈ 1e-5 at z = 7
STEPS_PER_SIGMA = 400
# hard cap on the grid (two float arrays of this length stay well under 100 MB)
MAX_POINTS = 2**21
# bin_probabilities: grid steps per σ_N kept when a finer grid is merged (variance error
# (h/σ_N)²/12 ≈ 5e-9 relative)
DENSITY_STEPS_PER_SIGMA = 4000
# below this many steps per σ_N the normal part is put on the grid as well
MIN_STEPS_PER_SIGMA = 8
# the normal part, when put on the grid, is cut at ±NORMAL_CUT·σ_N (tail beyond: < 1e-40)
NORMAL_CUT = 13.5


def uniform_cdf(x: ArrayLike, half_width: float) -> np.ndarray:
    """CDF of the uniform distribution on ``[−c, c]``.

    Parameters
    ----------
    x : array_like
        Points [length].
    half_width : float
        ``c > 0`` [length].

    Returns
    -------
    numpy.ndarray
        ``clip((x + c) / (2c), 0, 1)`` [-].
    """
    x = np.asarray(x, dtype=float)
    return np.clip((x + half_width) / (2.0 * half_width), 0.0, 1.0)


def triangular_cdf(x: ArrayLike, half_width: float) -> np.ndarray:
    """CDF of the symmetric triangular distribution on ``[−c, c]`` (mode 0).

    Parameters
    ----------
    x : array_like
        Points [length].
    half_width : float
        ``c > 0`` [length].

    Returns
    -------
    numpy.ndarray
        ``(x + c)² / (2c²)`` for ``x ≤ 0``, ``1 − (c − x)² / (2c²)`` for ``x > 0`` [-].

    Notes
    -----
    The density is ``(c − |x|) / c²``; it is the sum of two independent uniforms on
    ``[−c/2, c/2]``.

    References
    ----------
    .. [1] Johnson, N. L., Kotz, S. and Balakrishnan, N. (1995). Continuous Univariate
       Distributions, Vol. 2, 2nd ed. Wiley, ch. 26 (uniform and triangular).
    """
    x = np.clip(np.asarray(x, dtype=float), -half_width, half_width)
    c2 = 2.0 * half_width * half_width
    return np.where(x <= 0.0, (x + half_width) ** 2 / c2, 1.0 - (half_width - x) ** 2 / c2)


def _normal_cdf(x, sigma: float):
    return special.ndtr(np.asarray(x, dtype=float) / sigma)


_CDFS = {"uniform": uniform_cdf, "triangular": triangular_cdf, "normal": _normal_cdf}


def bin_masses(distribution: str, scale: float, step: float) -> np.ndarray:
    """Exact probability of each grid bin for a symmetric distribution centred on 0.

    Parameters
    ----------
    distribution : {'uniform', 'triangular', 'normal'}
    scale : float
        Half-width ``c`` (uniform, triangular) or σ (normal) [length].
    step : float
        Grid step ``h`` [length].

    Returns
    -------
    numpy.ndarray
        Masses of bins ``k = −m … m`` (length ``2m + 1``), bin ``k`` being
        ``[(k − ½)h, (k + ½)h)``.

    Notes
    -----
    The left half is taken from CDF differences (small numbers, no cancellation) and
    mirrored, so the right tail is as accurate as the left one.
    """
    cdf = _CDFS[distribution]
    reach = NORMAL_CUT * scale if distribution == "normal" else scale
    m = int(math.ceil(reach / step + 0.5))
    edges = (np.arange(-m, 2) - 0.5) * step  # edges of bins −m … 0
    left = np.diff(cdf(edges, scale))  # bins −m … 0
    left[-1] = 1.0 - 2.0 * float(cdf(-0.5 * step, scale))
    return np.concatenate([left, left[-2::-1]])


def _spectrum_power(spectrum: np.ndarray, power: int) -> np.ndarray:
    """``spectrum ** power`` by repeated squaring (exact for integer counts)."""
    result = None
    base = spectrum
    while power:
        if power & 1:
            result = base.copy() if result is None else result * base
        power >>= 1
        if power:
            base = base * base
    return result


@dataclass(frozen=True)
class LinearSumDistribution:
    """Distribution of a linear response: grid masses of the bounded part plus a normal part.

    Attributes
    ----------
    mean : float
        Centre of the distribution (response at nominals plus any mean shift) [response].
    normal_sigma : float
        σ of the part kept as an exact normal (0 when it is on the grid) [response].
    step : float
        Grid step ``h`` [response] (0 for a point mass).
    masses : numpy.ndarray
        Probability at ``mean + k·h``, ``k = −m … m``.
    """

    mean: float
    normal_sigma: float
    step: float
    masses: np.ndarray

    @property
    def half_points(self) -> int:
        """Grid points on each side of the centre point."""
        return (len(self.masses) - 1) // 2

    @property
    def offsets(self) -> np.ndarray:
        """Grid points relative to :attr:`mean` [response]."""
        m = self.half_points
        return np.arange(-m, m + 1) * self.step

    def _tail(self, x: float, upper: bool) -> float:
        if self.normal_sigma > 0:
            keep = self.masses > 0
            pts = self.mean + self.offsets[keep]
            z = (pts - x) / self.normal_sigma if upper else (x - pts) / self.normal_sigma
            return float(np.sum(self.masses[keep] * special.ndtr(z)))
        if self.step == 0:
            return float(self.mean > x) if upper else float(self.mean < x)
        # linear interpolation of the cumulative bin masses between bin edges
        m = self.half_points
        pos = (x - self.mean) / self.step + m + 0.5  # edge index: edge j is below bin j
        if upper:
            cum = np.concatenate([np.cumsum(self.masses[::-1])[::-1], [0.0]])  # P(y > edge j)
            fill = (1.0, 0.0)
        else:
            cum = np.concatenate([[0.0], np.cumsum(self.masses)])  # P(y < edge j)
            fill = (0.0, 1.0)
        if pos <= 0:
            return fill[0]
        if pos >= len(self.masses):
            return fill[1]
        j = int(math.floor(pos))
        w = pos - j
        return float((1.0 - w) * cum[j] + w * cum[j + 1])

    def cdf(self, x: float) -> float:
        """``P(y < x)``."""
        return self._tail(float(x), upper=False)

    def sf(self, x: float) -> float:
        """``P(y > x)``, computed directly (no ``1 − cdf``)."""
        return self._tail(float(x), upper=True)

    def fallout(self, lower: float | None = None, upper: float | None = None) -> tuple[float, float]:
        """``(P(y < lower), P(y > upper))``; a missing limit contributes 0."""
        below = 0.0 if lower is None else self.cdf(lower)
        above = 0.0 if upper is None else self.sf(upper)
        return below, above

    def bin_probabilities(self, edges: ArrayLike) -> np.ndarray:
        """Probability of each interval ``[edges[j], edges[j+1])`` (for plotting densities).

        The normal part is put on the grid (its exact bin masses, convolved with the
        bounded part; a grid finer than ``σ_N/4000`` is first merged to that step), and
        the cumulative masses are interpolated linearly between grid edges; accurate to
        the grid's ``O(h²)``, not to the tails' relative accuracy of :meth:`cdf` and
        :meth:`sf`.
        """
        from scipy import signal

        edges = np.asarray(edges, dtype=float)
        if self.step == 0:
            if self.normal_sigma > 0:
                return np.diff(special.ndtr((edges - self.mean) / self.normal_sigma))
            return np.diff((edges > self.mean).astype(float))
        masses, step = self.masses, self.step
        first = self.mean - self.half_points * step  # position of masses[0]
        if self.normal_sigma > 0:
            # a grid much finer than the normal part needs is merged into groups first
            # (each at its centre: an error of second order in the group width)
            group = max(1, int(self.normal_sigma / (DENSITY_STEPS_PER_SIGMA * step)))
            if group > 1:
                pad = (-len(masses)) % group
                masses = np.concatenate([masses, np.zeros(pad)]).reshape(-1, group).sum(axis=1)
                first += 0.5 * (group - 1) * step
                step *= group
            kernel = bin_masses("normal", self.normal_sigma, step)
            masses = np.clip(signal.fftconvolve(masses, kernel), 0.0, None)
            first -= (len(kernel) - 1) // 2 * step
        grid = first + (np.arange(len(masses) + 1) - 0.5) * step
        cumulative = np.concatenate([[0.0], np.cumsum(masses)])
        return np.diff(np.interp(edges, grid, cumulative, left=0.0, right=cumulative[-1]))


def linear_sum_distribution(
    coefficients: ArrayLike,
    counts: ArrayLike,
    tolerances: ArrayLike,
    distributions: Sequence[str],
    sigma_factors: ArrayLike,
    *,
    mean: float = 0.0,
    bulk_points: int = BULK_POINTS,
    steps_per_sigma: int = STEPS_PER_SIGMA,
    max_points: int = MAX_POINTS,
    step: float | None = None,
) -> LinearSumDistribution:
    """Exact (numerically convolved) distribution of ``y = mean + Σ a_i · Σ_j d_ij``.

    Parameters
    ----------
    coefficients : array_like
        Chain coefficients ``a_i`` [response/length].
    counts : array_like of int
        Independent identical instances per assembly [-].
    tolerances : array_like
        ± tolerances ``t_i`` [length].
    distributions : sequence of {'normal', 'uniform', 'triangular'}
        Deviation ``d_ij`` of each instance: normal with σ = ``sigma_factor · t``,
        uniform or symmetric triangular on ``±t``.
    sigma_factors : array_like
        σ/t per contributor (used for normal contributors only) [-].
    mean : float
        Response when every deviation is 0 (nominal plus any mean shift) [response].
    bulk_points, steps_per_sigma, max_points : int
        Grid resolution: at least ``bulk_points`` steps across the bounded part and
        ``steps_per_sigma`` steps per σ of the normal part, at most ``max_points``.
    step : float, optional
        Grid step ``h`` to use instead of the one the resolution arguments give [response]
        (still at least ``2·c/max_points`` for a bounded part of half-width ``c``). Held
        fixed, it makes the result a smooth function of the tolerances, as finite
        differences need.

    Returns
    -------
    LinearSumDistribution

    Notes
    -----
    Characteristic functions multiply for sums of independent variables; on the grid
    this is the product of the discrete Fourier transforms of the bin masses, each
    raised to its ``count``. The normal part ``N(0, σ_N²)`` is kept analytic and
    applied as ``P(y > u) = Σ_k q_k Φ((μ + k h − u)/σ_N)``. The bin rounding adds about
    ``h²/12`` of variance per instance, so the error is ``O(h²)``.

    References
    ----------
    .. [1] Cooley, J. W. and Tukey, J. W. (1965). An algorithm for the machine calculation
       of complex Fourier series. Mathematics of Computation 19(90), 297-301.
    .. [2] Feller, W. (1971). An Introduction to Probability Theory and Its Applications,
       Vol. 2, 2nd ed. Wiley, ch. XV (characteristic functions of sums).

    Examples
    --------
    >>> d = linear_sum_distribution([1, 1], [1, 1], [0.5, 0.5], ["uniform"] * 2, [0, 0])
    >>> round(d.cdf(-0.5), 9)  # two uniforms on ±0.5: triangular on ±1, P(y < −0.5) = 1/8
    0.125
    """
    a = np.abs(np.asarray(coefficients, dtype=float))
    n = np.asarray(counts, dtype=int)
    t = np.asarray(tolerances, dtype=float)
    f = np.asarray(sigma_factors, dtype=float)
    kinds = np.asarray(list(distributions))
    normal = kinds == "normal"
    normal_var = float(np.sum(n[normal] * (a[normal] * f[normal] * t[normal]) ** 2))
    normal_sigma = math.sqrt(normal_var)

    # bounded items, identical (kind, half-width) merged into one count
    items: dict[tuple[str, float], int] = {}
    for kind, width, count in zip(kinds[~normal], (a * t)[~normal], n[~normal]):
        if width > 0 and count > 0:
            items[(str(kind), float(width))] = items.get((str(kind), float(width)), 0) + int(count)
    bounded_half = sum(w * c for (_, w), c in items.items())

    if bounded_half == 0:
        return LinearSumDistribution(float(mean), normal_sigma, 0.0, np.ones(1))

    if step is None:
        step = 2.0 * bounded_half / bulk_points
        if normal_sigma > 0:
            step = min(step, normal_sigma / steps_per_sigma)
    step = max(float(step), 2.0 * bounded_half / max_points)
    if 0 < normal_sigma < MIN_STEPS_PER_SIGMA * step:
        # the normal part is too narrow to smooth the grid: put it on the grid as well
        items[("normal", normal_sigma)] = 1
        normal_sigma = 0.0

    masses = {key: bin_masses(key[0], key[1], step) for key in items}
    total_half = sum((len(q) - 1) // 2 * items[key] for key, q in masses.items())
    size = fft.next_fast_len(2 * total_half + 1, real=True)
    spectrum = None
    for key, q in masses.items():
        m = (len(q) - 1) // 2
        buffer = np.zeros(size)
        buffer[: m + 1] = q[m:]  # centre the bins on index 0 (circular layout)
        buffer[size - m :] = q[:m]
        part = _spectrum_power(fft.rfft(buffer), items[key])
        spectrum = part if spectrum is None else spectrum * part
    circular = fft.irfft(spectrum, size)
    q = np.concatenate([circular[size - total_half :], circular[: total_half + 1]])
    # FFT round-off leaves ±1e-18 noise where the true mass is 0: no negative masses,
    # nothing outside the support
    q = np.clip(q, 0.0, None)
    reach = bounded_half + step + (NORMAL_CUT * math.sqrt(normal_var) if normal_sigma == 0 else 0.0)
    outside = np.abs(np.arange(-total_half, total_half + 1)) * step > reach + step
    q[outside] = 0.0
    return LinearSumDistribution(float(mean), normal_sigma, step, q)


def band_fallout(
    distribution: LinearSumDistribution,
    nominal: float,
    delta: float,
    lower: float | None = None,
    upper: float | None = None,
) -> tuple[float, float, float]:
    """Exact fallout with the mean at the worse end of ``[ȳ − δ, ȳ + δ]``.

    Parameters
    ----------
    distribution : LinearSumDistribution
        The response's distribution (its own ``mean`` is ignored: the centre is set here).
    nominal : float
        ``ȳ``, the response at the nominals [response].
    delta : float
        Half-width ``δ ≥ 0`` of the band the mean may sit in (the mean-shift band,
        ``Σ n|a| m t``; 0 without mean shifts) [response].
    lower, upper : float or None
        Requirement limits [response].

    Returns
    -------
    (below, above, mean) : (float, float, float)
        ``P(y < L)`` and ``P(y > U)`` at the worse end, and that end [response].

    Notes
    -----
    Uniform, triangular and normal densities are log-concave, and so is their
    convolution; the probability of the interval ``[L, U]`` is then a log-concave,
    hence unimodal, function of the mean (Prékopa 1973), so the fallout is largest at an
    end of the band, as for a normal response.

    References
    ----------
    .. [1] Prékopa, A. (1973). On logarithmic concave measures and functions. Acta
       Scientiarum Mathematicarum (Szeged) 34, 335-343.

    Examples
    --------
    >>> d = linear_sum_distribution([1, 1], [1, 1], [0.5, 0.5], ["uniform"] * 2, [0, 0])
    >>> below, above, mean = band_fallout(d, 0.0, 0.25, -1.0, 0.75)
    >>> round(above, 9), mean  # triangular on ±1 centred at 0.25: P(y > 0.75) = 0.5²/2
    (0.125, 0.25)
    """
    from dataclasses import replace

    centres = [nominal] if not delta > 0 else [nominal - delta, nominal + delta]
    best = None
    for mu in centres:
        below, above = replace(distribution, mean=float(mu)).fallout(lower, upper)
        if best is None or below + above > best[0] + best[1]:
            best = (below, above, float(mu))
    return best


def characteristic_function(
    omega: ArrayLike,
    coefficients: ArrayLike,
    counts: ArrayLike,
    tolerances: ArrayLike,
    distributions: Sequence[str],
    sigma_factors: ArrayLike,
) -> np.ndarray:
    """Characteristic function ``E[cos(ω D)]`` of the centred response ``D = Σ a_i Σ_j d_ij``.

    Parameters as :func:`linear_sum_distribution`; ``omega`` [1/response].

    Returns
    -------
    numpy.ndarray
        Real (every part is symmetric): ``exp(−σ_N² ω²/2) · Π sinc(c ω)^n · Π sinc(c ω/2)^{2n}``
        for the normal part, the uniforms on ``±c`` and the triangulars on ``±c`` (two
        uniforms on ``±c/2``), ``sinc(x) = sin(x)/x``.
    """
    w = np.asarray(omega, dtype=float)
    a = np.abs(np.asarray(coefficients, dtype=float))
    n = np.asarray(counts, dtype=float)
    t = np.asarray(tolerances, dtype=float)
    f = np.asarray(sigma_factors, dtype=float)
    out = np.ones_like(w)
    var = 0.0
    for ai, ni, ti, kind, fi in zip(a, n, t, distributions, f):
        c = ai * ti
        if c == 0 or ni == 0:
            continue
        if kind == "normal":
            var += ni * (c * fi) ** 2
        elif kind == "uniform":
            out = out * np.sinc(c * w / math.pi) ** ni  # numpy's sinc is sin(πx)/(πx)
        else:
            out = out * np.sinc(c * w / (2.0 * math.pi)) ** (2.0 * ni)
    return out * np.exp(-0.5 * var * w * w)


def inversion_sf(
    u: float,
    coefficients: ArrayLike,
    counts: ArrayLike,
    tolerances: ArrayLike,
    distributions: Sequence[str],
    sigma_factors: ArrayLike,
) -> float:
    """``P(D > u)`` of the centred response by inverting its characteristic function.

    An evaluation independent of the grid of :func:`linear_sum_distribution` (no grid, no
    FFT): the convolution model re-checks its answer with it.

    Parameters
    ----------
    u : float
        Distance above the centre [response].
    coefficients, counts, tolerances, distributions, sigma_factors
        As :func:`linear_sum_distribution`.

    Returns
    -------
    float
        ``P(D > u)`` [-]; absolute error about 1e-16 (so ~1e-7 relative at 1e-9).

    Notes
    -----
    Gil-Pelaez inversion for a symmetric ``D`` with real characteristic function ``φ``:

    .. math:: P(D > u) = \\frac12 − \\frac1π \\int_0^∞ \\frac{\\sin(uω)}{ω} φ(ω)\\,dω,

    by adaptive quadrature on ``[0, 500/u]`` and QUADPACK's Fourier-integral rule (QAWF,
    :func:`scipy.integrate.quad` with ``weight='sin'``) beyond.

    References
    ----------
    .. [1] Gil-Pelaez, J. (1951). Note on the inversion theorem. Biometrika 38(3-4), 481-482.
    .. [2] Piessens, R., de Doncker-Kapenga, E., Überhuber, C. W. and Kahaner, D. K. (1983).
       QUADPACK: A Subroutine Package for Automatic Integration. Springer.

    Examples
    --------
    >>> round(inversion_sf(0.5, [1, 1], [1, 1], [0.5, 0.5], ["uniform"] * 2, [0, 0]), 9)
    0.125
    """
    return _inversion(u, coefficients, counts, tolerances, distributions, sigma_factors)[0]


def _inversion(u, coefficients, counts, tolerances, distributions, sigma_factors) -> tuple[float, float]:
    """:func:`inversion_sf` and the quadrature's own error estimate (absolute)."""
    import warnings

    from scipy import integrate

    u = float(u)
    if u == 0:
        return 0.5, 0.0
    if u < 0:
        value, error = _inversion(-u, coefficients, counts, tolerances, distributions, sigma_factors)
        return 1.0 - value, error
    args = (coefficients, counts, tolerances, distributions, sigma_factors)
    phi = lambda w: float(characteristic_function(w, *args))  # noqa: E731
    reach = 500.0 / u
    with warnings.catch_warnings():  # its accuracy is judged by the caller's comparison
        warnings.simplefilter("ignore", integrate.IntegrationWarning)
        head, head_error = integrate.quad(lambda w: (math.sin(u * w) / w if w > 0 else u) * phi(w), 0.0,
                                          reach, limit=2000, epsabs=1e-16, epsrel=1e-13)[:2]
        tail, tail_error = integrate.quad(lambda w: phi(w) / w, reach, np.inf, weight="sin", wvar=u,
                                          limlst=200, epsabs=1e-16)[:2]
    value = min(max(0.5 - (head + tail) / math.pi, 0.0), 1.0)
    return value, (head_error + tail_error) / math.pi


def uniform_sum_sf(u: float, half_widths: Sequence[float]) -> float:
    """``P(Σ_k U_k > u)`` for independent uniforms ``U_k`` on ``±c_k``, exactly.

    Parameters
    ----------
    u : float
        Distance above the centre [response].
    half_widths : sequence of float
        ``c_k > 0``, one per instance (a triangular on ``±c`` is two uniforms on ``±c/2``).

    Returns
    -------
    float
        The probability, computed in exact rational arithmetic and rounded once.

    Notes
    -----
    With ``V_k = U_k + c_k`` uniform on ``[0, w_k]``, ``w_k = 2 c_k``, and ``y = Σ c_k − u``
    (by symmetry ``P(S > u) = P(S < −u)``),

    .. math:: P\\Big(\\sum V_k ≤ y\\Big) = \\frac{1}{n!\\,\\prod w_k}
              \\sum_{J ⊆ \\{1..n\\}} (−1)^{|J|} \\Big(y − \\sum_{k∈J} w_k\\Big)_+^n,

    summed over the subsets with a positive term only (few, in a tail). The number of
    subsets grows as ``2^n``: meant for a few instances (the caller limits ``n``).

    References
    ----------
    .. [1] Bradley, D. M. and Gupta, R. C. (2002). On the distribution of the sum of n
       non-identically distributed uniform random variables. Annals of the Institute of
       Statistical Mathematics 54(3), 689-700.

    Examples
    --------
    >>> uniform_sum_sf(0.5, [0.5, 0.5])  # triangular on ±1: P(y > 0.5) = 0.5²/2
    0.125
    """
    from fractions import Fraction

    widths = sorted((2 * Fraction(float(c)) for c in half_widths if c > 0), reverse=True)
    n = len(widths)
    y = sum(widths, Fraction(0)) / 2 - Fraction(float(u))
    if n == 0:
        return float(u < 0)
    if y <= 0:
        return 0.0
    if y >= sum(widths):
        return 1.0
    total = Fraction(0)
    stack = [(0, Fraction(0), 1)]  # (next width, sum of the chosen widths, sign)
    while stack:
        k, chosen, sign = stack.pop()
        if k == n:
            total += sign * (y - chosen) ** n
            continue
        stack.append((k + 1, chosen, sign))
        if chosen + widths[k] < y:  # a subset reaching y adds nothing, nor do its supersets
            stack.append((k + 1, chosen + widths[k], -sign))
    scale = math.factorial(n)
    for w in widths:
        scale *= w
    return float(total / scale)


def uniform_halves(
    coefficients: ArrayLike, counts: ArrayLike, tolerances: ArrayLike, distributions: Sequence[str]
) -> list[float] | None:
    """Half-widths of the uniform instances of a chain without a normal part, or None.

    A uniform on ``±|a|t`` per instance, a triangular as two uniforms on ``±|a|t/2``. None
    when a normal contributor takes part or there are more than :data:`EXACT_INSTANCES`
    instances (the chain is then evaluated on the grid).
    """
    a = np.abs(np.asarray(coefficients, dtype=float))
    halves: list[float] = []
    for ai, ni, ti, kind in zip(a, np.asarray(counts, dtype=int), np.asarray(tolerances, dtype=float),
                                distributions):
        if ai == 0 or ni == 0 or ti == 0:
            continue
        if kind == "normal":
            return None
        halves += [ai * ti] * int(ni) if kind == "uniform" else [0.5 * ai * ti] * (2 * int(ni))
        if len(halves) > EXACT_INSTANCES:
            return None
    return halves


def chain_fallout(
    coefficients: ArrayLike,
    counts: ArrayLike,
    tolerances: ArrayLike,
    distributions: Sequence[str],
    sigma_factors: ArrayLike,
    nominal: float,
    delta: float,
    lower: float | None,
    upper: float | None,
    **resolution: float,
) -> tuple[float, float, float]:
    """Exact fallout of a linear chain, the mean at the worse end of ``ȳ ± δ``.

    A chain of a few uniform or triangular instances and no normal part is summed in exact
    rational arithmetic (:func:`uniform_sum_sf`); any other by the grid convolution
    (:func:`linear_sum_distribution` with the grid arguments ``resolution``: ``bulk_points``,
    ``steps_per_sigma``, ``max_points``, ``step``; then :func:`band_fallout`).

    Returns
    -------
    (below, above, mean) : (float, float, float)
        ``P(y < L)``, ``P(y > U)`` at the worse end, and that end [response].

    Examples
    --------
    >>> below, above, mean = chain_fallout([1.0], [2], [0.5], ["uniform"], [0.0], 0.0, 0.25, -1.0, 0.75)
    >>> round(above, 12), mean  # two uniforms on ±0.5 centred at 0.25: P(y > 0.75) = 0.5²/2
    (0.125, 0.25)
    """
    halves = uniform_halves(coefficients, counts, tolerances, distributions)
    if halves is None:
        dist = linear_sum_distribution(coefficients, counts, tolerances, distributions, sigma_factors,
                                       **resolution)
        return band_fallout(dist, nominal, delta, lower, upper)
    best = None
    for mu in ([nominal] if not delta > 0 else [nominal - delta, nominal + delta]):
        below = 0.0 if lower is None else uniform_sum_sf(mu - lower, halves)
        above = 0.0 if upper is None else uniform_sum_sf(upper - mu, halves)
        if best is None or below + above > best[0] + best[1]:
            best = (below, above, float(mu))
    return best
