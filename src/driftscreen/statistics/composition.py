"""The composition estimate the rare-taxa statistics share: precision-weighted read fractions."""

from __future__ import annotations

import numpy as np

from driftscreen.dataset import Design
from driftscreen.neutral.fit import start_corrected


def precision_weighted_composition(counts: np.ndarray, depths: np.ndarray,
                                   theta: np.ndarray) -> np.ndarray:
    """Inverse-variance weighted mean relative abundance of every taxon, shape ``(R, K)``.

    At stationarity Var(N_it / n_t) = p_i (1 - p_i)(v + (1 - v)/n_t), v = 1/(1 + theta)
    (design note, section 2), so weighting sample t by 1/(v + (1 - v)/n_t) gives the
    precision-weighted estimate sum_t u_t N_it / sum_t u_t n_t, u_t = 1/(1 + (n_t - 1) v).
    With equal depths it is the pooled fraction (the fitted p); with depths that vary it
    is far less noisy than the pooled fraction, which leans on the deepest samples
    although drift, not sampling, dominates their variance. Rows sum to 1; taxa without
    reads get 0.
    """
    v = 1.0 / (1.0 + theta)
    weights = 1.0 / (1.0 + (depths - 1.0) * v[:, None])                  # (R, T)
    weighted = np.einsum("rtk,rt->rk", counts, weights)
    return weighted / (weights @ depths)[:, None]


def relaxation_weights(design: Design, rate: np.ndarray) -> np.ndarray:
    """e_t = exp(-rate (t - t_0)): the weight of the first sample in the neutral mean at each
    time, E[X(t) | x_0] = p + (x_0 - p) e_t (design note, section 2), shape ``(R, T)``."""
    return np.exp(-rate[:, None] * (design.times - design.times[0])[None, :])


def path_composition(counts: np.ndarray, depths: np.ndarray, theta: np.ndarray,
                     start_weight: np.ndarray) -> np.ndarray:
    """The point a series conditioned on its first sample relaxes to, precision-weighted.

    The precision-weighted composition (:func:`precision_weighted_composition`, weights
    omega_t proportional to u_t n_t) has expectation p (1 - e) + Y_0 e given the first read
    fraction Y_0, e = sum_t omega_t e_t (``start_weight`` e_t, ``(R, T)``), and is corrected
    to p as the fit corrects its own (:func:`driftscreen.neutral.fit.start_corrected`).
    Shape ``(R, K)``.
    """
    v = 1.0 / (1.0 + theta)
    weights = depths / (1.0 + (depths - 1.0) * v[:, None])                # (R, T)
    share = np.einsum("rt,rt->r", weights, start_weight) / weights.sum(axis=1)
    return start_corrected(precision_weighted_composition(counts, depths, theta),
                           counts[:, 0, :] / depths[0], share)
