"""Which taxa depart from neutrality: a calibrated per-taxon scan.

Basis. The neutral occupancy-abundance prediction of Sloan et al. (2006, Environ.
Microbiol. 8:732-740, "Quantifying the roles of immigration and chance in shaping
prokaryote community structure"), applied taxon by taxon as in Burns et al. (2016, ISME J.
10:655-664): under neutrality a taxon's share of the community is Beta(theta p_i,
theta (1 - p_i)) (the marginal of the stationary Dirichlet(theta p); design note,
section 1), so its reads in a sample of depth n are BetaBinomial(n, theta p_i,
theta (1 - p_i)) and the taxon is detected in that sample with probability

    P(detected) = 1 - B(theta p_i, theta (1 - p_i) + n) / B(theta p_i, theta (1 - p_i)).

With Dirichlet-multinomial reads of precision C (design note, section 8), reads are
Multinomial(n, Z) with Z ~ Dirichlet(C X), and a taxon at share x draws no read with
probability B(C x, C (1 - x) + n)/B(C x, C (1 - x)). Its logarithm is linear in x near 0
with slope -n_eff, n_eff = C (digamma(C + n) - digamma(C)) (n_eff -> n as C -> inf), so
P(no read | x) ~ (1 - x)^n_eff, and the formula above is taken at the effective depth
n_eff (derived here, not taken from a paper; against a direct Monte Carlo of the
Beta-Dirichlet-multinomial law it is within 0.002 for theta 10-300, C 30-1000, depths
500-20,000). The moment-matched Dirichlet(theta_0 p) that the statistics use for the
variance (:func:`driftscreen.neutral.model.read_theta`) gets the zeros wrong by up to 0.15.

Per taxon (rare taxa pooled, below) the scan measures, on the data and on every re-fitted
neutral replicate:

* **occupancy**: the share of samples with at least one read minus its neutral
  expectation, the mean over samples of P(detected) at each sample's depth under the
  fitted null (effect > 0: "more frequent", < 0: "less frequent");
* **variability**: the taxon's sampling-corrected variance of relative abundance over
  samples (:func:`driftscreen.statistics.fluctuation_scaling.taxon_moments`) divided by
  the neutral p (1 - p)/(1 + theta) ("more variable" / "less variable");
* **persistence** (time series): how much more the taxon's abundance keeps between
  successive samples than the shared neutral rate implies, (V (1 - e) - D/2) / V_0, with V
  its corrected variance, D its mean sampling-corrected squared increment between
  successive samples, e the mean of exp(-rate dt) over them and V_0 = p (1 - p)/(1 + theta).
  Under neutrality E[D] = 2 V (1 - e) (design note, section 2), so it is 0 whatever the
  taxon's variance; V (1 - e) - D/2 estimates its lag covariance minus e V, divided by the
  neutral variance rather than its own noisy one, which near 0 made the ratio explode
  ("more persistent" / "less persistent").

The expectations are exact only at stationarity; for a time series conditioned on its
first sample, and for the estimation of p, theta, the rate and the noise, the parametric
bootstrap calibrates the effects: every replicate is re-fitted and measured in the same
way, so each taxon has its own null distribution of each effect.

Rare taxa are pooled as the statistics pool them (:mod:`driftscreen.statistics.pooling`):
taxa are merged, in order of increasing fitted p, into groups of shape theta P_G >= 1,
each of which is neutral in its own right. The groups are fixed by the observed fit and
kept for every replicate, so that a row of the scan is the same set of taxa in the data
and in the replicates.

p-values. Each statistic gets an equal-tailed two-sided randomised bootstrap p-value
against the taxon's own B replicates: with U uniform, the one-sided
P = (#{replicates < x} + U (1 + #{replicates = x})) / (B + 1) places x at a uniform point
of its rank's cell among the B + 1 values, ties broken at random, so that P, and the
two-sided 2 min(P, 1 - P), are exactly Uniform(0, 1) when the data and the replicates are
exchangeable, for a discrete statistic as for a continuous one (the randomised p-value;
Habiger 2015, arXiv:1412.0561, "Multiple test functions and adjusted p-values for test
statistics with discrete distributions", sec. 2; Habiger & Pena 2011, J. Nonparametric
Stat. 23:583, cited from memory). Equal tails judge a skewed null law on the side the
observed value lies on. A value beyond every replicate on its side takes, in place of U,
the tail of a normal law fitted to the replicates beyond the farthest of them (a
conditional tail extrapolation, in the spirit of Knijnenburg et al. 2009, Bioinformatics
25:i161, who fit a generalised Pareto tail), so that strong departures stay ordered past
the resolution of B replicates; not for the occupancy, which is discrete. The draws come
from the dataset's own stream of the master seed (:mod:`driftscreen.seeds`), so they are
the same for any number of jobs and on resume.

What the p-values are taken on (:func:`compared_values`):

* occupancy: the share of samples with a read itself, not its difference from the
  expectation. For a taxon seen in (almost) every sample that difference is a function
  of the fitted theta and p only, and the re-fitted replicates centre on the data's fit,
  so its p-values piled up near 1. It is tested only where the replicates' 95% band of
  occupancy is not one value, or the data lie outside it (:func:`occupancy_tested`; the
  same rule for every replicate's leave-one-out value): a taxon in every sample of
  nearly every replicate and of the data has no information in its occupancy.
* variability (asinh of the variance ratio) and persistence are centred on their median
  over the units of the same table, the data's and each replicate's alike, where there
  are at least :data:`MIN_CENTRED` units: every taxon's ratio shares its table's
  re-fitted 1 + theta, every persistence its re-fitted rate, and on short series the
  re-fitted replicates vary those more than the data's own estimate moves them, which
  made the replicates' laws wider than the data's (too few small p-values). A taxon is
  thereby compared with the other taxa of its table, which also removes the shift a few
  strongly departing taxa give every other taxon through the fitted theta.

A taxon's combined p-value is that of -log10 of the harmonic mean p-value (Wilson 2019,
PNAS 116:1195) of its statistics' p-values, calibrated against the same quantity of the
replicates' leave-one-out p-values (each replicate against the others, with its own
draws), pooled over every taxon of the dataset: each taxon's own B replicates cannot
give p-values below 1/(B + 1), too coarse for a Benjamini-Hochberg adjustment over tens
or hundreds of taxa, whereas leave-one-out p-values are uniform for every taxon, so their
combinations are comparable across taxa. Benjamini-Hochberg (1995) q-values are taken
across the taxa of the dataset.

Across datasets (:func:`across_datasets`), a taxon's combined p-values from the datasets
where it is present (on its own, not in a pool) are combined by the Cauchy combination
(Liu & Xie 2020, J. Am. Stat. Assoc. 115:393), valid for independent datasets and robust
to dependence, and q-values are taken across taxa.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import special, stats

from driftscreen.dataset import Design
from driftscreen.fdr import benjamini_hochberg
from driftscreen.neutral.model import NullFit
from driftscreen.statistics.combination import cauchy_combination, harmonic_mean_pvalue
from driftscreen.statistics.fluctuation_scaling import taxon_moments
from driftscreen.statistics.pooling import group_ids

#: Version of the scan's measures and p-values, part of a screen's settings fingerprint: a
#: resume store written without the scan (or with another version) is refused, not reused
#: with taxa missing from taxa.tsv.
VERSION = 2
#: Taxa with theta p_i below this are tested in pools of total shape at least this.
MIN_SHAPE = 1.0
#: Level at which a taxon is reported as departing, and its effects named in its direction.
LEVEL = 0.05
#: Rows of the per-replicate measures: observed occupancy, expected occupancy, variance
#: ratio and, for time series, the persistence contrast.
OCCUPANCY, EXPECTED, VARIANCE_RATIO, PERSISTENCE = range(4)
#: Words for an effect above and below its neutral value, by statistic.
DIRECTIONS = {"occupancy": ("more frequent", "less frequent"),
              "variability": ("more variable", "less variable"),
              "persistence": ("more persistent", "less persistent")}
#: Floor of the normal tail ratio: beyond the farthest replicate a p-value is at least this
#: share of 1/(B + 1), so that a misfit far tail cannot outweigh every replicate.
SMALLEST_RATIO = 1e-2
#: Quantiles of the replicates' occupancy that bound the neutral band.
BAND = (0.025, 0.975)


@dataclass(frozen=True)
class ScanUnits:
    """The taxa and pools of rare taxa the scan tests, contiguous in ``order``.

    ``order`` lists taxon indices by increasing fitted p; unit u holds the taxa
    ``order[starts[u]:starts[u + 1]]``, its most abundant member last.
    """

    order: np.ndarray
    starts: np.ndarray

    @property
    def members(self) -> np.ndarray:
        """Taxa per unit, ``(G,)``."""
        return np.diff(np.append(self.starts, self.order.size))

    @property
    def lead(self) -> np.ndarray:
        """Index of each unit's most abundant taxon, ``(G,)``."""
        return self.order[np.append(self.starts[1:], self.order.size) - 1]

    def sums(self, values: np.ndarray) -> np.ndarray:
        """Sums over each unit's taxa along the last axis: ``(..., K)`` -> ``(..., G)``."""
        return np.add.reduceat(np.asarray(values, dtype=np.float64)[..., self.order],
                               self.starts, axis=-1)


