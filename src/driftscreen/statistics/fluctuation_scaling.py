"""``fluctuation_scaling``: Taylor's power-law exponent of abundance fluctuations.

Basis. Taylor's law (Taylor 1961, Nature 189:732-735, "Aggregation, variance and the
mean"): across taxa, log var_i = c + b log mean_i. In the neutral model the stationary
variance of a taxon's relative abundance is p_i (1 - p_i)/(1 + theta) (design note,
section 2), so b is close to 1 for rare taxa (a little below 1 once abundant taxa bend
p (1 - p) down), whereas multiplicative environmental noise, the niche-side
explanation of abundance fluctuations in microbial communities, gives b close to 2
(Grilli 2020, Nat. Commun. 11:4743, "Macroecological laws describe variation and
diversity in microbial communities").

Statistic: the weighted least-squares slope b over taxa of the log sampling-corrected
variance on the log mean of the relative abundance Y_it = N_it / n_t across samples. The
variance is corrected for multinomial sampling,

    var_i = sample variance_t(Y_it) - mean_t Y_it (1 - Y_it) / (n_t - 1)

(E[Y(1 - Y)/(n - 1) | X] = X(1 - X)/n is the sampling variance; design note section 5),
because uncorrected sampling noise, itself proportional to the mean, pulls b towards 1
and hides multiplicative noise in shallowly sequenced or rare taxa. Taxa enter when
their mean count is at least ``min_mean_count`` and their corrected variance is
positive; the statistic is NaN with fewer than three such taxa. The test is two-sided:
the calibrated null distribution of b (estimation error, autocorrelation and the bend of
p (1 - p) included) comes from the parametric bootstrap.

Weights. Taxon i enters with weight 1/phi_i, phi_i the relative variance of its corrected
variance under the fitted neutral model (up to a factor common to all taxa): with
Var(s^2) ~ (kappa_4 + 2 sigma^4)/T for a sample variance (e.g. Cramer 1946, *Mathematical
Methods of Statistics*, ch. 27), the excess kurtosis ~6/a of a Beta(a, b) abundance with
small a = theta p_i (its Gamma limit; Johnson, Kotz & Balakrishnan 1995, *Continuous
Univariate Distributions 2*, ch. 25), the multinomial noise of relative variance
r = theta mean_t(1/n_t) and fourth cumulant ~p_i / n^3,

    phi_i = 2 (1 + theta mean_t(1/n_t))^2 + 6 / (theta p_i) + theta^2 mean_t(1/n_t^3) / p_i,

with theta and p from the fitted null. Rare taxa (theta p_i < 1) have skewed abundances
whose sample variance is noisy and rises and falls with their sample mean; unweighted,
they tilt the slope upwards by an amount that depends on theta, so the neutral value of b
moved with theta (in snapshots of 40 taxa, 60 samples, depths over a 100-fold range: 1.24
at theta = 10, 1.12 at 30, 1.00 at 500), which a bootstrap at an estimated theta
calibrates only approximately. Weighted, it is 0.97-0.99 over theta = 10-500 (0.99-1.06
in daily series at rate 0.5), while log-normal multiplicative noise still gives ~1.8.

Studentised. The exponent's spread across neutral tables moves with theta, the noise and
the rate, which the bootstrap takes from estimates; so the calibration measures each table's
distance from the replicates' median in units of its own standard error
(:meth:`FluctuationScaling.standard_error`, the weighted least-squares standard error of the
slope from the table's residuals; see :class:`driftscreen.statistics.base.Statistic`).
Against the fitted null, the plain exponent rejected 0.017-0.043 of neutral series at 0.05
(five collections of the validation study, 300 datasets each, B = 199), the studentised one
0.037-0.057, as near the nominal rate as the true parameters gave (0.033-0.063).

Snapshot designs (independent replicate communities) use the same statistic across
samples, so ``needs_time`` is False.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd

from driftscreen.dataset import Design
from driftscreen.neutral.model import NeutralModel, NullFit, sampling_variance_factor
from driftscreen.statistics.base import Alternative

#: Fewest taxa for a slope.
MIN_TAXA = 3


@dataclass(frozen=True)
class TaxonMoments:
    """Mean, raw and sampling-corrected variance of Y_it over samples, ``(R, K)`` each."""

    mean: np.ndarray
    variance: np.ndarray
    corrected: np.ndarray
    mean_count: np.ndarray


@dataclass(frozen=True)
class FluctuationScaling:
    """Taylor exponent b of sampling-corrected variance against mean across taxa.

    Attributes
    ----------
    min_mean_count:
        Least mean read count over samples for a taxon to enter the fit.
    """

    name: ClassVar[str] = "fluctuation_scaling"
    #: How outputs name it, and what its value is (the axis of its null distribution).
    title: ClassVar[str] = "Fluctuation scaling"
    unit: ClassVar[str] = "Taylor exponent b"
    #: What it measures, for the methods paragraph ({groupings}: R).
    methods: ClassVar[str] = (
        "the exponent of Taylor's law between the sampling-corrected variance and the mean "
        "of taxon abundances, weighted by the precision of each taxon's variance (Taylor "
        "1961, Nature 189:732), calibrated in units of each table's own standard error of "
        "the exponent (studentised bootstrap)")
    #: How to read its diagnostics ({abundance_classes}: classes of the report).
    how_to_read: ClassVar[str] = (
        "Mean and variance of each taxon's relative abundance across "
        "samples, the variance corrected for sequencing noise; the line is fitted with "
        "weights that give rare taxa, whose variance is poorly determined, less say. The "
        "neutral expectation is "
        "p (1 - p) / (1 + theta) per taxon; the replicates' exponent also carries sampling "
        "and estimation effects and is what the p-value compares with. b near 1 is "
        "drift-like, b near 2 points to multiplicative environmental noise.")
    needs_time: ClassVar[bool] = False
    alternative: ClassVar[Alternative] = "two-sided"
    marginal: ClassVar[bool] = True
    in_combination: ClassVar[bool] = True
    studentised: ClassVar[bool] = True

    min_mean_count: float = 1.0

    def compute(self, counts: np.ndarray, design: Design, fit: NullFit,
                rng: np.random.Generator) -> np.ndarray:
        """Taylor exponent per table, shape ``(R,)``; NaN with fewer than three usable taxa."""
        moments = taxon_moments(counts, design.depths, fit.noise)
        weights = neutral_weights(fit.p, fit.theta, design.depths)
        _, slope = taylor_fit(moments.mean, moments.corrected, self.usable(moments), weights)
        return slope

    def standard_error(self, counts: np.ndarray, design: Design, fit: NullFit,
                       rng: np.random.Generator) -> np.ndarray:
        """Standard error of each table's slope from its own residuals, shape ``(R,)``."""
        moments = taxon_moments(counts, design.depths, fit.noise)
        weights = neutral_weights(fit.p, fit.theta, design.depths)
        return slope_standard_error(moments.mean, moments.corrected, self.usable(moments),
                                    weights)

    def usable(self, moments: TaxonMoments) -> np.ndarray:
        """Taxa entering the fit: enough reads and a positive corrected variance."""
        return (moments.mean_count >= self.min_mean_count) & (moments.corrected > 0)

    def diagnose(self, counts: np.ndarray, design: Design, model: NeutralModel,
                 rng: np.random.Generator) -> pd.DataFrame:
        """Per taxon: mean, corrected variance, neutral variance, fitted line, weight, use.

        ``neutral_variance`` is the stationary drift variance p (1 - p)/(1 + theta), which
        the sampling-corrected variance estimates under neutrality; ``fitted_variance`` is
        the Taylor line exp(c) mean^b; ``weight`` the taxon's weight in the fit (see the
        module docstring), normalised to sum 1 over the taxa used. The line's intercept c
        and slope b are repeated in every row (``intercept``, ``slope``). ``taxon`` is the
        column index in ``counts``.
        """
        counts = np.asarray(counts)
        moments = taxon_moments(counts[None], design.depths, np.array([model.noise]))
        usable = self.usable(moments)
        weights = neutral_weights(model.p[None], np.array([model.theta]), design.depths)
        intercept, slope = taylor_fit(moments.mean, moments.corrected, usable, weights)
        used_weight = np.where(usable, weights, 0.0)[0]
        mean = moments.mean[0]
        with np.errstate(divide="ignore"):
            fitted = np.exp(intercept[0] + slope[0] * np.log(mean))
        return pd.DataFrame({
            "taxon": np.arange(counts.shape[1]),
            "mean": mean,
            "variance": moments.corrected[0],
            "raw_variance": moments.variance[0],
            "neutral_variance": model.p * (1.0 - model.p) / (1.0 + model.theta),
            "fitted_variance": fitted,
            "weight": used_weight / max(used_weight.sum(), np.finfo(float).tiny),
            "used": usable[0],
            "intercept": intercept[0],
            "slope": slope[0],
        })


