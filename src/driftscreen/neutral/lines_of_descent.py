"""The number of ancestral lines that survive an interval of diffusion time.

In the Wright-Fisher diffusion with immigration (parameter ``theta``) the lines of
descent of an infinite sample, traced back over diffusion time ``tau``, form a pure
death process entering from infinity, with rate ``k (k + theta - 1) / 2`` at ``k``
lines (coalescence plus immigration). Its value at ``tau``, ``A_inf(tau)``, mixes the
exact transition law of the diffusion (Griffiths 1980; Tavare 1984; Ethier &
Griffiths 1993; Jenkins & Spano 2017):

    X(tau) | X(0) = x  ~  Dirichlet(theta p + L),  L | A ~ Multinomial(A, x),  A = A_inf(tau).

The pmf of ``A_inf(tau)`` is the alternating series of Griffiths (1980), used wherever
a bound on its float64 rounding error is below ``SERIES_CANCELLATION_LIMIT``, and
otherwise the normal approximation of Griffiths (1984) with a mean shift and a skewness
correction from the next orders of the system-size expansion of the death process.
Against an 80+ digit evaluation of the series, the total error is ~1e-8 for the
extended-precision series (its bound, ~1e-6, is the switch) and, for the corrected
normal, TV ~0.02 tau once E[A] >~ 20; it is largest just past the switch: TV 1.0e-3 for
theta <= 10 (E[A] ~ 27), 1.8e-3 for theta = 100 (E[A] ~ 17), 4.3e-3 for theta = 1000
(E[A] ~ 13, where A / (theta + A) ~ 1%, so the effect on the transition is small).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import Literal

import numpy as np
from scipy.special import ndtr, ndtri

SERIES_MAX_MEAN = 60.0
"""Skip the series when the Griffiths mean exceeds this (it cannot pass the bound)."""
SERIES_CANCELLATION_LIMIT = 1e-6
"""Accept the series only if its rounding-error bound, summed over m, is below this
(the bound overstates the measured error ~100 fold)."""
SERIES_TERM_FLOOR = -40.0
"""Truncate a series once its terms decrease and fall below exp(-40) in absolute value."""
SERIES_MAX_TERMS = 1 << 14
_GAUSS_LEGENDRE = np.polynomial.legendre.leggauss(64)
#: Above this variance of A (sd ~ 3000 lines) the corrected normal is drawn directly
#: rather than tabulated (a table would hold ~15 sd of entries per distinct interval).
DIRECT_NORMAL_VARIANCE = 1e7
_EXTENDED = np.longdouble


@dataclass(frozen=True)
class LinesOfDescentTable:
    """The pmf of ``A_inf(tau)`` on its support window ``offset .. offset + len(pmf) - 1``.

    Attributes
    ----------
    offset:
        Smallest tabulated number of lines.
    pmf:
        Probabilities of ``offset, offset + 1, ...``; sums to 1.
    cdf:
        Cumulative sums of ``pmf``; the last entry is exactly 1.
    method:
        ``"series"`` (Griffiths 1980, exact to rounding) or ``"normal"`` (Griffiths
        1984 with mean and skewness corrections; approximate, TV ~0.02 tau).
    """

    offset: int
    pmf: np.ndarray
    cdf: np.ndarray
    method: Literal["series", "normal"]

    @property
    def mean(self) -> float:
        return float(np.dot(self.offset + np.arange(self.pmf.size), self.pmf))


def lines_of_descent_mean_variance(theta: float, tau: float | np.ndarray
                                   ) -> tuple[float | np.ndarray, float | np.ndarray]:
    """Griffiths (1984) asymptotic mean and variance of ``A_inf(tau)``.

    With ``beta = (theta - 1) tau / 2`` and ``eta = beta / (exp(beta) - 1)``:
    ``mu = 2 eta / tau`` and ``V = (2 eta / tau) (eta + beta)^2 (1 + eta/(eta + beta)
    - 2 eta) / beta^2``, which equals ``(2 eta / tau) h(beta)`` with
    ``h(beta) = exp(beta/2) (sinh beta - beta) / (4 sinh(beta/2)^3)`` (``h(0) = 1/3``),
    the form evaluated here without cancellation.

    Parameters
    ----------
    theta:
        Immigration parameter (> 0).
    tau:
        Diffusion time (> 0), scalar or array.

    Returns
    -------
    mean, variance:
        Of the same shape as ``tau``.
    """
    tau_arr = np.asarray(tau, dtype=np.float64)
    beta = 0.5 * (theta - 1.0) * tau_arr
    eta = _eta(beta)
    mean = 2.0 * eta / tau_arr
    variance = mean * _variance_factor(beta)
    if np.ndim(tau) == 0:
        return float(mean), float(variance)
    return mean, variance


def _eta(beta: np.ndarray) -> np.ndarray:
    """``beta / (exp(beta) - 1)``, equal to 1 at ``beta = 0``."""
    beta = np.asarray(beta, dtype=np.float64)
    safe = np.where(beta == 0.0, 1.0, beta)
    with np.errstate(over="ignore"):
        return np.where(beta == 0.0, 1.0, safe / np.expm1(safe))


def _variance_factor(beta: np.ndarray) -> np.ndarray:
    """``h(beta) = V / mu`` of the Griffiths (1984) variance, stable for every beta.

    ``h = exp(beta/2) (sinh beta - beta) / (4 sinh(beta/2)^3)``; for ``|beta| < 0.1`` both
    sinh terms are replaced by their Taylor series (truncation error < 1e-15), giving
    ``h = exp(beta/2) s(beta) / (3 c(beta/2)^3)`` with ``sinh b - b = b^3 s(b) / 6`` and
    ``sinh x = x c(x)``; for ``|beta| > 1`` the original form (times ``exp(2 beta)`` when
    ``beta < 0``) has no cancellation and no overflow.
    """
    beta = np.asarray(beta, dtype=np.float64)
    out = np.empty_like(beta)
    small = np.abs(beta) < 0.1
    middle = (np.abs(beta) >= 0.1) & (np.abs(beta) <= 1.0)
    big = ~(small | middle)
    b2 = beta[small] ** 2
    h2 = b2 / 4.0
    s = 1 + b2 / 20 * (1 + b2 / 42 * (1 + b2 / 72 * (1 + b2 / 110)))
    c = 1 + h2 / 6 * (1 + h2 / 20 * (1 + h2 / 42 * (1 + h2 / 72)))
    out[small] = np.exp(beta[small] / 2) * s / (3.0 * c ** 3)
    bm = beta[middle]
    out[middle] = np.exp(bm / 2) * (np.sinh(bm) - bm) / (4.0 * np.sinh(bm / 2) ** 3)
    positive = big & (beta > 0)
    bp = beta[positive]
    out[positive] = (1.0 + np.exp(-bp) - 2.0 * _eta(bp)) / (-np.expm1(-bp)) ** 2
    negative = big & (beta < 0)
    bn = beta[negative]
    en = np.exp(bn)
    out[negative] = en * (en + 1.0 - 2.0 * _eta(bn) * en) / np.expm1(bn) ** 2
    return out


def _death_rate(lines: np.ndarray, theta: float) -> np.ndarray:
    """Rate ``k (k + theta - 1) / 2`` of losing a line at ``k`` lines."""
    return 0.5 * lines * (lines + theta - 1.0)


def corrected_normal_moments(theta: float, tau: float) -> tuple[float, float, float]:
    """Mean, variance and skewness of the corrected normal approximation of ``A_inf(tau)``.

    Mean ``mu + delta`` and variance ``V`` are the Griffiths (1984) asymptotics plus the
    next-order mean shift; the skewness is ``S / V^1.5``. With ``lam(k) = k(k+theta-1)/2``
    and ``r(u) = lam(mu(tau)) / lam(mu(u))`` (both from the system-size expansion of the
    death process, whose homogeneous solutions are powers of ``lam(mu(.))``):

        delta(tau) = - int_0^tau r(u) V(u) / 2 du                                  (-> -1/6)
        S(tau)     =   int_0^tau r(u)^3 [3 lam'(mu) V - lam(mu) - 3 V^2](u) du     (-> 2/(15 tau))

    The integrands are analytic on ``[0, tau]``; a 64-point Gauss-Legendre rule is used.
    """
    mu_tau, var_tau = lines_of_descent_mean_variance(theta, tau)
    nodes, weights = _GAUSS_LEGENDRE
    u = 0.5 * tau * (nodes + 1.0)
    mu_u, var_u = lines_of_descent_mean_variance(theta, u)
    lam_u = _death_rate(mu_u, theta)
    ratio = _death_rate(np.float64(mu_tau), theta) / lam_u
    slope_u = mu_u + 0.5 * (theta - 1.0)
    delta = -0.5 * tau * np.dot(weights, ratio * var_u / 2.0)
    third = 0.5 * tau * np.dot(weights, ratio ** 3 * (3.0 * slope_u * var_u - lam_u
                                                      - 3.0 * var_u ** 2))
    return float(mu_tau + delta), float(var_tau), float(third / var_tau ** 1.5)


def _log_rising_factorials(base: np.ndarray, length: int) -> np.ndarray:
    """``log Gamma(base + q) - log Gamma(base)`` for ``q = 0..length``, rows of ``base``.

    Cumulative sums of ``log(base + i)`` in extended precision: more accurate than a
    difference of two large lgamma values, whose float64 rounding (~eps * lgamma) would
    dominate the error of the series.
    """
    steps = np.log(base + np.arange(length, dtype=_EXTENDED)[None, :])
    zeros = np.zeros((base.shape[0], 1), dtype=_EXTENDED)
    return np.concatenate([zeros, np.cumsum(steps, axis=1)], axis=1)


def series_terms(theta: float, tau: float, n_lines: int
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool]:
    """Logs of the Griffiths (1980) terms ``b_k(m)`` for ``m = 0..n_lines - 1``.

    ``P(A = m) = sum_{k >= m} (-1)^(k-m) b_k(m)`` with
    ``b_k(m) = (2k+theta-1)/(theta+m+k-1) Gamma(theta+m+k) / (Gamma(theta+m) m! (k-m)!)
    exp(-k(k+theta-1) tau / 2)`` and ``b_0(0) = 1``, in ``numpy.longdouble``.

    Returns
    -------
    log_terms:
        Shape ``(n_lines, J)``: ``log b_{m+j}(m)``.
    signs:
        Shape ``(J,)``: ``(-1)^j``.
    log_scale:
        Shape ``(n_lines, J)``: sum of the absolute values of the pieces added into each
        log term, the cumulative log-gamma sums weighted by ``sqrt(k)`` (rounding of a
        k-term sum); ``eps * log_scale`` bounds the relative rounding error of the term.
    complete:
        True if every row has passed its peak and ends below ``exp(SERIES_TERM_FLOOR)``,
        so that the alternating-series bound applies to the omitted tail.
    """
    theta_x, tau_x = _EXTENDED(theta), _EXTENDED(tau)
    m = np.arange(n_lines, dtype=_EXTENDED)[:, None]
    n_terms = int(np.ceil(np.sqrt(2.0 * (abs(SERIES_TERM_FLOOR) + 50.0) / tau))) + 8
    while True:
        j = np.arange(n_terms, dtype=_EXTENDED)[None, :]
        k = m + j
        log_factorials = _log_rising_factorials(np.ones((1, 1), dtype=_EXTENDED),
                                                n_lines + n_terms)[0]
        rising = np.take_along_axis(_log_rising_factorials(theta_x + m, n_lines + n_terms),
                                    k.astype(np.int64), axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            pieces = (np.log(2 * k + theta_x - 1), -np.log(theta_x + m + k - 1), rising,
                      -log_factorials[m.astype(np.int64)], -log_factorials[j.astype(np.int64)],
                      -k * (k + theta_x - 1) * tau_x / 2)
            log_terms = sum(pieces)
            log_scale = sum(np.abs(piece) for piece in pieces) + np.sqrt(k) * (
                np.abs(rising) + log_factorials[m.astype(np.int64)]
                + log_factorials[j.astype(np.int64)])
        log_terms[0, 0] = 0.0
        log_scale[0, 0] = 0.0
        tail = log_terms[:, -3:]
        complete = bool(np.all(tail[:, -1] < SERIES_TERM_FLOOR)
                        and np.all(np.diff(tail, axis=1) < 0.0))
        if complete or n_terms >= SERIES_MAX_TERMS:
            signs = np.where(np.arange(n_terms) % 2 == 0, 1.0, -1.0).astype(_EXTENDED)
            return log_terms, signs, log_scale, complete
        n_terms *= 2


def series_pmf(theta: float, tau: float, n_lines: int) -> tuple[np.ndarray, float]:
    """Griffiths (1980) series for ``P(A_inf(tau) = m)``, ``m = 0..n_lines - 1``.

    Summed in ``numpy.longdouble`` (80-bit on x86-64: eps 1.1e-19; plain float64
    elsewhere, where the bound below simply refuses the series sooner), each row after
    subtracting its largest log term. Returns the raw (unclipped, unnormalised) float64
    probabilities and a bound on their total rounding error,
    ``eps sum_m sum_k |b_k(m)| (4 + log_scale_k(m))`` plus the final rounding to float64;
    ``inf`` if the series could not be truncated safely.
    """
    log_terms, signs, log_scale, complete = series_terms(theta, tau, n_lines)
    row_max = log_terms.max(axis=1, keepdims=True)
    scaled = np.exp(log_terms - row_max)
    scale = np.exp(row_max[:, 0])
    probabilities = (scale * (scaled @ signs)).astype(np.float64)
    error = np.sum(scale * np.sum(scaled * (4 + log_scale), axis=1))
    bound = float(np.finfo(_EXTENDED).eps * error
                  + np.finfo(np.float64).eps * np.sum(np.abs(probabilities)))
    return probabilities, (bound if complete and np.isfinite(bound) else np.inf)


def _series_table(theta: float, tau: float, tol: float) -> LinesOfDescentTable | None:
    """The series table, or None if its rounding-error bound refuses it."""
    mean, variance = lines_of_descent_mean_variance(theta, tau)
    if mean > SERIES_MAX_MEAN:
        return None
    n_lines = int(np.ceil(mean + 12.0 * np.sqrt(variance) + 12.0))
    while True:
        probabilities, bound = series_pmf(theta, tau, n_lines)
        if bound >= SERIES_CANCELLATION_LIMIT:
            return None
        if probabilities[-1] < tol * 1e-3 or n_lines > 4 * SERIES_MAX_MEAN + 100:
            break
        n_lines *= 2
    pmf = np.clip(probabilities, 0.0, None)
    return _table_from_pmf(0, pmf, tol, "series")


def _normal_table(theta: float, tau: float, tol: float) -> LinesOfDescentTable:
    """Mean- and skew-corrected normal table (inverse Cornish-Fisher on the cdf).

    ``P(A <= m) ~= Phi(w - g (w^2 - 1) / 6)`` with ``w = (m + 1/2 - mean) / sd``. The
    continuous approximant gets variance ``V - 1/12`` (Sheppard's correction for
    grouping), so that after rounding to integers the variance is ``V``; against the
    exact series this lowers the TV distance by about a quarter (e.g. 9.8e-4 -> 7.6e-4 at
    theta = 10, tau = 0.05).
    """
    mean, variance, skew = corrected_normal_moments(theta, tau)
    sd = np.sqrt(max(variance - 1.0 / 12.0, 0.5 * variance))
    reach = (float(ndtri(1.0 - tol / 4.0)) + 2.0) * (1.0 + abs(skew))
    low = max(0, int(np.floor(mean - reach * sd)))
    high = int(np.ceil(mean + reach * sd)) + 1
    lines = np.arange(low, high + 1, dtype=np.float64)
    w = (lines + 0.5 - mean) / sd
    cdf = np.maximum.accumulate(ndtr(w - skew * (w * w - 1.0) / 6.0))
    cdf[-1] = 1.0
    pmf = np.diff(cdf, prepend=0.0)
    return _table_from_pmf(low, pmf, tol, "normal")


def _table_from_pmf(offset: int, pmf: np.ndarray, tol: float,
                    method: Literal["series", "normal"]) -> LinesOfDescentTable:
    """Trim negligible ends (total mass below ``tol``), renormalise, freeze."""
    cumulative = np.cumsum(pmf)
    total = cumulative[-1]
    first = int(np.searchsorted(cumulative, 0.5 * tol * total, side="right"))
    tail = total - cumulative
    last = int(np.searchsorted(-tail, -0.5 * tol * total, side="left"))
    last = max(first, min(last, pmf.size - 1))
    kept = pmf[first:last + 1] / pmf[first:last + 1].sum()
    cdf = np.cumsum(kept)
    cdf[-1] = 1.0
    kept.setflags(write=False)
    cdf.setflags(write=False)
    return LinesOfDescentTable(offset + first, kept, cdf, method)


@lru_cache(maxsize=1024)
def lines_of_descent_table(theta: float, tau: float, tol: float = 1e-12
                           ) -> LinesOfDescentTable:
    """Tabulated law of ``A_inf(tau)`` (cached per distinct ``(theta, tau, tol)``).

    Uses the Griffiths (1980) series whenever its float64 rounding-error bound is below
    ``SERIES_CANCELLATION_LIMIT`` (exact to ~1e-8), and otherwise the corrected normal
    approximation (Griffiths 1984; TV distance ~0.02 tau once E[A] >~ 20).
    Both ends are trimmed to total mass below ``tol``.
    """
    theta, tau = float(theta), float(tau)
    if not (np.isfinite(theta) and theta > 0):
        raise ValueError(f"theta must be positive and finite, got {theta}")
    if not (np.isfinite(tau) and tau > 0):
        raise ValueError(f"tau must be positive and finite, got {tau}")
    table = _series_table(theta, tau, tol)
    return table if table is not None else _normal_table(theta, tau, tol)


def lines_of_descent_pmf(theta: float, tau: float, *, tol: float = 1e-12) -> np.ndarray:
    """pmf of ``A_inf(tau)`` (Griffiths 1980) over ``m = 0..M``; sums to 1.

    The alternating series when its rounding-error bound allows it, else the mean- and
    skew-corrected normal approximation (Griffiths 1984). Mass below ``tol`` is trimmed
    from both ends; entries below the window are zero.
    """
    table = lines_of_descent_table(theta, tau, tol)
    return np.concatenate([np.zeros(table.offset), table.pmf])


@dataclass(frozen=True)
class CorrectedNormal:
    """The corrected normal law of ``A_inf(tau)``, drawn directly instead of tabulated.

    For very large numbers of lines (tiny tau: a huge theta with a short interval) a
    table would need millions of entries per interval. The same inverse Cornish-Fisher
    approximation as :func:`_normal_table` is then inverted in closed form: with
    ``z = Phi^-1(U)``, ``w`` solves ``w - g (w^2 - 1) / 6 = z`` and
    ``A = ceil(mean - 1/2 + sd w)`` is the smallest ``m`` with ``P(A <= m) >= U``.
    """

    mean: float
    sd: float
    skew: float

    def draw(self, size: int, rng: np.random.Generator) -> np.ndarray:
        z = ndtri(rng.random(size))
        g = self.skew / 6.0
        if abs(g) < 1e-12:
            w = z
        else:
            w = (1.0 - np.sqrt(np.maximum(1.0 - 4.0 * g * (z - g), 0.0))) / (2.0 * g)
        lines = np.ceil(self.mean - 0.5 + self.sd * w)
        return np.maximum(lines, 0.0).astype(np.int64)


def lines_of_descent_law(theta: float, tau: float, tol: float = 1e-12
                         ) -> LinesOfDescentTable | CorrectedNormal:
    """A table of ``A_inf(tau)``, or its corrected normal law when that table would be huge."""
    if lines_of_descent_mean_variance(float(theta), float(tau))[1] <= DIRECT_NORMAL_VARIANCE:
        return lines_of_descent_table(theta, tau, tol)
    mean, variance, skew = corrected_normal_moments(float(theta), float(tau))
    return CorrectedNormal(mean, float(np.sqrt(variance - 1.0 / 12.0)), skew)


class LinesOfDescentSampler:
    """Draws ``A_inf(tau_j)`` for a fixed ``theta`` and a list of intervals ``tau_j``.

    The law of each distinct interval length (exact float equality) is prepared once:
    a table sampled by inverse cdf (``searchsorted``), or for very large numbers of lines
    the corrected normal drawn in closed form (:class:`CorrectedNormal`).

    Parameters
    ----------
    theta:
        Immigration parameter.
    taus:
        Diffusion time of every interval, shape ``(J,)``.
    """

    def __init__(self, theta: float, taus: np.ndarray, *, tol: float = 1e-12) -> None:
        taus = np.asarray(taus, dtype=np.float64).ravel()
        distinct, self._table_of_interval = np.unique(taus, return_inverse=True)
        self.theta = float(theta)
        self.tables = tuple(lines_of_descent_law(self.theta, float(t), tol) for t in distinct)

    def draw(self, interval_index: int, size: int, rng: np.random.Generator) -> np.ndarray:
        """``size`` independent draws of ``A`` for interval ``interval_index`` (int64)."""
        table = self.tables[self._table_of_interval[interval_index]]
        if isinstance(table, CorrectedNormal):
            return table.draw(size, rng)
        if table.pmf.size == 1:
            return np.full(size, table.offset, dtype=np.int64)
        positions = np.searchsorted(table.cdf, rng.random(size), side="right")
        return positions.astype(np.int64) + table.offset
