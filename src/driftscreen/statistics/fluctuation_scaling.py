"""``fluctuation_scaling``: Taylor's power-law exponent of abundance fluctuations.

Basis. Taylor's law (Taylor 1961, Nature 189:732-735, "Aggregation, variance and the
mean"): across taxa, log var_i = c + b log mean_i. In the neutral model the stationary
variance of a taxon's relative abundance is p_i (1 - p_i)/(1 + theta) (design note,
section 2), so b is close to 1 for rare taxa (a little below 1 once abundant taxa bend
p (1 - p) down), whereas multiplicative environmental noise, the niche-side
explanation of abundance fluctuations in microbial communities, gives b close to 2
(Grilli 2020, Nat. Commun. 11:4743, "Macroecological laws describe variation and
diversity in microbial communities").

Statistic: the OLS slope b over taxa of the log sampling-corrected variance on the log
mean of the relative abundance Y_it = N_it / n_t across samples. The variance is
corrected for multinomial sampling,

    var_i = sample variance_t(Y_it) - mean_t Y_it (1 - Y_it) / (n_t - 1)

(E[Y(1 - Y)/(n - 1) | X] = X(1 - X)/n is the sampling variance; design note section 5),
because uncorrected sampling noise, itself proportional to the mean, pulls b towards 1
and hides multiplicative noise in shallowly sequenced or rare taxa. Taxa enter when
their mean count is at least ``min_mean_count`` and their corrected variance is
positive; with neutral data a good share of taxa qualify whenever drift is visible above
sampling noise, and the statistic is NaN only with fewer than three such taxa. The test
is two-sided: the calibrated null distribution of b (estimation error, autocorrelation
and the bend of p (1 - p) included) comes from the parametric bootstrap.

Snapshot designs (independent replicate communities) use the same statistic across
samples, so ``needs_time`` is False.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd

from driftscreen.dataset import Design
from driftscreen.neutral.model import NeutralModel, NullFit
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
    needs_time: ClassVar[bool] = False
    alternative: ClassVar[Alternative] = "two-sided"
    marginal: ClassVar[bool] = True

    min_mean_count: float = 1.0

    def compute(self, counts: np.ndarray, design: Design, fit: NullFit,
                rng: np.random.Generator) -> np.ndarray:
        """Taylor exponent per table, shape ``(R,)``; NaN with fewer than three usable taxa."""
        moments = taxon_moments(counts, design.depths)
        _, slope = taylor_fit(moments.mean, moments.corrected, self.usable(moments))
        return slope

    def usable(self, moments: TaxonMoments) -> np.ndarray:
        """Taxa entering the fit: enough reads and a positive corrected variance."""
        return (moments.mean_count >= self.min_mean_count) & (moments.corrected > 0)

    def diagnose(self, counts: np.ndarray, design: Design, model: NeutralModel,
                 rng: np.random.Generator) -> pd.DataFrame:
        """Per taxon: mean, corrected variance, neutral variance, fitted line, use.

        ``neutral_variance`` is the stationary drift variance p (1 - p)/(1 + theta), which
        the sampling-corrected variance estimates under neutrality; ``fitted_variance`` is
        the Taylor line exp(c) mean^b. The line's intercept c and slope b are repeated in
        every row (``intercept``, ``slope``). ``taxon`` is the column index in ``counts``.
        """
        counts = np.asarray(counts)
        moments = taxon_moments(counts[None], design.depths)
        usable = self.usable(moments)
        intercept, slope = taylor_fit(moments.mean, moments.corrected, usable)
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
            "used": usable[0],
            "intercept": intercept[0],
            "slope": slope[0],
        })


def taxon_moments(counts: np.ndarray, depths: np.ndarray) -> TaxonMoments:
    """Moments over samples of Y_it = N_it / n_t for a batch ``(R, T, K)``.

    The sampling term uses n_t - 1, floored at 1 (a one-read sample has Y (1 - Y) = 0).
    """
    counts = np.asarray(counts)
    n_samples = counts.shape[1]
    depths = depths.astype(np.float64)
    relative = counts / depths[:, None]
    mean = relative.mean(axis=1)
    second = np.einsum("rtk,rtk->rk", relative, relative) / n_samples
    ddof = max(n_samples - 1, 1)
    variance = np.maximum(second - mean * mean, 0.0) * (n_samples / ddof)
    inverse = 1.0 / np.maximum(depths - 1.0, 1.0)
    sampling = (np.einsum("rtk,t->rk", relative, inverse)
                - np.einsum("rtk,rtk,t->rk", relative, relative, inverse)) / n_samples
    mean_count = counts.sum(axis=1) / n_samples
    return TaxonMoments(mean, variance, variance - sampling, mean_count)


def taylor_fit(mean: np.ndarray, variance: np.ndarray, usable: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray]:
    """OLS of log variance on log mean over the usable taxa of each table.

    Parameters
    ----------
    mean, variance, usable:
        Shape ``(R, K)``; unusable entries are ignored (and may be zero or negative).

    Returns
    -------
    intercept, slope:
        Shape ``(R,)``; NaN where fewer than three taxa are usable or their means are equal.
    """
    weight = usable.astype(np.float64)
    log_mean = np.log(np.where(usable, mean, 1.0))
    log_variance = np.log(np.where(usable, variance, 1.0))
    n_used = weight.sum(axis=1)
    safe_n = np.maximum(n_used, 1.0)
    x_bar = (weight * log_mean).sum(axis=1) / safe_n
    y_bar = (weight * log_variance).sum(axis=1) / safe_n
    dx = weight * (log_mean - x_bar[:, None])
    sxx = (dx * dx).sum(axis=1)
    sxy = (dx * (log_variance - y_bar[:, None])).sum(axis=1)
    defined = (n_used >= MIN_TAXA) & (sxx > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = np.where(defined, sxy / sxx, np.nan)
    return np.where(defined, y_bar - slope * x_bar, np.nan), slope