def taxon_moments(counts: np.ndarray, depths: np.ndarray,
                  noise: np.ndarray | None = None) -> TaxonMoments:
    """Moments over samples of Y_it = N_it / n_t for a batch ``(R, T, K)``.

    The sampling term Y (1 - Y)/(n_t - 1) is unbiased for the multinomial variance
    X (1 - X)/n_t; with technical noise g (one per table, ``(R,)``) it is scaled by
    n_t s_t / (1 - g), s_t = g + (1 - g)/n_t, to the Dirichlet-multinomial variance
    X (1 - X) s_t (E[Y (1 - Y) | X] = X (1 - X)(1 - s_t)). n_t - 1 is floored at 1 (a
    one-read sample has Y (1 - Y) = 0).
    """
    counts = np.asarray(counts)
    n_samples = counts.shape[1]
    depths = depths.astype(np.float64)
    relative = counts / depths[:, None]
    mean = relative.mean(axis=1)
    second = np.einsum("rtk,rtk->rk", relative, relative) / n_samples
    ddof = max(n_samples - 1, 1)
    variance = np.maximum(second - mean * mean, 0.0) * (n_samples / ddof)
    noise = np.zeros(counts.shape[0]) if noise is None else noise
    scale = depths * sampling_variance_factor(depths, noise) / (1.0 - noise)[:, None]   # (R, T)
    inverse = scale / np.maximum(depths - 1.0, 1.0)
    sampling = (np.einsum("rtk,rt->rk", relative, inverse)
                - np.einsum("rtk,rtk,rt->rk", relative, relative, inverse)) / n_samples
    mean_count = counts.sum(axis=1) / n_samples
    return TaxonMoments(mean, variance, variance - sampling, mean_count)


