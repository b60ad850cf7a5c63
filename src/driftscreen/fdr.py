"""False discovery rate control across the datasets of a screen.

Benjamini & Hochberg (1995), "Controlling the false discovery rate: a practical and
powerful approach to multiple testing", J. R. Stat. Soc. B 57:289-300. For m p-values
sorted increasingly, p_(1) <= ... <= p_(m), the adjusted value (q-value) of p_(i) is

    q_(i) = min_{j >= i} min(1, m p_(j) / j),

and rejecting every hypothesis with q <= alpha is the step-up procedure at level alpha.
Undefined (NaN) p-values are not tests: they are left out of m and get a NaN q-value.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
from numpy.typing import ArrayLike


def benjamini_hochberg(pvalues: ArrayLike) -> np.ndarray:
    """Benjamini-Hochberg (1995) adjusted p-values (q-values); NaN in, NaN out.

    Parameters
    ----------
    pvalues:
        One-dimensional p-values in [0, 1]; NaN marks an undefined test.

    Returns
    -------
    numpy.ndarray
        q-values of the same shape, in the input order.
    """
    p = np.asarray(pvalues, dtype=np.float64)
    if p.ndim != 1:
        raise ValueError("pvalues must be one-dimensional")
    defined = ~np.isnan(p)
    if np.any((p[defined] < 0) | (p[defined] > 1)):
        raise ValueError("p-values must lie in [0, 1]")
    q = np.full(p.shape, np.nan)
    finite = p[defined]
    m = finite.size
    if m == 0:
        return q
    order = np.argsort(finite, kind="stable")
    scaled = finite[order] * m / np.arange(1, m + 1)
    stepped = np.minimum.accumulate(scaled[::-1])[::-1]
    adjusted = np.empty(m)
    adjusted[order] = np.minimum(stepped, 1.0)
    q[defined] = adjusted
    return q


def qvalues_by_statistic(pvalues: Mapping[str, Sequence[float]]) -> dict[str, np.ndarray]:
    """Benjamini-Hochberg q-values within each statistic, across datasets.

    Each statistic is its own family of tests (one test per dataset), so the q-value of
    a dataset's ``combined`` p-value controls the FDR of the screen's overall verdicts.
    """
    return {name: benjamini_hochberg(values) for name, values in pvalues.items()}
