"""Cauchy combination of p-values.

Liu Y., Xie J. (2020) "Cauchy combination test: a powerful test with analytic p-value
calculation under arbitrary dependency structures", J. Am. Stat. Assoc. 115(529):393-402.
Each p-value is mapped to a standard Cauchy variate tan((1/2 - p) pi); the weighted sum

    T = sum_j w_j tan((1/2 - p_j) pi)

divided by sum_j w_j is standard Cauchy under the null when the p-values are independent
and uniform, and has approximately that tail under arbitrary dependence, so

    p = 1/2 - arctan(T / sum_j w_j) / pi.
"""

from __future__ import annotations

import numpy as np

#: Below this p-value tan((1/2 - p) pi) loses precision; 1/(p pi) is exact to O(p^2) there.
TINY_PVALUE = 1e-15
#: p-values above this are treated as this value: tan(-pi/2) is infinite, and an infinite
#: negative term would make a sum with an exact zero p-value undefined.
LARGEST_PVALUE = 1.0 - 2.0**-53


def cauchy_transform(pvalues: np.ndarray) -> np.ndarray:
    """tan((1/2 - p) pi), computed as 1/(p pi) for p < 1e-15 (infinite below ~5.6e-309).

    p-values equal to 1 are mapped as p = 1 - 2^-53 (a large finite negative value).
    NaN stays NaN.
    """
    p = np.minimum(np.asarray(pvalues, dtype=np.float64), LARGEST_PVALUE)
    tiny = p < TINY_PVALUE
    with np.errstate(divide="ignore", over="ignore"):
        small_form = 1.0 / (np.where(tiny, p, 1.0) * np.pi)
    return np.where(tiny, small_form, np.tan((0.5 - p) * np.pi))


def cauchy_combination(pvalues: np.ndarray, weights: np.ndarray | None = None,
                       axis: int = -1) -> tuple[np.ndarray, np.ndarray]:
    """Combine p-values along ``axis`` by the Cauchy combination test (Liu & Xie 2020).

    Parameters
    ----------
    pvalues:
        p-values in [0, 1]; any shape. NaN entries make the result NaN (pass weight 0
        and a placeholder value to skip them).
    weights:
        Non-negative weights broadcastable to ``pvalues``; default equal weights 1/k
        (k = length of ``axis``), so that T itself is standard Cauchy under the null.
    axis:
        Axis along which to combine.

    Returns
    -------
    statistic, pvalue:
        T = sum_j w_j tan((1/2 - p_j) pi) and 1/2 - arctan(T / sum_j w_j) / pi, with
        ``axis`` removed (0-d arrays for a 1-D input).
    """
    pvalues = np.asarray(pvalues, dtype=np.float64)
    if np.any(pvalues < 0) or np.any(pvalues > 1):
        raise ValueError("p-values must lie in [0, 1]")
    if weights is None:
        weights = np.full(pvalues.shape, 1.0 / pvalues.shape[axis])
    weights = np.broadcast_to(np.asarray(weights, dtype=np.float64), pvalues.shape)
    if np.any(weights < 0):
        raise ValueError("weights must be non-negative")
    terms = np.where(weights > 0, weights * cauchy_transform(pvalues), 0.0)
    statistic = terms.sum(axis=axis)
    total_weight = weights.sum(axis=axis)
    with np.errstate(divide="ignore", invalid="ignore"):
        pvalue = 0.5 - np.arctan(statistic / total_weight) / np.pi
    return statistic, pvalue
