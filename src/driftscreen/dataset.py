"""Immutable records for one dataset and its sampling design.

Axis convention used everywhere in driftscreen: counts are ``(samples, taxa)``;
batches of replicate datasets are ``(replicates, samples, taxa)``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from driftscreen.limits import MAX_READS, MAX_READS_TEXT


def exact_reads(values: object, name: str) -> np.ndarray:
    """``values`` as int64 reads, refusing any value a cast would wrap or round.

    Reads are bounded by :data:`driftscreen.limits.MAX_READS` (intake reports larger
    ones as input errors), so a larger value here is a programming error.
    """
    array = np.asarray(values)
    if array.size and not (np.all(np.isfinite(array)) and np.abs(array).max() <= MAX_READS):
        raise ValueError(f"{name} must be finite and at most {MAX_READS_TEXT} in size")
    return array.astype(np.int64, copy=False)


@dataclass(frozen=True)
class Design:
    """What a neutral replicate must share with the observed data.

    Attributes
    ----------
    depths:
        Sequencing depth (reads) of every sample, shape ``(T,)``, integers >= 1.
    times:
        Sampling times in days, shape ``(T,)``, strictly increasing; ``None`` for a
        snapshot design (replicate communities observed once, no time axis).
    """

    depths: np.ndarray
    times: np.ndarray | None = None

    def __post_init__(self) -> None:
        depths = exact_reads(self.depths, "depths")
        if depths.ndim != 1 or depths.size == 0 or np.any(depths < 1):
            raise ValueError("depths must be a non-empty 1-D array of integers >= 1")
        object.__setattr__(self, "depths", depths)
        if self.times is not None:
            times = np.asarray(self.times, dtype=np.float64)
            if times.shape != depths.shape:
                raise ValueError("times and depths must have the same length")
            if times.size > 1 and np.any(np.diff(times) <= 0):
                raise ValueError("times must be strictly increasing")
            object.__setattr__(self, "times", times)

    @property
    def n_samples(self) -> int:
        return int(self.depths.size)

    @property
    def is_time_series(self) -> bool:
        return self.times is not None

    @property
    def intervals(self) -> np.ndarray:
        """Days between successive samples, shape ``(T-1,)`` (time series only)."""
        if self.times is None:
            raise ValueError("a snapshot design has no sampling intervals")
        return np.diff(self.times)


@dataclass(frozen=True)
class Dataset:
    """One community dataset: read counts of taxa in samples, and its design.

    Attributes
    ----------
    name:
        Dataset label (from the ``--dataset-by`` columns, or the file name).
    counts:
        Read counts, shape ``(T samples, K taxa)``, int64. Every taxon has at least
        one read (all-zero taxa are dropped by intake and counted in ``dropped_taxa``).
        Samples are ordered by time for a time series.
    taxa, samples:
        Identifiers for the columns and rows of ``counts``.
    design:
        Depths and times; ``design.depths`` equals the row sums of ``counts``.
    notes:
        Plain-text notes from intake for the report (conversions, choices made).
    warnings:
        Plain-text warnings from intake for the report.
    dropped_taxa:
        Number of taxa removed because they had no reads in this dataset.
    source:
        Input files this dataset came from.
    from_relative:
        True if the counts were converted from relative abundances at a depth the user
        stated (the report then shows how the results move with that depth).
    """

    name: str
    counts: np.ndarray
    taxa: tuple[str, ...]
    samples: tuple[str, ...]
    design: Design
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    dropped_taxa: int = 0
    source: tuple[str, ...] = field(default=())
    from_relative: bool = False

    def __post_init__(self) -> None:
        counts = np.asarray(self.counts)
        if counts.ndim != 2:
            raise ValueError("counts must be a 2-D (samples, taxa) array")
        if counts.shape != (len(self.samples), len(self.taxa)):
            raise ValueError("counts shape does not match samples and taxa")
        if counts.shape[0] != self.design.n_samples:
            raise ValueError("counts and design disagree on the number of samples")
        object.__setattr__(self, "counts", exact_reads(counts, "counts"))
        object.__setattr__(self, "taxa", tuple(self.taxa))
        object.__setattr__(self, "samples", tuple(self.samples))

    @property
    def n_samples(self) -> int:
        return int(self.counts.shape[0])

    @property
    def n_taxa(self) -> int:
        return int(self.counts.shape[1])

    @property
    def is_time_series(self) -> bool:
        return self.design.is_time_series
