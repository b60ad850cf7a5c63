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
class TechnicalReplicates:
    """Sequenced samples beside the analysed ones: technical replicates of them.

    A biological sample sequenced more than once (the same extract or library) keeps its
    deepest sequenced sample in the dataset's counts; the others are kept here.

    Attributes
    ----------
    of:
        Index (row of the dataset's counts) of the kept sample each one replicates, ``(E,)``.
    samples:
        Their sample ids, ``(E,)``.
    counts:
        Their reads on the dataset's taxa, ``(E, K)``, int64; every row has a read.
    """

    of: np.ndarray
    samples: tuple[str, ...]
    counts: np.ndarray

    def __post_init__(self) -> None:
        of = np.asarray(self.of, dtype=np.int64)
        counts = exact_reads(self.counts, "technical replicate counts")
        if (of.ndim != 1 or counts.ndim != 2 or counts.shape[0] != of.size
                or len(self.samples) != of.size or of.size == 0):
            raise ValueError("technical replicates need one index, id and row of counts each")
        if np.any(counts.sum(axis=1) < 1) or np.any(of < 0):
            raise ValueError("every technical replicate needs a read and a kept sample")
        object.__setattr__(self, "of", of)
        object.__setattr__(self, "counts", counts)
        object.__setattr__(self, "samples", tuple(self.samples))

    @property
    def depths(self) -> np.ndarray:
        """Reads of every technical replicate, ``(E,)``."""
        return self.counts.sum(axis=1)

    @property
    def n_pairs(self) -> int:
        """Pairs of a kept sample with one of its technical replicates."""
        return int(self.of.size)

    @property
    def n_replicated(self) -> int:
        """Biological samples sequenced more than once."""
        return int(np.unique(self.of).size)

    def restricted(self, samples: np.ndarray, taxa: np.ndarray,
                   counts: np.ndarray | None = None) -> TechnicalReplicates | None:
        """The replicates of the kept samples ``samples`` on the taxa ``taxa`` (boolean
        masks of the dataset's rows and columns), optionally with new ``counts`` ``(E, K)``;
        replicates left without reads are dropped, ``None`` when none is left."""
        counts = (self.counts if counts is None else np.asarray(counts))[:, taxa]
        new_index = np.cumsum(samples) - 1
        keep = samples[self.of] & (counts.sum(axis=1) > 0)
        if not keep.any():
            return None
        return TechnicalReplicates(new_index[self.of[keep]],
                                   tuple(s for s, k in zip(self.samples, keep) if k),
                                   counts[keep])


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
    technical:
        The other sequenced samples of biological samples sequenced more than once
        (``replicate_by``), or ``None``.
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
    technical: TechnicalReplicates | None = None

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
        technical = self.technical
        if technical is not None and (technical.counts.shape[1] != counts.shape[1]
                                      or np.any(technical.of >= counts.shape[0])):
            raise ValueError("technical replicates must share the dataset's taxa and samples")

    @property
    def n_samples(self) -> int:
        return int(self.counts.shape[0])

    @property
    def n_taxa(self) -> int:
        return int(self.counts.shape[1])

    @property
    def is_time_series(self) -> bool:
        return self.design.is_time_series
