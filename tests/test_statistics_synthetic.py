"""Synthetic neutral and niche count tables for the statistics tests, and checks of them.

Neutral tables come from the package's exact simulator and are fitted with the package's
estimator, exactly as the calibration treats bootstrap replicates. The niche tables are
simple generators kept here so that the statistics tests do not depend on the niche
simulators:

* ``lognormal_series``: multiplicative log-normal noise, AR(1) in time (Taylor exponent 2;
  Grilli 2020, Nat. Commun. 11:4743).
* ``heterogeneous_dispersion``: independent Beta abundances with taxon-specific theta_i.
* ``on_off``: habitat filtering, each taxon absent from a random share of the samples.
"""

from __future__ import annotations

import numpy as np

from driftscreen.dataset import Design
from driftscreen.neutral.fit import fit_batch
from driftscreen.neutral.model import NeutralModel, NullFit, NullOptions
from driftscreen.neutral.simulate import simulate


def composition(n_taxa: int, seed: int, spread: float = 1.5) -> np.ndarray:
    """A metacommunity p with log-normal weights (Preston 1948, Ecology 29:254), sorted."""
    weights = np.exp(np.random.default_rng(seed).normal(0.0, spread, n_taxa))
    return np.sort(weights / weights.sum())[::-1]


def daily_design(n_samples: int, depth: int | np.ndarray = 5000) -> Design:
    """A daily time series; ``depth`` a number or one depth per sample."""
    depths = np.broadcast_to(np.asarray(depth, dtype=np.int64), (n_samples,)).copy()
    return Design(depths=depths, times=np.arange(n_samples, dtype=float))


def snapshot_design(n_samples: int, depth: int | np.ndarray = 5000) -> Design:
    """A snapshot design (replicate communities, no times)."""
    return Design(depths=np.broadcast_to(np.asarray(depth, dtype=np.int64), (n_samples,)).copy())


def varying_depths(n_samples: int, seed: int, low: int = 200, high: int = 20000) -> np.ndarray:
    """Depths log-uniform between ``low`` and ``high`` (a 100-fold range by default)."""
    rng = np.random.default_rng(seed)
    depths = np.exp(rng.uniform(np.log(low), np.log(high), n_samples))
    depths[:2] = low, high
    return np.rint(depths).astype(np.int64)


#: The statistics are tested under a null with multinomial reads: whether estimating
#: technical noise costs power is measured on whole tests in the validation study (niche
#: collections with and without noisy reads), not here.
MULTINOMIAL = NullOptions(noise="off")


def neutral_batch(p: np.ndarray, theta: float, rate: float | None, design: Design,
                  n_replicates: int, seed: int) -> tuple[np.ndarray, NullFit]:
    """Exact neutral replicates with ``design`` and their fitted nulls."""
    model = NeutralModel(p, theta, rate if design.is_time_series else None)
    counts = simulate(model, design, n_replicates, np.random.default_rng(seed))
    return counts, fit_batch(counts, design, MULTINOMIAL)


def fitted(counts: np.ndarray, design: Design) -> tuple[np.ndarray, NullFit]:
    """``counts`` and their fitted nulls."""
    return counts, fit_batch(counts, design, MULTINOMIAL)


def fit_rows(fit: NullFit, rows: slice) -> NullFit:
    """The fits of the tables ``rows`` of a batch."""
    rate = None if fit.rate is None else fit.rate[rows]
    return NullFit(fit.p[rows], fit.theta[rows], rate, fit.clipped[rows], fit.noise[rows],
                   fit.conditioned)


