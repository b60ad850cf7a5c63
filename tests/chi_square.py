"""Pearson chi-square goodness of fit with sparse cells pooled (shared by the tests)."""

from __future__ import annotations

import numpy as np
from scipy import stats


def pooled_chi_square_pvalue(observed: np.ndarray, expected: np.ndarray) -> float:
    """Chi-square p-value after pooling successive cells, in the given order, until each
    pooled cell expects at least 5 (common practice for Pearson's test); a short last run
    joins the cell before it."""
    cells_o, cells_e, run_o, run_e = [], [], 0.0, 0.0
    for o, e in zip(observed, expected):
        run_o, run_e = run_o + o, run_e + e
        if run_e >= 5.0:
            cells_o.append(run_o)
            cells_e.append(run_e)
            run_o = run_e = 0.0
    cells_o[-1] += run_o
    cells_e[-1] += run_e
    o, e = np.array(cells_o), np.array(cells_e)
    return float(stats.chi2.sf(np.sum((o - e) ** 2 / e), o.size - 1))
