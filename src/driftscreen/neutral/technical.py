"""Technical noise from technical replicates: sequenced samples of one biological sample.

Two reads j, k of the same community x (the same extract or library sequenced twice) are,
under the null, independent Dirichlet-multinomial draws Multinomial(n, Dirichlet(C x))
given x (Mosimann 1962, Biometrika 49:65). With g = 1/(1 + C), relative abundances Y and
s = g + (1 - g)/n,

    E[sum_i (Y_ij - Y_ik)^2] = H (s_j + s_k),      H = 1 - sum_i x_i^2,
    E[sum_i Y_ij Y_ik] = sum_i x_i^2,

so H_jk = 1 - sum_i Y_ij Y_ik is unbiased for H, and the pooled moment equation

    g = sum_pairs [d_jk - H_jk (1/n_j + 1/n_k)] / sum_pairs H_jk (2 - 1/n_j - 1/n_k)

estimates g without any assumption on drift (design note, section 8). Nothing else in
the data identifies g for a snapshot design.
"""

from __future__ import annotations

import numpy as np

#: Largest technical noise the estimate is clipped to: g = 1/2, a read precision C = 1
#: (the least precise reads the nugget estimate of :mod:`driftscreen.neutral.fit` allows).
MAX_REPLICATE_NOISE = 0.5


def replicate_noise(kept: np.ndarray, extra: np.ndarray, kept_depths: np.ndarray,
                    extra_depths: np.ndarray) -> np.ndarray:
    """g-hat = 1/(1 + C-hat) of every table from its pairs of technical replicates, ``(R,)``.

    Each pair is a kept sample with one of its other sequenced samples (a biological
    sample sequenced m times gives m - 1 pairs, all sharing the kept sample); pairs are
    pooled in the sums of the module's moment equation, and the estimate is clipped to
    [0, :data:`MAX_REPLICATE_NOISE`].

    Parameters
    ----------
    kept, extra:
        Reads of the two members of every pair, ``(R, E, K)`` each (R tables, E pairs).
    kept_depths, extra_depths:
        Their depths, ``(E,)`` (the row sums).
    """
    kept_depths = np.asarray(kept_depths, dtype=np.float64)
    extra_depths = np.asarray(extra_depths, dtype=np.float64)
    first = np.asarray(kept, dtype=np.float64) / kept_depths[:, None]
    second = np.asarray(extra, dtype=np.float64) / extra_depths[:, None]
    squared = np.sum((first - second) ** 2, axis=-1)
    hetero = 1.0 - np.sum(first * second, axis=-1)
    inverse = 1.0 / kept_depths + 1.0 / extra_depths
    excess = np.sum(squared - hetero * inverse, axis=-1)
    scale = np.sum(hetero * (2.0 - inverse), axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        noise = np.where(scale > 0, excess / scale, 0.0)
    return np.clip(noise, 0.0, MAX_REPLICATE_NOISE)