def sequence(fractions: np.ndarray, depths: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Multinomial reads of ``depths[t]`` from ``fractions[..., t, :]``, int64 counts."""
    fractions = fractions / fractions.sum(axis=-1, keepdims=True)
    n = np.broadcast_to(depths, fractions.shape[:-1])
    return rng.multinomial(n, fractions).astype(np.int64)


def gaussian_ar1(shape: tuple[int, int, int], correlation: float,
                 rng: np.random.Generator) -> np.ndarray:
    """Stationary N(0, 1) AR(1) series along axis 1 of ``shape`` (R, T, K)."""
    noise = rng.standard_normal(shape)
    innovation = np.sqrt(1.0 - correlation**2)
    for t in range(1, shape[1]):
        noise[:, t] = correlation * noise[:, t - 1] + innovation * noise[:, t]
    return noise


def lognormal_series(p: np.ndarray, log_sd: np.ndarray | float, correlation: float,
                     design: Design, n_replicates: int, seed: int) -> np.ndarray:
    """Niche: log X_it = log p_i + s_i Z_it, Z a Gaussian AR(1) in time, then normalised.

    Var X_i ~ (exp(s_i^2) - 1) p_i^2 for rare taxa: Taylor exponent 2 when the s_i are equal.
    """
    rng = np.random.default_rng(seed)
    noise = gaussian_ar1((n_replicates, design.n_samples, p.size), correlation, rng)
    log_sd = np.asarray(log_sd, dtype=float)
    return sequence(p * np.exp(log_sd * noise), design.depths, rng)


def heterogeneous_dispersion(p: np.ndarray, thetas: np.ndarray, design: Design,
                             n_replicates: int, seed: int) -> np.ndarray:
    """Niche: X_it ~ Beta(theta_i p_i, theta_i (1 - p_i)) independently, then normalised."""
    rng = np.random.default_rng(seed)
    shape = (n_replicates, design.n_samples, p.size)
    fractions = rng.beta(np.broadcast_to(thetas * p, shape),
                         np.broadcast_to(thetas * (1.0 - p), shape))
    return sequence(fractions, design.depths, rng)


def on_off(p: np.ndarray, theta: float, presence: float, design: Design, n_replicates: int,
           seed: int) -> np.ndarray:
    """Niche: stationary Dirichlet abundances, each taxon kept with probability ``presence``."""
    rng = np.random.default_rng(seed)
    shape = (n_replicates, design.n_samples, p.size)
    fractions = rng.gamma(np.broadcast_to(theta * p, shape))
    fractions *= rng.random(shape) < presence
    fractions[..., 0] += 1e-12          # no sample without any taxon
    return sequence(fractions, design.depths, rng)


def test_lognormal_series_has_the_planted_log_scale_moments():
    # log X_it - log X_jt has variance s_i^2 + s_j^2 and lag-one correlation rho for AR(1)
    # noise (Box & Jenkins 1976, "Time Series Analysis", AR(1) autocorrelation rho^k).
    design = daily_design(400, depth=10**9)
    p = np.full(2, 0.5)
    counts = lognormal_series(p, np.array([0.6, 0.0]), 0.7, design, 50, seed=3)
    log_ratio = np.log(counts[..., 0] / counts[..., 1])
    centred = log_ratio - log_ratio.mean(axis=1, keepdims=True)
    variance = np.mean(centred**2)
    lag_one = np.mean(centred[:, 1:] * centred[:, :-1]) / variance
    # 50 x 400 autocorrelated values: effective size ~ 20000 (1 - 0.7)/(1 + 0.7) ~ 3500, so the
    # SE of the variance is ~ 0.36 sqrt(2/3500) ~ 0.009 and of the correlation ~ 0.012 (common
    # practice); 5 SE tolerances.
    assert abs(variance - 0.36) < 0.045
    assert abs(lag_one - 0.7) < 0.06


def test_heterogeneous_dispersion_separates_taxon_variances():
    # Before normalisation Var X_i = p_i (1 - p_i)/(1 + theta_i) (Beta variance; Johnson, Kotz
    # & Balakrishnan 1995, Continuous Univariate Distributions 2, ch. 25): theta_i = 5 vs 500
    # is a factor 84. Normalising by the row sum mixes the taxa, so only a wide gap is
    # claimed (factor > 10; common practice).
    design = snapshot_design(1000, depth=10**9)
    p = np.full(40, 1 / 40)
    thetas = np.where(np.arange(40) % 2 == 0, 5.0, 500.0)
    counts = heterogeneous_dispersion(p, thetas, design, 1, seed=4)[0]
    variance = (counts / design.depths[:, None]).var(axis=0)
    assert variance[0::2].mean() > 10 * variance[1::2].mean()
