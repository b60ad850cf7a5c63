"""Dirichlet draws with a different shape vector on every row, safe for tiny shapes.

``numpy.random.Generator.dirichlet`` takes one shape vector only, and normalising raw
gamma variates fails when shapes are tiny: a Gamma(a) variate is below 1e-308 with
probability ~ 1e-308^a / Gamma(a + 1) (0.49 for a = 1e-3) and numpy then returns 0, so a
row of tiny shapes can come out as 0/0.

Why plain gamma variates are safe for most rows: a row's gamma sum is Gamma(a_total).
If ``a_total >= 1`` the sum is below 1e-290 with probability <= 1e-290, so components
that underflow to 0 (or lose precision as subnormals, below ~2e-308) are below ~1e-18 of
the sum -- relative errors no float64 result could show. Only rows with a small total
shape need the exact log-space identity ``G(a) = G(a + 1) U^(1/a)`` (the boost for
a < 1 in Marsaglia & Tsang 2000, ACM TOMS 26; U uniform on (0, 1]), kept in logs and
normalised by the row maximum, which can never make a whole row vanish. Rows are
selected by their total shape, which depends only on ``alpha`` (not on the draws), so
the selection introduces no bias; selecting whole rows is cheap, masking single entries
is not.
"""

from __future__ import annotations

import numpy as np

SAFE_TOTAL_SHAPE = 1.0
"""Rows whose shapes sum to at least this are drawn with plain gamma variates."""


def log_standard_gamma(shape: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Logarithms of Gamma(shape) variates, finite for every shape > 0.

    Uses ``log G(a) = log G(a + 1) + log(U) / a`` with ``U`` uniform on (0, 1]
    (Marsaglia & Tsang 2000), exact for all ``a > 0``; shape 0 gives
    ``-inf`` (a variate of exactly 0).
    """
    shape = np.asarray(shape, dtype=np.float64)
    log_gamma = np.log(rng.standard_gamma(shape + 1.0))
    log_uniform = np.log1p(-rng.random(shape.shape))
    with np.errstate(divide="ignore"):
        log_gamma += log_uniform / shape
    return log_gamma


def _log_space_rows(alpha: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Gamma variates of each row divided by the row maximum (so the maximum is 1)."""
    log_gamma = log_standard_gamma(alpha, rng)
    row_max = log_gamma.max(axis=1, keepdims=True)
    if not np.all(np.isfinite(row_max)):
        raise ValueError("positive Dirichlet shapes must be at least ~1e-300")
    log_gamma -= row_max
    return np.exp(log_gamma)


def dirichlet_rows(alpha: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Rows of Dirichlet(alpha[r]) for a 2-D ``alpha`` of shape ``(R, K)``.

    Normalised gamma variates (the standard construction of the Dirichlet law); rows
    whose total shape is below ``SAFE_TOTAL_SHAPE`` use the log-space identity (see the
    module docstring). ``alpha = 0`` gives exactly 0; the result is never NaN and no row
    is all zeros.

    Parameters
    ----------
    alpha:
        Non-negative shapes, shape ``(R, K)``; every row needs a positive entry.
    rng:
        Source of randomness.

    Returns
    -------
    np.ndarray
        Float64 compositions, shape ``(R, K)``, rows summing to 1 up to rounding.
    """
    alpha = np.asarray(alpha, dtype=np.float64)
    if alpha.ndim != 2:
        raise ValueError("alpha must be a 2-D (rows, categories) array")
    totals = alpha.sum(axis=1)
    if not np.all(np.isfinite(totals)) or np.any(totals <= 0) or np.any(alpha < 0):
        raise ValueError("alpha must be finite, non-negative, with a positive entry per row")
    return dirichlet_rows_unchecked(alpha, totals, rng)


def dirichlet_rows_unchecked(alpha: np.ndarray, totals: np.ndarray,
                             rng: np.random.Generator) -> np.ndarray:
    """:func:`dirichlet_rows` for shapes already known to be valid, given their row sums.

    For the simulator's inner loop, where ``alpha = theta p + L`` is valid by
    construction and the per-entry checks would cost a pass over the array.
    """
    small = totals < SAFE_TOTAL_SHAPE
    if small.any():
        gamma = np.empty_like(alpha)
        gamma[~small] = rng.standard_gamma(alpha[~small])
        gamma[small] = _log_space_rows(alpha[small], rng)
    else:
        gamma = rng.standard_gamma(alpha)
    sums = gamma.sum(axis=1)
    vanished = sums == 0.0
    if vanished.any():  # probability <= 1e-308 per row; redraw exactly in log space
        gamma[vanished] = _log_space_rows(alpha[vanished], rng)
        sums[vanished] = gamma[vanished].sum(axis=1)
    gamma /= sums[:, None]
    return gamma
