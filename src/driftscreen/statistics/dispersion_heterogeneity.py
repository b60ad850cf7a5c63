"""``dispersion_heterogeneity``: do all taxa share one immigration parameter theta?

Basis. Under the neutral model the stationary community is Dirichlet(theta p) (Hubbell
2001, *The Unified Neutral Theory of Biodiversity and Biogeography*; Etienne 2005, Ecol.
Lett. 8), so every taxon's reads in a sample of depth n_t are
N_it ~ BetaBinomial(n_t, theta p_i, theta (1 - p_i)) with one theta for all taxa: every
taxon is overdispersed relative to the multinomial by the same factor
(theta + n_t)/(theta + 1). Niche structure (taxa with their own stabilising or
destabilising dynamics) gives taxon-specific dispersion. The statistic is the likelihood
ratio of taxon-specific theta_i against one common theta,

    LR = 2 (sum_i max_{theta_i} l_i(theta_i) - max_theta sum_i l_i(theta)),

where l_i is the beta-binomial composite log-likelihood of taxon i over the samples
(treated as independent; Lindsay 1988, Contemp. Math. 80, "Composite likelihood
methods"), with p_i fixed at the precision-weighted mean relative abundance given the
fitted theta (the fitted p when depths are equal; see
:func:`driftscreen.statistics.stationary_divergence.precision_weighted_composition`).
Taxa with p_i = 0 (absent) are left out.

Fixing p_i is what keeps the statistic cheap, and it has a price: for rare taxa the
error of the estimated p_i is partly absorbed by theta_i, so their LR share under
neutrality is well above the chi-square(1) mean of 1 (about 2-4 for theta p_i < 1 in a
snapshot check, against ~1 when p_i is also profiled) and depends on theta. The
parametric bootstrap calibrates this, but the statistic is not pivotal.

Computation. theta = c theta_0 with a per-table pilot theta_0: the pooled,
sampling-corrected moment estimate with the samples treated as independent (around that
p), which is what the composite likelihood itself estimates, autocorrelation
included. Every l_i is evaluated on the grid c = 2^-s, ..., 2^s (s = ``log2_span``;
theta_i is bounded to that range around the pilot). Both maxima are refined between grid
points by the curve f + alpha log c - beta c through the best grid point and its two
neighbours (see :func:`refine_maximum`), and each taxon's share of LR is twice its own
maximum minus its value at the common maximiser, clipped at 0.

Cost. Per grid point and count cell, one pass for lgamma(N + a) and one for
lgamma(n - N + b): counts below 32 enter exactly through per-taxon histograms and sums
of logs, larger ones through Stirling's series (error below 1e-7 per cell); the term
lgamma(a + b + n_t) - lgamma(a + b) is shared by all taxa (a + b = theta for every taxon).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd
from scipy import special

from driftscreen.dataset import Design
from driftscreen.neutral.model import NeutralModel, NullFit
from driftscreen.statistics.base import Alternative
from driftscreen.statistics.stationary_divergence import (
    precision_weighted_composition,
    single_fit,
)

#: Bounds of the pilot v = 1/(1 + theta_0).
PILOT_V_RANGE = (1e-7, 1.0 - 1e-7)
#: Read numbers below this enter the log-likelihood exactly; larger ones through Stirling.
EXACT_BELOW = 32
HALF_LOG_TWO_PI = 0.5 * np.log(2.0 * np.pi)


@dataclass(frozen=True)
class DispersionFit:
    """Per-table and per-taxon results, shapes ``(R,)`` and ``(R, K)``."""

    theta_common: np.ndarray
    theta_taxon: np.ndarray
    at_grid_edge: np.ndarray
    contribution: np.ndarray
    used: np.ndarray


@dataclass(frozen=True)
class DispersionHeterogeneity:
    """Likelihood ratio of taxon-specific theta_i against one common theta.

    Attributes
    ----------
    log2_span:
        The grid of multipliers of the pilot theta runs over 2^-log2_span .. 2^log2_span.
    """

    name: ClassVar[str] = "dispersion_heterogeneity"
    needs_time: ClassVar[bool] = False
    alternative: ClassVar[Alternative] = "greater"
    marginal: ClassVar[bool] = True

    log2_span: int = 3

    def compute(self, counts: np.ndarray, design: Design, fit: NullFit,
                rng: np.random.Generator) -> np.ndarray:
        """LR statistic per table, shape ``(R,)``; NaN with fewer than two usable taxa."""
        result = self.fit_dispersion(counts, design, fit)
        enough = np.count_nonzero(result.used, axis=1) >= 2
        return np.where(enough, result.contribution.sum(axis=1), np.nan)

    def fit_dispersion(self, counts: np.ndarray, design: Design, fit: NullFit) -> DispersionFit:
        """Common and taxon-specific theta on the grid, and each taxon's share of LR."""
        counts = np.asarray(counts)
        depths = design.depths.astype(np.float64)
        composition = precision_weighted_composition(counts, depths, fit.theta)
        used = (composition > 0) & (composition < 1)
        p = np.where(used, composition, 0.5)
        pilot = pilot_theta(counts, depths, composition)
        multipliers = 2.0 ** np.arange(-self.log2_span, self.log2_span + 1)
        loglik = grid_loglik(summarise_counts(counts, design.depths), p, pilot, multipliers)
        loglik = np.where(used[..., None], loglik, 0.0)
        taxon_index = np.argmax(loglik, axis=-1)
        taxon_c, taxon_best = refine_maximum(loglik, taxon_index, multipliers)
        total = loglik.sum(axis=1)
        common_index = np.argmax(total, axis=-1)
        common_c, _ = refine_maximum(total, common_index, multipliers)
        at_common = interpolant_at(loglik, common_index[:, None], multipliers,
                                   common_c[:, None])
        contribution = np.where(used, np.maximum(2.0 * (taxon_best - at_common), 0.0), 0.0)
        at_edge = used & ((taxon_index == 0) | (taxon_index == multipliers.size - 1))
        return DispersionFit(pilot * common_c, np.where(used, pilot[:, None] * taxon_c, np.nan),
                             at_edge, contribution, used)

    def diagnose(self, counts: np.ndarray, design: Design, model: NeutralModel,
                 rng: np.random.Generator) -> pd.DataFrame:
        """Per taxon: p used, its own theta_i, the common theta and its share of the LR.

        Rows sorted by decreasing contribution; ``taxon`` is the column index in
        ``counts``; ``at_grid_edge`` marks theta_i bounded by the grid.
        """
        counts = np.asarray(counts)
        result = self.fit_dispersion(counts[None], design, single_fit(model))
        table = pd.DataFrame({
            "taxon": np.arange(counts.shape[1]),
            "p": precision_weighted_composition(counts[None], design.depths.astype(np.float64),
                                               np.array([model.theta]))[0],
            "theta_taxon": result.theta_taxon[0],
            "theta_common": np.full(counts.shape[1], result.theta_common[0]),
            "at_grid_edge": result.at_grid_edge[0],
            "lr_contribution": result.contribution[0],
        })[result.used[0]]
        return table.sort_values("lr_contribution", ascending=False, kind="stable"
                                 ).reset_index(drop=True)