def scan_units(p: np.ndarray, theta: float, min_shape: float = MIN_SHAPE) -> ScanUnits:
    """Taxa with shape theta p_i >= ``min_shape`` alone, rarer ones pooled (``pooling``)."""
    order = np.argsort(p, kind="stable")
    ids = group_ids((theta * p[order])[None], min_shape)[0]
    starts = np.flatnonzero(np.concatenate([[True], ids[1:] != ids[:-1]]))
    return ScanUnits(order, starts)


def detection_probability(depths: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """1 - BetaBinomial(n, a, b).pmf(0) = 1 - B(a, b + n)/B(a, b), broadcast over inputs.

    Evaluated as -expm1(betaln(a, b + n) - betaln(a, b)); a = 0 (an absent taxon) gives 0
    and b = 0 (the whole community) gives 1.
    """
    n = np.asarray(depths, dtype=np.float64)
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    safe_a, safe_b = np.where(a > 0, a, 1.0), np.where(b > 0, b, 1.0)
    detected = -np.expm1(special.betaln(safe_a, safe_b + n) - special.betaln(safe_a, safe_b))
    return np.where(a <= 0, 0.0, np.where(b <= 0, 1.0, detected))


def detection_depths(depths: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """n_eff = C (digamma(C + n) - digamma(C)) per table and depth, ``(R, D)``; n without noise.

    ``noise`` is g = 1/(1 + C) per table, ``(R,)`` (module docstring).
    """
    n = np.asarray(depths, dtype=np.float64)[None, :]
    g = np.asarray(noise, dtype=np.float64)[:, None]
    precision = np.where(g > 0, 1.0 / np.where(g > 0, g, 1.0) - 1.0, 1.0)
    effective = precision * (special.digamma(precision + n) - special.digamma(precision))
    return np.where(g > 0, effective, n)


def expected_occupancy(depths: np.ndarray, p: np.ndarray, theta: np.ndarray,
                       noise: np.ndarray) -> np.ndarray:
    """Mean over samples of the neutral detection probability, ``(R, G)``.

    ``p`` is ``(R, G)``, ``theta`` and ``noise`` (g = 1/(1 + C)) are ``(R,)``; with noise
    each depth is replaced by its effective depth for detection (:func:`detection_depths`).
    Distinct depths are evaluated once.
    """
    unique, counts = np.unique(np.asarray(depths, dtype=np.float64), return_counts=True)
    effective = detection_depths(unique, noise)[:, None, :]
    shape_in = (theta[:, None] * p)[:, :, None]
    shape_out = (theta[:, None] * (1.0 - p))[:, :, None]
    detected = detection_probability(effective, shape_in, shape_out)
    return detected @ (counts / counts.sum())


def mean_increments(counts: np.ndarray, depths: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """D: mean over successive samples of the sampling-corrected squared increment, ``(R, G)``.

    (Y_t+1 - Y_t)^2 less both samples' sampling variances, estimated as in
    :func:`taxon_moments` (Y (1 - Y)/(n - 1), scaled for the technical noise g).
    """
    depths = np.asarray(depths, dtype=np.float64)
    relative = counts / depths[:, None]
    g = noise[:, None]
    scale = depths * (g + (1.0 - g) / depths) / (1.0 - g) / np.maximum(depths - 1.0, 1.0)
    sampling = relative * (1.0 - relative) * scale[:, :, None]
    steps = np.diff(relative, axis=1)
    return (steps * steps - sampling[:, 1:] - sampling[:, :-1]).mean(axis=1)


def neutral_lag_correlation(design: Design, rate: np.ndarray) -> np.ndarray:
    """Mean of exp(-rate dt) over successive samples, ``(R,)``."""
    gaps = np.diff(np.asarray(design.times, dtype=np.float64))
    return np.exp(-rate[:, None] * gaps[None, :]).mean(axis=1)


@dataclass(frozen=True)
class TaxonScan:
    """The per-taxon measures of one dataset's units, for the data and every replicate."""

    units: ScanUnits
    time_series: bool

    @property
    def statistics(self) -> tuple[str, ...]:
        return (("occupancy", "variability", "persistence") if self.time_series
                else ("occupancy", "variability"))

    def measure(self, counts: np.ndarray, design: Design, fit: NullFit) -> np.ndarray:
        """Measures ``(R, M, G)`` of a batch ``(R, T, K)`` under its fits (rows: constants above)."""
        pooled = self.units.sums(counts)
        shares = self.units.sums(fit.p)
        occupied = (pooled > 0).mean(axis=1)
        expected = expected_occupancy(design.depths, shares, fit.theta, fit.noise)
        corrected = taxon_moments(pooled, design.depths, fit.noise).corrected
        neutral = shares * (1.0 - shares) / (1.0 + fit.theta[:, None])
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(neutral > 0, corrected / neutral, np.nan)
        rows = [occupied, expected, ratio]
        if self.time_series:
            kept = neutral_lag_correlation(design, fit.rate)[:, None]
            increments = mean_increments(pooled, design.depths, fit.noise)
            with np.errstate(divide="ignore", invalid="ignore"):
                rows.append(np.where(neutral > 0, (corrected * (1.0 - kept) - increments / 2.0)
                                     / neutral, np.nan))
        return np.stack(rows, axis=1)


def taxon_scan_for(p: np.ndarray, theta: float, design: Design) -> TaxonScan:
    """The scan of a dataset whose observed fit has composition ``p`` and ``theta``."""
    return TaxonScan(scan_units(p, theta), design.is_time_series)


def effects(measures: np.ndarray, scan: TaxonScan) -> np.ndarray:
    """Effects ``(..., S, G)`` from measures ``(..., M, G)``, in ``scan.statistics`` order."""
    rows = [measures[..., OCCUPANCY, :] - measures[..., EXPECTED, :],
            measures[..., VARIANCE_RATIO, :]]
    if scan.time_series:
        rows.append(measures[..., PERSISTENCE, :])
    return np.stack(rows, axis=-2)


#: Statistics whose p-values get the normal tail beyond the farthest replicate (not the
#: occupancy: a share of samples is discrete, in steps of 1/T).
TAILED = np.array([False, True, True])
#: Fewest units for which variability and persistence are centred across the units.
MIN_CENTRED = 5


def centred_across_units(values: np.ndarray) -> np.ndarray:
    """``values`` ``(..., G)`` less their median over the units (last axis); NaN units are
    left out of the median and stay NaN, an all-NaN table stays NaN."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # numpy's all-NaN slice warning
        return values - np.nanmedian(values, axis=-1, keepdims=True)


def compared_values(measures: np.ndarray, scan: TaxonScan) -> np.ndarray:
    """What the p-values are taken on, ``(..., S, G)`` from measures ``(..., M, G)``.

    Occupancy: the share of samples with a read (discrete; its ties are broken at random
    by :func:`two_sided_pvalues`). Variability: asinh of the variance ratio (about log 2r
    for large r, defined for the negative ratios a sampling-corrected variance can give);
    persistence: the contrast. With at least :data:`MIN_CENTRED` units, these two are
    centred on their median over the units of the same table (:func:`centred_across_units`),
    the data's and each replicate's alike: every taxon's ratio shares the factor 1 + theta
    of its table's fit (a constant on the asinh scale for ratios above 1) and every
    taxon's persistence the fitted rate, so the centred values compare a taxon with the
    other taxa of its table rather than with a re-fitted theta and rate.
    """
    rows = [measures[..., OCCUPANCY, :], np.arcsinh(measures[..., VARIANCE_RATIO, :])]
    if scan.time_series:
        rows.append(measures[..., PERSISTENCE, :])
    out = np.stack(rows, axis=-2)
    if scan.units.starts.size >= MIN_CENTRED:
        out[..., 1:, :] = centred_across_units(out[..., 1:, :])
    return out


def tail_ratio(distance: np.ndarray, boundary: np.ndarray, scale: np.ndarray,
               n: np.ndarray) -> np.ndarray:
    """P(D > distance | D > boundary) for D = |normal(0, scale)|, in [0, 1].

    The normal tail beyond the farthest of ``n`` replicates, Phi(-distance/scale) /
    Phi(-boundary/scale), from log-probabilities (scipy.special.log_ndtr) so that it stays
    finite far out. Only where the replicates look normal in their tail: 1 (no extension)
    where the farthest lies more than sqrt(2 log 2n) + 1 scales out (the largest of n
    normal distances is about sqrt(2 log 2n); heavy tails and discrete laws, such as the
    occupancy of a taxon seen in almost every sample, lie beyond), or where there is no scale.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        limit = np.sqrt(2.0 * np.log(2.0 * np.maximum(n, 1))) + 1.0
        usable = (scale > 0) & (boundary <= limit * scale)
        log_ratio = (special.log_ndtr(-distance / scale) - special.log_ndtr(-boundary / scale))
        ratio = np.minimum(np.exp(log_ratio), 1.0)
    return np.where(usable & np.isfinite(ratio), np.maximum(ratio, SMALLEST_RATIO), 1.0)


def null_summary(null: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Finite counts, medians and root-mean-square distances from them of ``null``
    ``(B, S, G)`` along the replicates, each ``(S, G)``."""
    finite = np.isfinite(null)
    n = finite.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        center = np.where(n > 0, np.nanmedian(np.where(n > 0, null, 0.0), axis=0), np.nan)
        squares = np.where(finite, (null - center) ** 2, 0.0)
        scale = np.sqrt(squares.sum(axis=0) / n)
    return n, center, scale


def doubled(low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """The equal-tailed two-sided p-value: twice the smaller one-sided one, at most 1."""
    return np.minimum(1.0, 2.0 * np.minimum(low, high))


def randomised_sides(less: np.ndarray, equal: np.ndarray, greater: np.ndarray,
                     draws: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One-sided randomised p-values (low, high) of a value against ``less + equal +
    greater`` exchangeable others: low = (less + U (1 + equal)) / (others + 1), high = 1 - low.

    The value's rank among all of them, ties broken by the uniform ``draws`` U and spread
    uniformly over its cell, so that low is exactly Uniform(0, 1) when the value and the
    others are exchangeable, whether their law is continuous or discrete.
    """
    total = less + equal + greater + 1.0
    spread = draws * (1.0 + equal)
    return (less + spread) / total, (greater + (1.0 + equal) - spread) / total


def two_sided_pvalues(observed: np.ndarray, null: np.ndarray, draws: np.ndarray,
                      tailed: np.ndarray | bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Randomised bootstrap p-values of ``observed`` ``(S, G)`` against ``null``
    ``(B, S, G)``, and the side each lies on (+1: above the replicates, -1: below).

    Equal-tailed: twice the smaller of the randomised one-sided p-values
    (:func:`randomised_sides`, ties broken by ``draws`` ``(S, G)``), at most 1, so that a
    skewed null law is judged on the side the observed value lies on. Beyond the farthest
    replicate on its side (for the statistics, rows, where ``tailed``: ``(S,)`` or one
    value), U is replaced by the normal tail ratio :func:`tail_ratio` (scale: the
    replicates' root-mean-square distance from their median), so that p-values keep
    ordering taxa past the resolution of B replicates. NaN where the observed value is
    undefined or no replicate is finite.
    """
    n, center, scale = null_summary(null)
    tail = np.asarray(tailed)[..., None]
    finite = np.isfinite(null)
    less = np.count_nonzero(finite & (null < observed), axis=0)
    equal = np.count_nonzero(finite & (null == observed), axis=0)
    greater = n - less - equal
    low, high = randomised_sides(less, equal, greater, draws)
    with np.errstate(invalid="ignore"):
        lowest = np.nanmin(np.where(finite, null, np.inf), axis=0)
        highest = np.nanmax(np.where(finite, null, -np.inf), axis=0)
    low = np.where((less + equal == 0) & tail,
                   tail_ratio(center - observed, center - lowest, scale, n) / (n + 1.0), low)
    high = np.where((greater + equal == 0) & tail,
                    tail_ratio(observed - center, highest - center, scale, n) / (n + 1.0), high)
    valid = np.isfinite(observed) & (n > 0)
    return (np.where(valid, doubled(low, high), np.nan),
            np.where(valid, np.where(high < low, 1.0, -1.0), np.nan))


def leave_one_out(null: np.ndarray, draws: np.ndarray, tailed: np.ndarray | bool = True
                  ) -> np.ndarray:
    """Each replicate's two-sided p-value against the others, ``(B, S, G)``; NaN stays NaN.

    As :func:`two_sided_pvalues` with the other n - 1 replicates as the null and the
    replicate's own uniform ``draws`` ``(B, S, G)``; for the smallest and the largest
    replicate the tail beyond the nearest other one, with the others' scale (where
    ``tailed``).
    """
    n, center, _ = null_summary(null)
    finite = np.isfinite(null)
    tail = np.asarray(tailed)[..., None]
    high_filled = np.where(finite, null, np.inf)
    less = stats.rankdata(high_filled, method="min", axis=0) - 1
    equal = stats.rankdata(high_filled, method="max", axis=0) - 1 - less
    greater = n - 1 - less - equal
    low, high = randomised_sides(less, equal, greater, draws)
    ordered = np.sort(high_filled, axis=0)
    second_lowest = ordered[min(1, ordered.shape[0] - 1)]  # one replicate: no others
    second_highest = np.take_along_axis(ordered, np.maximum(n - 2, 0)[None], axis=0)[0]
    squares = np.where(finite, (null - center) ** 2, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        others_scale = np.sqrt(np.maximum(squares.sum(axis=0) - squares, 0.0) / (n - 1))
        low = np.where((less + equal == 0) & tail,
                       tail_ratio(center - null, center - second_lowest, others_scale, n - 1)
                       / n, low)
        high = np.where((greater + equal == 0) & tail,
                        tail_ratio(null - center, second_highest - center, others_scale, n - 1)
                        / n, high)
        out = doubled(low, high)
    return np.where(finite & (n >= 2), out, np.nan)


def tie_draws(rng: np.random.Generator, shape: tuple[int, ...], n_replicates: int
              ) -> tuple[np.ndarray, np.ndarray]:
    """Uniform draws for the observed values ``shape`` ``(S, G)`` and for every replicate
    ``(B, S, G)``, from the dataset's own stream (:data:`driftscreen.seeds.TAXON_TIES`)."""
    return rng.random(shape), rng.random((n_replicates,) + shape)


def occupancy_band(null: np.ndarray) -> np.ndarray:
    """The replicates' :data:`BAND` quantiles of occupancy, ``(2, G)`` from ``(B, M, G)``."""
    return np.quantile(null[:, OCCUPANCY], BAND, axis=0)


def occupancy_tested(occupancy: np.ndarray, band: np.ndarray) -> np.ndarray:
    """Where an occupancy ``(..., G)`` (the data's, or each replicate's) is tested: where the
    replicates' band (:func:`occupancy_band`) is not one value, or the occupancy lies
    outside it.

    A taxon detected in every sample of nearly every replicate, and of the table at hand,
    has no information in its occupancy (its randomised p-value would be a uniform draw);
    the same taxon missing from samples is the clearest departure there is, tested against
    the replicates at a level of at most the replicates' share outside the band.
    """
    low, high = band
    return (low < high) | (occupancy < low) | (occupancy > high)


def hmp_statistic(pvalues: np.ndarray) -> np.ndarray:
    """-log10 of the harmonic mean of the defined p-values along axis -2; NaN if none."""
    weights = np.isfinite(pvalues).astype(np.float64)
    combined = harmonic_mean_pvalue(np.where(weights > 0, pvalues, 0.5), weights=weights,
                                    axis=-2)
    return np.where(weights.sum(axis=-2) > 0, -np.log10(combined), np.nan)


def pooled_pvalues(observed: np.ndarray, reference: np.ndarray) -> np.ndarray:
    """(1 + #{reference >= observed}) / (N + 1) for each observed value, N finite references."""
    pool = np.sort(reference[np.isfinite(reference)])
    if pool.size == 0:
        return np.full(observed.shape, np.nan)
    at_least = pool.size - np.searchsorted(pool, np.where(np.isfinite(observed), observed, 0.0),
                                           side="left")
    return np.where(np.isfinite(observed), (1.0 + at_least) / (pool.size + 1.0), np.nan)


def direction_text(statistics: Sequence[str], pvalues: np.ndarray, signs: np.ndarray) -> str:
    """The words of the effects with p <= LEVEL, most significant first; '' if none."""
    chosen = [j for j in np.argsort(pvalues, kind="stable")
              if np.isfinite(pvalues[j]) and pvalues[j] <= LEVEL]
    return "; ".join(DIRECTIONS[statistics[j]][0 if signs[j] > 0 else 1] for j in chosen)


def scan_pvalues(scan: TaxonScan, observed: np.ndarray, null: np.ndarray,
                 rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-statistic p-values and sides ``(S, G)`` and combined p-values ``(G,)`` of the
    data's measures ``(M, G)`` against the replicates' ``(B, M, G)``.

    Occupancy is tested only where it is informative (:func:`occupancy_tested`).
    """
    tailed = TAILED[:len(scan.statistics)]
    tested, tested_null = compared_values(observed, scan), compared_values(null, scan)
    draws, null_draws = tie_draws(rng, tested.shape, null.shape[0])
    pvalues, sides = two_sided_pvalues(tested, tested_null, draws, tailed)
    loo = leave_one_out(tested_null, null_draws, tailed)
    band = occupancy_band(null)
    pvalues[0] = np.where(occupancy_tested(observed[OCCUPANCY], band), pvalues[0], np.nan)
    loo[:, 0] = np.where(occupancy_tested(null[:, OCCUPANCY], band), loo[:, 0], np.nan)
    return pvalues, sides, pooled_pvalues(hmp_statistic(pvalues), hmp_statistic(loo))


def scan_table(scan: TaxonScan, counts: np.ndarray, design: Design, observed: np.ndarray,
               null: np.ndarray, rng: np.random.Generator) -> pd.DataFrame:
    """One row per unit, most abundant first: measures, effects, p-values, q, direction.

    ``observed`` holds the data's measures ``(M, G)``, ``null`` the replicates'
    ``(B, M, G)``. ``taxon`` is the index of the unit's most abundant taxon and
    ``members`` its number of taxa.
    """
    observed_effects = effects(observed, scan)
    pvalues, sides, combined = scan_pvalues(scan, observed, null, rng)
    band = occupancy_band(null)
    mean = scan.units.sums(counts / design.depths[:, None]).mean(axis=0)
    columns: dict[str, np.ndarray] = {
        "taxon": scan.units.lead, "members": scan.units.members, "mean_abundance": mean,
        "occupancy": observed[OCCUPANCY], "expected_occupancy": observed[EXPECTED],
        "occupancy_low": band[0], "occupancy_high": band[1]}
    for j, name in enumerate(scan.statistics):
        columns[f"{name}_effect"] = observed_effects[j]
        columns[f"{name}_p"] = pvalues[j]
    columns["combined_p"] = combined
    columns["q_value"] = benjamini_hochberg(combined)
    columns["direction"] = np.array(
        [direction_text(scan.statistics, pvalues[:, u], sides[:, u])
         for u in range(combined.size)], dtype=object)
    order = np.argsort(-mean, kind="stable")
    return pd.DataFrame({name: values[order] for name, values in columns.items()})


def departing(table: pd.DataFrame, level: float = LEVEL) -> pd.DataFrame:
    """The rows of a scan table with q <= ``level``, smallest q first."""
    if table is None or "q_value" not in table:
        return pd.DataFrame()
    chosen = table[table["q_value"].to_numpy(dtype=np.float64) <= level]
    return chosen.sort_values("q_value", kind="stable")


ACROSS_COLUMNS = ("taxon", "datasets", "departing", "directions", "combined_p", "q_value")


def direction_counts(directions: Sequence[str]) -> str:
    """'more variable in 3, less frequent in 1': how often each word occurs, most first."""
    words: dict[str, int] = {}
    for text in directions:
        for word in filter(None, (part.strip() for part in text.split(";"))):
            words[word] = words.get(word, 0) + 1
    ranked = sorted(words.items(), key=lambda item: (-item[1], item[0]))
    return ", ".join(f"{word} in {n}" for word, n in ranked)


def across_datasets(tables: Sequence[pd.DataFrame], level: float = LEVEL) -> pd.DataFrame:
    """Per taxon over the datasets where it is tested on its own (not in a pool of rare taxa).

    ``datasets``: how many; ``departing``: in how many its q <= ``level``;
    ``directions``: the directions in those; ``combined_p``: Cauchy combination of its
    combined p-values; ``q_value``: Benjamini-Hochberg across taxa. Sorted by q, then taxon.
    """
    rows = [table.loc[table["members"] == 1, ["taxon", "combined_p", "q_value", "direction"]]
            for table in tables if table is not None and len(table)]
    if not rows:
        return pd.DataFrame({name: [] for name in ACROSS_COLUMNS})
    frame = pd.concat(rows, ignore_index=True)
    frame = frame[np.isfinite(frame["combined_p"].to_numpy(dtype=np.float64))]
    records = []
    for taxon, part in frame.groupby("taxon", sort=True):
        pvalues = part["combined_p"].to_numpy(dtype=np.float64)
        significant = part["q_value"].to_numpy(dtype=np.float64) <= level
        records.append({"taxon": taxon, "datasets": len(part),
                        "departing": int(significant.sum()),
                        "directions": direction_counts(part["direction"][significant].tolist()),
                        "combined_p": float(cauchy_combination(pvalues)[1])})
    across = pd.DataFrame(records, columns=ACROSS_COLUMNS[:-1])
    across["q_value"] = benjamini_hochberg(across["combined_p"].to_numpy(dtype=np.float64))
    return across.sort_values(["q_value", "taxon"], kind="stable").reset_index(drop=True)
