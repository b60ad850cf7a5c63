"""``stationary_divergence``: how far each taxon's abundance distribution is from neutral.

Basis. At stationarity the neutral community is Dirichlet(theta p) (Hubbell 2001, *The
Unified Neutral Theory of Biodiversity and Biogeography*; Etienne 2005, Ecol. Lett. 8,
"A new sampling formula for neutral biodiversity"), so a taxon's relative abundance is
Beta(theta p_i, theta (1 - p_i)) and its reads in a sample of depth n are
BetaBinomial(n, theta p_i, theta (1 - p_i)). Niche structure shows up as abundance
distributions of another shape (too many or too few absences, blooms, narrow niches);
comparing the observed distribution with the neutral one by a Kullback-Leibler
divergence follows Fisher C.K., Mehta P. (2014) "The transition between the niche and
neutral regimes in ecology", PNAS 111(36):13111-13116.

Construction, per table and taxon i (a = theta p_i, b = theta (1 - p_i), theta the fitted
one and p_i the precision-weighted mean relative abundance, see
:func:`precision_weighted_composition`; with equal depths this is the fitted p; for a
series conditioned on its first sample, see "Along the relaxation path" below):

* classes: {N = 0} and M classes of the relative abundance N/n cut at the quantiles
  q_1 < ... < q_{M-1} of Beta(a, b) (equal model probability), M = min(6, T // 8) and
  at least 1. N > n q_j exactly when N > floor(n q_j), so observed classes and the
  expected ones below refer to the same integer cut points.
* expected class probabilities at depth n: P(N = 0) exactly,
  B(a, b + n) / B(a, b) (in log-gamma form); P(N <= floor(n q_j)) by the cdf, at the
  continuity-corrected point (floor(n q_j) + 1/2) / n, of the Beta law with the mean p_i
  and the variance p_i (1 - p_i)(theta + n)/(n (theta + 1)) of N/n (moment-matched:
  Beta(theta' p_i, theta' (1 - p_i)) with theta' = theta (n - 1)/(n + theta)), floored at
  P(N = 0). Matching the variance carries the binomial sampling noise, which the plain
  Beta(a, b) cdf misses (error up to ~0.1 at n ~ 50, against ~0.03 matched).
  Depths are pooled into at most 8 geometric bins (a bin spans at most a factor 1.5
  unless the range needs more than 8), each represented by its geometric-mean depth;
  the expected probabilities are averaged over the taxon's samples.
* KL(observed || expected) in nats, expected probabilities floored at
  ``expected_floor`` and renormalised, minus the Miller-Madow bias (m - 1)/(2 T), m the
  number of non-empty observed classes (Miller G.A. 1955, "Note on the bias of
  information estimates", in *Information Theory in Psychology*, 95-100): the plug-in
  KL from T samples has expectation ~ (m - 1)/(2 T) even at the true law, and m depends
  on how rare the taxon is. The statistic is the sum over taxa present in the table
  (0 < p_i < 1) of these corrected contributions; it can be slightly negative.
* rare taxa (theta p_i < 1.5) are first pooled into groups of total shape >= 1.5
  (:mod:`driftscreen.statistics.pooling`), each group being neutral in its own right.
  Taxon by taxon, their noisy fitted p made the bootstrap reject neutral data far too
  often when most taxa are rare; measured with 100 neutral time series of 150 taxa and 100
  samples at theta = 10 (B = 49), rejections at 0.05 / 0.2 were 0.10 / 0.34 with a
  threshold of 1, 0.05 / 0.22 with 1.5, 0.06 / 0.18 with 2 and 0.04 / 0.14 with 3. Larger
  thresholds cost power against habitat filtering (rare taxa absent from samples where
  neutral drift would keep them) and a threshold of 10 made the test far too conservative
  (snapshots: 0.00 / 0.01).

Along the relaxation path. When the null is conditioned on the first sample (the
default for time series, :class:`driftscreen.neutral.model.NullOptions`), the community
relaxes from it: E[X(t) | x_0] = p + (x_0 - p) e_t, e_t = exp(-rate (t - t_0)) (design
note, section 2). Each later sample's read fractions are then taken off that path,
Y_t - (Y_0 - p) e_t, with the table's own rate, p the point the series relaxes to
(:func:`driftscreen.statistics.composition.path_composition`, the precision-weighted
composition corrected as the fit corrects its own), and the first sample, which every
replicate shares, left out. Left on the path, a taxon that starts far from p (a bloom,
a colonisation, a series that spans few correlation times) fills the outer classes for as
many samples as its relaxation lasts, about 1/rate, so the statistic followed the fitted
rate and the bootstrap, which re-fits it, missed the data's own error in it. Measured with
the validation study's generators (B = 99; rejections at 0.05 / 0.2, before -> after):
disturbed starts (182 series) 0.080 / 0.229 -> 0.060 / 0.198; C = 300 read noise (90)
0.121 / 0.242 -> 0.078 / 0.211; short series of 10-25 samples (64) 0.030 / 0.136 ->
0.062 / 0.219; stationary collection (96) 0.042 / 0.188 -> 0.073 / 0.188.

Why the correction and the weighting. The parametric bootstrap simulates from fitted
parameters, so a statistic whose null distribution moves with them is calibrated only
approximately. The plug-in KL is dominated by its bias, which falls with the rarity of
the taxon, and by the misfit of a noisy p; in a snapshot check (40 taxa, 60 samples,
depths over a 100-fold range, theta = 40, 300 neutral datasets, 99 replicates each) the
uncorrected sum with the pooled p gave p-values <= 0.05 and <= 0.2 in 8.7% and 30% of
datasets, the bias-corrected one with the precision-weighted p 6.3% and 21%.

The class probabilities are approximations (depth bins, continuity correction): the
parametric bootstrap calibrates the statistic, so they need to be deterministic and
cheap, not exact. Cost per table: O(T K) comparisons plus O(K M D) incomplete-beta
evaluations.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd
from scipy import special

from driftscreen.dataset import Design
from driftscreen.neutral.model import NeutralModel, NullFit, read_theta, single_fit
from driftscreen.statistics.base import Alternative
from driftscreen.statistics.composition import (path_composition,
                                                precision_weighted_composition,
                                                relaxation_weights)
from driftscreen.statistics.pooling import PooledTaxa, pool_rare_taxa

#: Widest depth ratio within one depth bin (unless more than ``max_depth_bins`` are needed).
DEPTH_BIN_RATIO = 1.5


@dataclass(frozen=True)
class TaxonDivergence:
    """Per-taxon pieces of the statistic for a batch, shapes ``(R, K)`` or ``(R, K, M+1)``."""

    divergence: np.ndarray
    contribution: np.ndarray
    observed: np.ndarray
    expected: np.ndarray
    present: np.ndarray
    pooled: PooledTaxa


@dataclass(frozen=True)
class StationaryDivergence:
    """KL divergence of observed abundance classes from the neutral stationary law.

    Attributes
    ----------
    max_classes:
        Largest number M of abundance classes above zero.
    samples_per_class:
        M = min(max_classes, T // samples_per_class), at least 1.
    max_depth_bins:
        Most depth bins used for the expected probabilities.
    expected_floor:
        Floor on expected class probabilities before renormalising.
    min_shape:
        Taxa with theta p_i below this are pooled with other rare taxa into groups of
        total shape at least this (:mod:`driftscreen.statistics.pooling`).
    """

    name: ClassVar[str] = "stationary_divergence"
    #: How outputs name it, and what its value is (the axis of its null distribution).
    title: ClassVar[str] = "Stationary divergence"
    unit: ClassVar[str] = "KL divergence from the stationary law, summed over taxa (nats)"
    #: What it measures, for the methods paragraph ({groupings}: R).
    methods: ClassVar[str] = (
        "the Kullback-Leibler divergence of each taxon's abundance distribution from its "
        "stationary neutral (beta-binomial) law, summed over taxa, rare taxa pooled into "
        "groups (after Fisher & Mehta 2014, PNAS 111:13111), for time series conditioned "
        "on their first sample with the later abundances taken off their neutral relaxation "
        "path from it")
    #: How to read its diagnostics ({abundance_classes}: classes of the report).
    how_to_read: ClassVar[str] = (
        "p: share of the metacommunity; zero obs/exp: samples "
        "without reads, observed and expected under neutrality; part: the taxon's part of "
        "the statistic (bias-corrected Kullback-Leibler divergence in nats; the parts sum to "
        "the statistic); variability: variance of its relative abundance against the "
        "neutral one; +N rare: pooled with N rarer taxa.")
    needs_time: ClassVar[bool] = False
    alternative: ClassVar[Alternative] = "greater"
    marginal: ClassVar[bool] = True
    in_combination: ClassVar[bool] = True
    studentised: ClassVar[bool] = False

    max_classes: int = 6
    samples_per_class: int = 8
    max_depth_bins: int = 8
    expected_floor: float = 1e-4
    min_shape: float = 1.5

    def compute(self, counts: np.ndarray, design: Design, fit: NullFit,
                rng: np.random.Generator) -> np.ndarray:
        """Sum over present taxa of bias-corrected KL(observed || neutral), shape ``(R,)``."""
        return self.by_taxon(counts, design, fit).contribution.sum(axis=1)

    def by_taxon(self, counts: np.ndarray, design: Design, fit: NullFit) -> TaxonDivergence:
        """Observed and expected class frequencies and KL contribution of every taxon.

        With technical noise the stationary law is that of the reads' composition,
        Dirichlet(theta_0 p) (:func:`driftscreen.neutral.model.read_theta`).
        """
        counts = np.asarray(counts)
        depths = design.depths.astype(np.float64)
        theta = read_theta(fit.theta, fit.noise)
        if fit.conditioned:
            start_weight = relaxation_weights(design, fit.rate)
            centre = path_composition(counts, depths, theta, start_weight)
        else:
            centre = precision_weighted_composition(counts, depths, theta)
        pooled = pool_rare_taxa(counts, centre, theta, self.min_shape)
        counts, p = pooled.counts, pooled.p
        present = (p > 0) & (p < 1)
        shape_a, shape_b = beta_shapes(p, theta)
        n_classes = int(np.clip(design.n_samples // self.samples_per_class, 1, self.max_classes))
        edges = class_edges(shape_a, shape_b, n_classes)
        relative = counts / depths[:, None]
        used_depths = design.depths
        if fit.conditioned:
            relative = off_path(relative, p, start_weight)
            counts, used_depths = counts[:, 1:], design.depths[1:]
        observed = observed_class_frequencies(counts, relative, edges)
        bin_depths, bin_weights = depth_bins(used_depths, self.max_depth_bins)
        expected = expected_class_probabilities(shape_a, shape_b, theta, edges,
                                                bin_depths, bin_weights)
        divergence = kl_divergence(observed, expected, self.expected_floor)
        corrected = divergence - miller_madow_bias(observed, used_depths.size)
        return TaxonDivergence(np.where(present, divergence, 0.0),
                               np.where(present, corrected, 0.0), observed, expected, present,
                               pooled)

    def diagnose(self, counts: np.ndarray, design: Design, model: NeutralModel,
                 rng: np.random.Generator) -> pd.DataFrame:
        """Per taxon (or pool of rare taxa): p, zero fractions, KL, contribution, direction.

        ``taxon`` is the column index in ``counts`` of the taxon, or of the most abundant
        member of a pool of rare taxa (``members`` > 1); ``p`` is the composition the
        statistic uses (precision-weighted; for a series conditioned on its first sample,
        the point it relaxes to), ``kl_divergence`` the plug-in KL of the classes,
        ``contribution`` the bias-corrected share of the statistic (the column sums to the
        statistic).

        ``variance_ratio`` is the observed variance of the relative abundance over its
        neutral expectation p (1 - p) (v + (1 - v) mean(1/n)), v = 1/(1 + theta); above 1
        the taxon is "more variable" than neutral, otherwise "less variable". Rows are
        sorted by decreasing contribution.
        """
        parts = self.by_taxon(np.asarray(counts)[None], design, single_fit(model))
        pooled = parts.pooled
        p = pooled.p[0]
        ratio = variance_ratio(pooled.counts[0], design.depths, p,
                               float(read_theta(model.theta, model.noise)))
        table = pd.DataFrame({
            "taxon": pooled.order[0],
            "members": pooled.members[0],
            "p": p,
            "observed_zero_fraction": parts.observed[0, :, 0],
            "expected_zero_fraction": parts.expected[0, :, 0],
            "kl_divergence": parts.divergence[0],
            "contribution": parts.contribution[0],
            "variance_ratio": ratio,
            "direction": np.where(ratio > 1.0, "more variable", "less variable"),
        })
        table = table[parts.present[0]]
        return table.sort_values("contribution", ascending=False, kind="stable"
                                 ).reset_index(drop=True)


def beta_shapes(p: np.ndarray, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Stationary Beta shapes (theta p, theta (1 - p)), ``(R, K)``; 1 where p is 0 or 1.

    The placeholder keeps every special function finite for absent (or sole) taxa, whose
    contributions are masked by the callers.
    """
    degenerate = (p <= 0) | (p >= 1)
    shape_a = np.where(degenerate, 1.0, theta[:, None] * p)
    shape_b = np.where(degenerate, 1.0, theta[:, None] * (1.0 - p))
    return shape_a, shape_b


def class_edges(shape_a: np.ndarray, shape_b: np.ndarray, n_classes: int) -> np.ndarray:
    """Quantiles j / M (j = 1..M-1) of Beta(a, b), shape ``(R, K, M-1)``."""
    levels = np.arange(1, n_classes) / n_classes
    return special.betaincinv(shape_a[..., None], shape_b[..., None], levels)


def off_path(relative: np.ndarray, p: np.ndarray, start_weight: np.ndarray) -> np.ndarray:
    """Y_t - (Y_0 - p) e_t for the samples after the first, ``(R, T - 1, K)``.

    The read fractions ``relative`` ``(R, T, K)`` less their relaxation from the first
    sample towards ``p`` ``(R, K)``, ``start_weight`` e_t ``(R, T)``
    (:func:`driftscreen.statistics.composition.relaxation_weights`): they vary about p, as
    a stationary series does.
    """
    shift = start_weight[:, :, None] * (relative[:, :1] - p[:, None, :])
    return (relative - shift)[:, 1:]


def observed_class_frequencies(counts: np.ndarray, relative: np.ndarray,
                               edges: np.ndarray) -> np.ndarray:
    """Fraction of samples in {N = 0}, (0, q_1], ..., (q_{M-1}, 1], shape ``(R, K, M+1)``.

    Built from the survival counts S_0 = #{N > 0} and S_j = #{N > 0, Y > q_j}, Y the read
    fractions ``relative`` (N/n, or their values off the relaxation path, :func:`off_path`,
    which can be positive where a taxon has no read: such a sample stays in {N = 0}).
    """
    n_samples = counts.shape[1]
    relative = np.where(counts > 0, relative, 0.0)
    survival = [np.count_nonzero(counts, axis=1)]
    for j in range(edges.shape[-1]):
        survival.append(np.count_nonzero(relative > edges[:, None, :, j], axis=1))
    survival = np.stack(survival, axis=-1)
    upper = np.concatenate([np.full(survival.shape[:-1] + (1,), n_samples), survival], axis=-1)
    lower = np.concatenate([survival, np.zeros(survival.shape[:-1] + (1,), dtype=survival.dtype)],
                           axis=-1)
    return (upper - lower) / n_samples


def depth_bins(depths: np.ndarray, max_bins: int) -> tuple[np.ndarray, np.ndarray]:
    """Geometric depth bins: representative (geometric-mean) depths and sample fractions."""
    log_depths = np.log(depths.astype(np.float64))
    low, high = log_depths.min(), log_depths.max()
    n_bins = int(np.clip(np.ceil((high - low) / np.log(DEPTH_BIN_RATIO)), 1, max_bins))
    edges = np.linspace(low, high, n_bins + 1)
    index = np.clip(np.searchsorted(edges, log_depths, side="right") - 1, 0, n_bins - 1)
    members = np.bincount(index, minlength=n_bins)
    used = members > 0
    mean_log = np.bincount(index, weights=log_depths, minlength=n_bins)[used] / members[used]
    return np.maximum(np.rint(np.exp(mean_log)), 1.0), members[used] / depths.size


def zero_probability(shape_b: np.ndarray, theta: np.ndarray, depths: np.ndarray) -> np.ndarray:
    """BetaBinomial P(N = 0) = B(a, b + n) / B(a, b), shape ``(R, K, D)`` (a + b = theta)."""
    log_p0 = (special.gammaln(shape_b[..., None] + depths) - special.gammaln(shape_b)[..., None]
              + (special.gammaln(theta)[:, None] - special.gammaln(theta[:, None] + depths)
                 )[:, None, :])
    return np.exp(log_p0)


def expected_class_probabilities(shape_a: np.ndarray, shape_b: np.ndarray, theta: np.ndarray,
                                 edges: np.ndarray, bin_depths: np.ndarray,
                                 bin_weights: np.ndarray) -> np.ndarray:
    """Neutral class probabilities averaged over the depth bins, shape ``(R, K, M+1)``."""
    p0 = zero_probability(shape_b, theta, bin_depths)
    cut = np.floor(edges[..., None, :] * bin_depths[:, None])          # (R, K, D, M-1)
    point = np.minimum((cut + 0.5) / bin_depths[:, None], 1.0)
    matched = sampled_theta(theta, bin_depths)[:, None, :, None]        # (R, 1, D, 1)
    fraction = (shape_a / (shape_a + shape_b))[..., None, None]
    cdf = special.betainc(matched * fraction, matched * (1.0 - fraction), point)
    cdf = np.maximum.accumulate(np.maximum(cdf, p0[..., None]), axis=-1)
    cdf = np.concatenate([p0[..., None], cdf, np.ones_like(p0)[..., None]], axis=-1)
    probabilities = np.diff(cdf, axis=-1, prepend=0.0)
    return np.einsum("rkdc,d->rkc", probabilities, bin_weights)


def sampled_theta(theta: np.ndarray, depths: np.ndarray) -> np.ndarray:
    """theta' = theta (n - 1)/(n + theta): Beta(theta' p, theta' (1 - p)) has the variance of N/n.

    Var(N/n) = p (1 - p)(theta + n)/(n (theta + 1)) for the beta-binomial (design note,
    section 1), equal to p (1 - p)/(theta' + 1). Shape ``(R, D)``; floored at 1e-12 (n = 1).
    """
    return np.maximum(theta[:, None] * (depths - 1.0) / (depths + theta[:, None]), 1e-12)


def miller_madow_bias(observed: np.ndarray, n_samples: int) -> np.ndarray:
    """(m - 1)/(2 T), m the number of non-empty classes in ``observed`` (last axis)."""
    occupied = np.count_nonzero(observed, axis=-1)
    return (occupied - 1) / (2.0 * n_samples)


def kl_divergence(observed: np.ndarray, expected: np.ndarray, floor: float) -> np.ndarray:
    """KL(observed || expected) in nats over the last axis; expected floored, renormalised."""
    expected = np.maximum(expected, floor)
    expected = expected / expected.sum(axis=-1, keepdims=True)
    return special.rel_entr(observed, expected).sum(axis=-1)


def variance_ratio(counts: np.ndarray, depths: np.ndarray, p: np.ndarray,
                   theta: float) -> np.ndarray:
    """Observed variance of N/n over p (1 - p) (v + (1 - v) mean(1/n)) (design note, sec. 2)."""
    relative = counts / depths[:, None].astype(np.float64)
    v = 1.0 / (1.0 + theta)
    neutral = p * (1.0 - p) * (v + (1.0 - v) * np.mean(1.0 / depths))
    with np.errstate(divide="ignore", invalid="ignore"):
        return relative.var(axis=0, ddof=1) / neutral