def neutral_weights(p: np.ndarray, theta: np.ndarray, depths: np.ndarray) -> np.ndarray:
    """1/phi_i: inverse relative variance of the corrected variance under neutrality, ``(R, K)``.

    phi_i = 2 (1 + theta mean_t(1/n_t))^2 + 6/(theta p_i) + theta^2 mean_t(1/n_t^3)/p_i (see
    the module docstring); taxa with p_i = 0 get weight 0.
    """
    depths = depths.astype(np.float64)
    theta = theta[:, None]
    sampling = theta * np.mean(1.0 / depths)
    with np.errstate(divide="ignore"):
        rarity = 1.0 / (theta * p)
    phi = 2.0 * (1.0 + sampling) ** 2 + rarity * (6.0 + theta**3 * np.mean(depths**-3.0))
    return np.where(p > 0, 1.0 / phi, 0.0)


def taylor_fit(mean: np.ndarray, variance: np.ndarray, usable: np.ndarray,
               weights: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Weighted least squares of log variance on log mean over the usable taxa of each table.

    Parameters
    ----------
    mean, variance, usable:
        Shape ``(R, K)``; unusable entries are ignored (and may be zero or negative).
    weights:
        Positive weights ``(R, K)`` (the statistic uses :func:`neutral_weights`); ``None``
        for equal weights (ordinary least squares).

    Returns
    -------
    intercept, slope:
        Shape ``(R,)``; NaN where fewer than three taxa are usable or their means are equal.
    """
    line = TaylorLine.through(mean, variance, usable, weights)
    return line.intercept, line.slope


def slope_standard_error(mean: np.ndarray, variance: np.ndarray, usable: np.ndarray,
                         weights: np.ndarray | None = None) -> np.ndarray:
    """Standard error of the :func:`taylor_fit` slope from its weighted residuals, ``(R,)``.

    se^2 = sum_i w_i r_i^2 / ((n - 2) sum_i w_i (x_i - x_bar)^2), the usual weighted
    least-squares estimate with weights known up to a common factor (e.g. Draper & Smith
    1998, *Applied Regression Analysis*, 3rd ed.). NaN where the slope is.
    """
    return TaylorLine.through(mean, variance, usable, weights).slope_standard_error()


@dataclass(frozen=True)
class TaylorLine:
    """The weighted least-squares line of log variance on log mean, per table."""

    weight: np.ndarray
    log_mean: np.ndarray
    log_variance: np.ndarray
    n_used: np.ndarray
    sxx: np.ndarray
    intercept: np.ndarray
    slope: np.ndarray

    @classmethod
    def through(cls, mean: np.ndarray, variance: np.ndarray, usable: np.ndarray,
                weights: np.ndarray | None = None) -> "TaylorLine":
        """Fit the line over the usable taxa of each table (see :func:`taylor_fit`)."""
        weight = np.where(usable, 1.0 if weights is None else weights, 0.0)
        log_mean = np.log(np.where(usable, mean, 1.0))
        log_variance = np.log(np.where(usable, variance, 1.0))
        n_used = np.count_nonzero(usable, axis=1)
        total = np.maximum(weight.sum(axis=1), np.finfo(float).tiny)
        x_bar = (weight * log_mean).sum(axis=1) / total
        y_bar = (weight * log_variance).sum(axis=1) / total
        dx = log_mean - x_bar[:, None]
        sxx = (weight * dx * dx).sum(axis=1)
        sxy = (weight * dx * (log_variance - y_bar[:, None])).sum(axis=1)
        defined = (n_used >= MIN_TAXA) & (sxx > 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            slope = np.where(defined, sxy / sxx, np.nan)
        intercept = np.where(defined, y_bar - slope * x_bar, np.nan)
        return cls(weight, log_mean, log_variance, n_used, sxx, intercept, slope)

    def slope_standard_error(self) -> np.ndarray:
        """se of the slope from the weighted residuals, ``(R,)`` (see
        :func:`slope_standard_error`)."""
        fitted = self.intercept[:, None] + self.slope[:, None] * self.log_mean
        residual = self.log_variance - fitted
        squares = (self.weight * residual * residual).sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.sqrt(squares / ((self.n_used - 2) * self.sxx))
