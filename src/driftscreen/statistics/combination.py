"""Combinations of p-values: the harmonic mean p-value (used by ``combined``) and Cauchy.

Harmonic mean p-value (Wilson D.J. (2019) "The harmonic mean p-value for combining
dependent tests", PNAS 116(4):1195-1200): with weights w_j summing to 1,

    HMP = 1 / sum_j (w_j / p_j).

It is dominated by the smallest p-values, as the Cauchy combination is (both have the
same 1/p tail), but a p-value of 1 adds only w_j to the denominator: one statistic that
sees nothing cannot cancel strong evidence in the others. (In the Cauchy transform a
p-value of 1 is -inf, and a bootstrap p-value of exactly 1 -- all replicates at least as
extreme -- maps to about -3e15 and annuls every other term.) driftscreen calibrates the
HMP against the replicates, so neither its level nor Wilson's asymptotic Landau
correction is needed.

Cauchy combination: Liu Y., Xie J. (2020) "Cauchy combination test: a powerful test with analytic p-value
calculation under arbitrary dependency structures", J. Am. Stat. Assoc. 115(529):393-402.
Each p-value is mapped to a standard Cauchy variate tan((1/2 - p) pi); the weighted sum

    T = sum_j w_j tan((1/2 - p_j) pi)

divided by sum_j w_j is standard Cauchy under the null when the p-values are independent
and uniform, and has approximately that tail under arbitrary dependence, so

    p = 1/2 - arctan(T / sum_j w_j) / pi.
"""

from __future__ import annotations

import numpy as np

#: p-values above this are treated as this value: tan(-pi/2) is infinite, and an infinite
#: negative term would make a sum with an exact zero p-value undefined.
LARGEST_PVALUE = 1.0 - 2.0**-53


def cauchy_transform(pvalues: np.ndarray) -> np.ndarray:
    """tan((1/2 - p) pi) = 1 / tan(p pi), in the form that keeps relative precision.

    For p <= 1/2 the reciprocal form is used (tan((1/2 - p) pi) loses all relative
    precision as p -> 0, where 1/tan(p pi) ~ 1/(p pi) does not); p = 0 gives +inf.
    p-values equal to 1 are mapped as p = 1 - 2^-53 (a large finite negative value).
    NaN stays NaN.
    """
    p = np.minimum(np.asarray(pvalues, dtype=np.float64), LARGEST_PVALUE)
    small = p <= 0.5
    with np.errstate(divide="ignore", over="ignore"):
        reciprocal = 1.0 / np.tan(np.where(small, p, 0.25) * np.pi)
    return np.where(small, reciprocal, np.tan((0.5 - p) * np.pi))


def cauchy_sf(x: np.ndarray) -> np.ndarray:
    """Standard Cauchy survival function 1/2 - arctan(x)/pi, as arctan(1/x)/pi for x > 0."""
    x = np.asarray(x, dtype=np.float64)
    positive = x > 0
    with np.errstate(divide="ignore"):
        tail = np.arctan(1.0 / np.where(positive, x, 1.0)) / np.pi
    return np.where(positive, tail, 0.5 - np.arctan(x) / np.pi)


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
        pvalue = cauchy_sf(statistic / total_weight)
    return statistic, pvalue


def harmonic_mean_pvalue(pvalues: np.ndarray, weights: np.ndarray | None = None,
                         axis: int = -1) -> np.ndarray:
    """Weighted harmonic mean p-value along ``axis`` (Wilson 2019, PNAS 116:1195).

    Parameters
    ----------
    pvalues:
        p-values in [0, 1]; any shape. NaN entries make the result NaN (give them
        weight 0 and any placeholder to skip them).
    weights:
        Non-negative weights broadcastable to ``pvalues``; default equal. They are
        normalised to sum to 1 along ``axis``.
    axis:
        Axis along which to combine.

    Returns
    -------
    np.ndarray
        sum_j w_j / sum_j (w_j / p_j) with ``axis`` removed; 0 when a weighted p-value is
        0, NaN when every weight is 0.
    """
    pvalues = np.asarray(pvalues, dtype=np.float64)
    if np.any(pvalues < 0) or np.any(pvalues > 1):
        raise ValueError("p-values must lie in [0, 1]")
    weights = (np.ones(pvalues.shape) if weights is None
               else np.broadcast_to(np.asarray(weights, dtype=np.float64), pvalues.shape))
    if np.any(weights < 0):
        raise ValueError("weights must be non-negative")
    with np.errstate(divide="ignore", invalid="ignore"):
        inverse = np.where(weights > 0, weights / pvalues, 0.0).sum(axis=axis)
        return weights.sum(axis=axis) / inverse