def pilot_theta(counts: np.ndarray, depths: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Moment estimate of theta with independent samples around ``p``, shape ``(R,)``.

    Stationary Var Y_it = pi_i (v + (1 - v)/n_t), pi_i = p_i (1 - p_i) (design note,
    section 2), so Q = sum_it (Y_it - p_i)^2 has E[Q] = Pi (T v + (1 - v) S) with
    Pi = sum_i pi_i and S = sum_t 1/n_t; solved for v = 1/(1 + theta).
    """
    relative = counts / depths[:, None]
    n_samples = depths.size
    squares = np.einsum("rtk,rtk->r", relative, relative)
    cross = np.einsum("rtk,rk->r", relative, p)
    q = squares - 2.0 * cross + n_samples * np.sum(p * p, axis=1)
    pi_sum = np.sum(p * (1.0 - p), axis=1)
    s = np.sum(1.0 / depths)
    with np.errstate(divide="ignore", invalid="ignore"):
        v = (q / pi_sum - s) / (n_samples - s)
    v = np.clip(np.nan_to_num(v, nan=PILOT_V_RANGE[1]), *PILOT_V_RANGE)
    return 1.0 / v - 1.0


@dataclass(frozen=True)
class CountSummary:
    """Counts arranged for fast sums over samples of lgamma(m + s) - lgamma(s).

    Here m is N (reads of the taxon) or n - N (reads of the rest). Values m below
    ``EXACT_BELOW`` enter through their histogram per taxon (exact sums of logs); larger
    ones through Stirling's series at m + s. Cells with small m are clamped up to
    ``EXACT_BELOW`` so that every cell goes through one vectorised pass, and their
    Stirling value is subtracted again per taxon.
    """

    depths: np.ndarray                          # (T,)
    clamped: tuple[np.ndarray, np.ndarray]      # (R, T, K) max(m, EXACT_BELOW), m = N, n - N
    clamped_sum: tuple[np.ndarray, np.ndarray]  # (R, K) sums over samples of the above
    histogram: tuple[np.ndarray, np.ndarray]    # (R, K, EXACT_BELOW + 1) #{t: m = j}, j < E;
                                                # last bin #{t: m >= EXACT_BELOW}
    scratch: tuple[np.ndarray, np.ndarray]      # (R, T, K) work space, reused per evaluation


def summarise_counts(counts: np.ndarray, depths: np.ndarray) -> CountSummary:
    """The :class:`CountSummary` of a batch ``(R, T, K)`` with depths ``(T,)``."""
    reads = np.asarray(counts, dtype=np.int64)
    rest = depths.astype(np.int64)[:, None] - reads
    clamped = tuple(np.maximum(m, EXACT_BELOW).astype(np.float64) for m in (reads, rest))
    return CountSummary(depths.astype(np.float64), clamped,
                        tuple(c.sum(axis=1) for c in clamped),
                        tuple(_small_value_histogram(m) for m in (reads, rest)),
                        (np.empty(reads.shape), np.empty(reads.shape)))


def _small_value_histogram(values: np.ndarray) -> np.ndarray:
    """#{t: values = j} for j < EXACT_BELOW and #{t: values >= EXACT_BELOW}, ``(R, K, B)``."""
    n_rep, _, n_taxa = values.shape
    bins = EXACT_BELOW + 1
    cell = (np.arange(n_rep)[:, None, None] * n_taxa + np.arange(n_taxa)) * bins
    index = cell + np.minimum(values, EXACT_BELOW)
    return np.bincount(index.ravel(), minlength=n_rep * n_taxa * bins
                       ).reshape(n_rep, n_taxa, bins).astype(np.float64)


def stirling_log_gamma(x: np.ndarray) -> np.ndarray:
    """lgamma(x) ~ (x - 1/2) log x - x + log(2 pi)/2 + 1/(12 x), error < 1/(360 x^3).

    Stirling's series (Abramowitz & Stegun 1964, *Handbook of Mathematical Functions*,
    6.1.41); for x >= EXACT_BELOW = 32 the error is below 8.5e-8.
    """
    return (x - 0.5) * np.log(x) - x + HALF_LOG_TWO_PI + 1.0 / (12.0 * x)


def summed_stirling(clamped: np.ndarray, clamped_sum: np.ndarray, shape: np.ndarray,
                    scratch: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """sum_t stirling_log_gamma(m_t + s), ``(R, K)``; the linear terms are summed in closed form.

    Works in the two ``scratch`` arrays (shape of ``clamped``) to avoid large temporaries.
    """
    x, other = scratch
    np.add(clamped, shape[:, None, :], out=x)
    np.log(x, out=other)
    np.subtract(x, 0.5, out=x)
    np.multiply(x, other, out=other)
    np.add(x, 0.5, out=x)
    np.divide(1.0 / 12.0, x, out=x)
    x += other
    n_samples = clamped.shape[1]
    return x.sum(axis=1) - clamped_sum + n_samples * (HALF_LOG_TWO_PI - shape)


def log_rising_factorials(shape: np.ndarray) -> np.ndarray:
    """lgamma(s + j) - lgamma(s) = sum_{i<j} log(s + i), j = 0..EXACT_BELOW-1, ``(R, K, J)``."""
    steps = np.log(shape[..., None] + np.arange(EXACT_BELOW - 1))
    return np.concatenate([np.zeros(shape.shape + (1,)), np.cumsum(steps, axis=-1)], axis=-1)


def summed_log_gamma_ratio(summary: CountSummary, which: int, shape: np.ndarray) -> np.ndarray:
    """sum_t [lgamma(m_t + s) - lgamma(s)] per table and taxon, ``(R, K)``, shapes s ``(R, K)``.

    ``which`` = 0 for m = N, 1 for m = n - N.
    """
    histogram = summary.histogram[which]
    small = np.einsum("rkj,rkj->rk", histogram[..., :EXACT_BELOW], log_rising_factorials(shape))
    n_small = histogram[..., :EXACT_BELOW].sum(axis=-1)
    large = summed_stirling(summary.clamped[which], summary.clamped_sum[which], shape,
                            summary.scratch)
    large -= n_small * stirling_log_gamma(EXACT_BELOW + shape)
    large -= histogram[..., EXACT_BELOW] * special.gammaln(shape)
    return small + large


def theta_dependent_loglik(summary: CountSummary, shape_a: np.ndarray,
                           shape_b: np.ndarray) -> np.ndarray:
    """Beta-binomial log-likelihood summed over samples, without the binomial coefficients.

    sum_t [lgamma(N + a) - lgamma(a) + lgamma(n - N + b) - lgamma(b)
           - lgamma(n + a + b) + lgamma(a + b)], shape ``(R, K)``, for shapes ``(R, K)``
    whose rows have a common a + b. Adding sum_t log C(n_t, N_it) gives the sum over
    samples of ``scipy.stats.betabinom.logpmf``.
    """
    total = shape_a[:, :1] + shape_b[:, :1]                                   # (R, 1)
    shared = np.sum(special.gammaln(summary.depths + total) - special.gammaln(total), axis=1)
    return (summed_log_gamma_ratio(summary, 0, shape_a)
            + summed_log_gamma_ratio(summary, 1, shape_b) - shared[:, None])


def grid_loglik(summary: CountSummary, p: np.ndarray, pilot: np.ndarray,
                multipliers: np.ndarray) -> np.ndarray:
    """Composite log-likelihood at theta = c * pilot for every c, shape ``(R, K, G)``."""
    return np.stack([theta_dependent_loglik(summary, c * pilot[:, None] * p,
                                            c * pilot[:, None] * (1.0 - p))
                     for c in multipliers], axis=-1)


def refine_maximum(values: np.ndarray, index: np.ndarray, multipliers: np.ndarray
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Maximiser and maximum over the grid axis (last) of ``values``, refined between grid points.

    Through the best grid point ``index`` and its two neighbours passes exactly one curve
    g(c) = f_k + alpha log(c / c_k) - beta (c - c_k), the shape of a log-likelihood in a
    precision parameter (the Gamma/Beta form a log c - b c); when it is concave with an
    interior maximum (alpha, beta > 0) its maximiser alpha / beta, clipped to the
    neighbours, and its value there are returned; otherwise (grid edge, no curvature) the
    grid point itself. On beta-binomial log-likelihoods this is within ~2% of the exact
    maximiser where a parabola in log c is ~5% low.
    """
    alpha, beta, interior = _curve_coefficients(values, index, multipliers)
    last = multipliers.size - 1
    low = multipliers[np.clip(index - 1, 0, last)]
    high = multipliers[np.clip(index + 1, 0, last)]
    concave = interior & (alpha > 0) & (beta > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        peak = np.where(concave, np.clip(alpha / beta, low, high), multipliers[index])
    return peak, interpolant_at(values, index, multipliers, peak)


def interpolant_at(values: np.ndarray, index: np.ndarray, multipliers: np.ndarray,
                   point: np.ndarray) -> np.ndarray:
    """The curve of :func:`refine_maximum` through index - 1, index, index + 1, at ``point``.

    ``index`` and ``point`` broadcast against ``values.shape[:-1]``. At the grid edges
    the value at the grid point is returned (``point`` is then that grid point).
    """
    alpha, beta, interior = _curve_coefficients(values, index, multipliers)
    centre = multipliers[index]
    middle = _take(values, np.broadcast_to(index, values.shape[:-1]))
    curve = middle + alpha * np.log(point / centre) - beta * (point - centre)
    return np.where(interior, curve, middle)


def _curve_coefficients(values: np.ndarray, index: np.ndarray, multipliers: np.ndarray
                        ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """alpha, beta of f_k + alpha log(c / c_k) - beta (c - c_k) through the three grid points.

    On a geometric grid c_{k+1} = r c_k, with d1 = f_k - f_{k-1} and d2 = f_{k+1} - f_k:
    beta = (d1 - d2) / (c_{k-1} (r - 1)^2), alpha = (d1 + (d1 - d2)/(r - 1)) / log r.
    Zero where ``index`` is at a grid edge (``interior`` False).
    """
    last = multipliers.size - 1
    index = np.broadcast_to(index, values.shape[:-1])
    interior = (index > 0) & (index < last)
    left = _take(values, np.clip(index - 1, 0, last))
    middle = _take(values, index)
    right = _take(values, np.clip(index + 1, 0, last))
    ratio = multipliers[1] / multipliers[0]
    rise, next_rise = middle - left, right - middle
    beta = (rise - next_rise) / (multipliers[np.clip(index - 1, 0, last)] * (ratio - 1.0) ** 2)
    alpha = (rise + (rise - next_rise) / (ratio - 1.0)) / np.log(ratio)
    return np.where(interior, alpha, 0.0), np.where(interior, beta, 0.0), interior


def _take(values: np.ndarray, index: np.ndarray) -> np.ndarray:
    """values[..., index] with one index per leading position."""
    return np.take_along_axis(values, index[..., None], axis=-1)[..., 0]
