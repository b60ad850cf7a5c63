"""Reanalysis of published relative-abundance tables: how the stated depth moves the results.

A published table gives relative abundances; driftscreen turns them into counts at a
sequencing depth the user states (``--depth`` or ``--depth-by``). Sampling noise, and so every
p-value, depends on that depth. For such datasets the test is repeated with the counts
converted at a tenfold lower depth, and the report states how the p-values move: a
conclusion that holds at both depths does not hinge on the choice.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from driftscreen.calibrate import CalibrationSettings, run_calibration
from driftscreen.dataset import Dataset, Design, TechnicalReplicates
from driftscreen.limits import check_analysable
from driftscreen.results import NeutralityResult

#: The lower depth is this fraction of the stated one.
LOWER_DEPTH_FACTOR = 0.1
#: Fewest reads a sample keeps at the lower depth.
MIN_READS = 2
#: Every depth-sensitivity note starts with this.
DEPTH_SENSITIVITY_PREFIX = "depth sensitivity:"


def largest_remainder_rows(shares: np.ndarray, totals: np.ndarray) -> np.ndarray:
    """Integer rows summing exactly to ``totals`` closest to ``shares * totals`` (Hamilton)."""
    exact = shares * totals[:, None]
    counts = np.floor(exact).astype(np.int64)
    missing = totals - counts.sum(axis=1)
    order = np.argsort(-(exact - counts), axis=1, kind="stable")
    ranks = np.argsort(order, axis=1, kind="stable")
    counts += ranks < missing[:, None]
    return counts


def at_lower_depth(dataset: Dataset, factor: float = LOWER_DEPTH_FACTOR) -> Dataset:
    """The dataset as if its relative abundances had been converted at ``factor`` x its depths.

    Each sample keeps its composition; its counts are the closest integers summing to the
    lower depth (largest remainders). Taxa left without reads are dropped.
    """
    depths = dataset.design.depths
    lower = np.maximum(np.rint(depths * factor).astype(np.int64), MIN_READS)
    counts = largest_remainder_rows(dataset.counts / depths[:, None], lower)
    present = counts.sum(axis=0) > 0
    note = (f"counts converted at {factor:g} x the stated depth (median "
            f"{np.median(lower):,.0f} reads) to show how the results depend on it")
    return replace(dataset, counts=counts[:, present],
                   taxa=tuple(t for t, keep in zip(dataset.taxa, present) if keep),
                   design=Design(depths=lower, times=dataset.design.times),
                   notes=dataset.notes + (note,),
                   dropped_taxa=dataset.dropped_taxa + int(np.count_nonzero(~present)),
                   technical=technical_at_lower_depth(dataset, factor, present))


def technical_at_lower_depth(dataset: Dataset, factor: float, present: np.ndarray
                             ) -> TechnicalReplicates | None:
    """The dataset's technical replicates converted at ``factor`` x their depths, like its
    samples, on the taxa ``present``."""
    technical = dataset.technical
    if technical is None:
        return None
    depths = technical.depths
    lower = np.maximum(np.rint(depths * factor).astype(np.int64), MIN_READS)
    counts = largest_remainder_rows(technical.counts / depths[:, None], lower)
    return technical.restricted(np.ones(dataset.n_samples, dtype=bool), present, counts)


def depth_sensitivity_line(dataset: Dataset, stated: NeutralityResult,
                           settings: CalibrationSettings,
                           factor: float = LOWER_DEPTH_FACTOR, *, jobs: int = 1) -> str:
    """One sentence: the p-values at the stated depth and at ``factor`` x that depth.

    The lower-depth test uses the same settings and seed, so it is reproducible, and runs
    its replicates in ``jobs`` processes (results do not depend on them).
    """
    converted = at_lower_depth(dataset, factor)
    check_analysable(converted)
    lower = run_calibration(converted, settings, jobs=jobs)
    pairs = [f"{name} {stated.statistics[name].pvalue:.3g} -> {lower.statistics[name].pvalue:.3g}"
             for name in stated.statistics if name in lower.statistics]
    same = stated.rejected() == lower.rejected()
    verdict = ("the verdict at alpha = 0.05 is the same at both depths" if same else
               "the verdict at alpha = 0.05 changes with the depth: it hinges on the stated "
               "depth, which should be justified")
    return (f"{DEPTH_SENSITIVITY_PREFIX} with the counts converted at {factor:g} x the stated "
            f"depth, the p-values move as follows (stated -> lower): {'; '.join(pairs)}; "
            f"{verdict}.")
