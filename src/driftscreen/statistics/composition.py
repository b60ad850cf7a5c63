"""The composition estimate the rare-taxa statistics share: precision-weighted read fractions."""

from __future__ import annotations

import numpy as np


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
