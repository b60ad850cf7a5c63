"""Counts or relative abundances: detection, checks and conversion to read counts.

Detection (``abundance="auto"``): all values whole numbers -> counts; otherwise all
values <= 1 and every sample summing to at most 1 (+ relative tolerance ``SUM_TOLERANCE``)
-> fractions; every sample summing to at most 100 (+ tolerance) -> percent; anything
else is an error. Relative abundances become counts as ``round(fraction * depth)``.
A sample whose listed abundances sum to less than 1 - ``SUM_TOLERANCE`` (rare taxa cut
from a published table) either gets the unlisted remainder ``depth - sum(counts)`` as a
taxon ``other`` (remainder "auto"/"pool", so compositions stay closed) or is rescaled
to sum to 1 (remainder "renormalise").
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from driftscreen.errors import InputError, mention
from driftscreen.intake.counts import CountTable
from driftscreen.limits import MAX_READS, MAX_READS_TEXT

SUM_TOLERANCE = 1e-3
FULL_SCALE = {"fraction": 1.0, "percent": 100.0}


@dataclass(frozen=True)
class Depths:
    """Sequencing depths given by the user, one per sample of the counts table.

    Attributes
    ----------
    values:
        Reads per sample, float64, > 0.
    origin:
        How they were given, for notes, e.g. ``"column 'reads' of meta.tsv"`` or
        ``"--depth 10000"``.
    single:
        True if one depth was given for every sample.
    """

    values: np.ndarray
    origin: str
    single: bool


@dataclass(frozen=True)
class Converted:
    """Integer read counts of the listed taxa, and the pooled remainder if any.

    Attributes
    ----------
    counts:
        Shape ``(samples, taxa)``, int64.
    other:
        Reads of the unlisted remainder per sample (int64), or ``None``.
    listed_share:
        Share of each sample covered by the listed taxa before pooling or rescaling,
        or ``None`` for count data or complete relative data.
    rescaled:
        True if incomplete samples were renormalised rather than pooled.
    relative:
        True if the table held relative abundances converted at a stated depth.
    notes, warnings:
        Plain sentences for the report.
    """

    counts: np.ndarray
    other: np.ndarray | None = None
    listed_share: np.ndarray | None = None
    rescaled: bool = False
    relative: bool = False
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


def check_values(table: CountTable, abundance: str) -> None:
    """No negative values, none above :data:`MAX_READS` (nor a sample total), and no
    sample without reads."""
    negative = table.values < 0
    if negative.any():
        sample, taxon = table.first_cell(negative)
        value = table.values[sample, taxon]
        whole = value == np.rint(value)
        noun = "count" if abundance in ("auto", "counts") and whole else "abundance"
        raise InputError(f"negative {noun} {value:g}", file=table.label,
                         place=table.cell_place(sample, taxon), fix=f"{noun}s must be >= 0")
    check_bounds(table)
    empty = np.flatnonzero(table.values.sum(axis=1) == 0)
    if empty.size:
        sample = int(empty[0])
        raise InputError(f"no reads in sample '{table.samples[sample]}' (every value is 0)",
                         file=table.label, place=table.sample_place(sample),
                         fix="remove the sample from the table (and from the metadata)")


def check_bounds(table: CountTable) -> None:
    """Every value and every sample total at most :data:`MAX_READS`, so counts stay exact."""
    huge = table.values > MAX_READS
    if huge.any():
        sample, taxon = table.first_cell(huge)
        raise InputError(f"count {table.values[sample, taxon]:g} is more reads than any "
                         f"sequencing run gives (at most {MAX_READS_TEXT})", file=table.label,
                         place=table.cell_place(sample, taxon),
                         fix="correct the cell (counts are reads per sample and taxon)")
    totals = table.values.sum(axis=1)
    over = np.flatnonzero(totals > MAX_READS)
    if over.size:
        sample = int(over[0])
        raise InputError(f"sample '{table.samples[sample]}' holds {totals[sample]:g} reads, "
                         f"more than any sequencing run gives (at most {MAX_READS_TEXT})",
                         file=table.label, place=table.sample_place(sample),
                         fix="correct the counts of the sample")


def detect_abundance(table: CountTable, abundance: str) -> tuple[str, list[str]]:
    """``("counts" | "fraction" | "percent", notes)`` by the rules in the module docstring."""
    values = table.values
    whole = values == np.rint(values)
    if abundance == "counts" or (abundance == "auto" and whole.all()):
        if not whole.all():
            sample, taxon = table.first_cell(~whole)
            raise InputError(f"non-integer count {values[sample, taxon]:g}", file=table.label,
                             place=table.cell_place(sample, taxon),
                             fix=f"round the counts, or give {mention('abundance')} fraction or "
                                 "percent for relative abundances")
        return "counts", []
    if abundance != "auto":
        return abundance, []
    sums = values.sum(axis=1)
    span = f"samples sum to {sums.min():.4g}-{sums.max():.4g}"
    if values.max() <= 1 and sums.max() <= 1 + SUM_TOLERANCE:
        return "fraction", [f"read the values as fractions (none above 1; {span})"]
    if sums.max() <= FULL_SCALE["percent"] * (1 + SUM_TOLERANCE):
        return "percent", [f"read the values as percentages ({span})"]
    raise InputError(f"values are not all whole numbers and {span}, so they are neither "
                     "counts nor fractions nor percentages", file=table.label,
                     fix=f"give {mention('abundance')} fraction or percent for relative "
                         "abundances, or round counts to whole numbers")


def counts_sum_to_100_warning(table: CountTable) -> list[str]:
    """Whole numbers with every sample summing to 98-102 may be rounded percentages."""
    sums = table.values.sum(axis=1)
    if table.values.shape[0] > 1 and np.all(np.abs(sums - 100) <= 2):
        return [f"every sample of {table.label} sums to about 100 reads; if these are "
                "percentages, give --abundance percent and a depth"]
    return []


def to_counts(table: CountTable, kind: str, remainder: str, depths: Depths | None) -> Converted:
    """Integer counts from the table, converting relative abundances at ``depths``."""
    if kind == "counts":
        warnings = counts_sum_to_100_warning(table)
        notes: list[str] = []
        if depths is not None:
            notes, extra = compare_depths(table, depths)
            warnings += extra
        return Converted(np.rint(table.values).astype(np.int64), notes=notes, warnings=warnings)
    if depths is None:
        raise InputError(f"relative abundances ({kind}s) need sequencing depths to become counts",
                         file=table.label,
                         fix=f"give {mention('depth')} N or {mention('depth_by')} COLUMN")
    fractions = table.values / FULL_SCALE[kind]
    share = fractions.sum(axis=1)
    check_sums(table, kind, share)
    incomplete = share < 1 - SUM_TOLERANCE
    rescale = remainder == "renormalise"
    if rescale:
        fractions = fractions / share[:, None]
    counts = np.rint(fractions * depths.values[:, None]).astype(np.int64)
    other = None
    if incomplete.any() and not rescale:
        missing = np.rint(depths.values).astype(np.int64) - counts.sum(axis=1)
        other = np.where(incomplete, np.maximum(missing, 0), 0)
    check_converted(table, counts, other, depths)
    note = f"converted {kind} abundances to counts at {depth_phrase(depths)}"
    partial = bool(incomplete.any())
    return Converted(counts, other, share if partial else None, rescale and partial,
                     relative=True, notes=[note])


def check_sums(table: CountTable, kind: str, share: np.ndarray) -> None:
    """Relative abundances of a sample may not add up to more than the whole."""
    over = np.flatnonzero(share > 1 + SUM_TOLERANCE)
    if over.size:
        sample = int(over[0])
        scale = FULL_SCALE[kind]
        raise InputError(f"abundances of sample '{table.samples[sample]}' sum to "
                         f"{share[sample] * scale:.6g}, more than {scale:g}", file=table.label,
                         place=table.sample_place(sample),
                         fix="check the table" + (f", or give {mention('abundance')} percent"
                                                  if kind == "fraction" else ""))


def check_converted(table: CountTable, counts: np.ndarray, other: np.ndarray | None,
                    depths: Depths) -> None:
    """A sample whose abundances all round to zero reads has no data; one whose rounded
    reads (abundances may sum to a little over 1) exceed :data:`MAX_READS` is too large."""
    totals = counts.sum(axis=1) + (0 if other is None else other)
    empty = np.flatnonzero(totals == 0)
    if empty.size:
        sample = int(empty[0])
        raise InputError(f"sample '{table.samples[sample]}' has no reads after conversion at "
                         f"depth {depths.values[sample]:g}", file=table.label,
                         place=table.sample_place(sample),
                         fix="give the sample's real depth, or remove the sample")
    over = np.flatnonzero(totals > MAX_READS)
    if over.size:
        sample = int(over[0])
        raise InputError(f"sample '{table.samples[sample]}' holds {totals[sample]:,} reads after "
                         f"conversion at depth {depths.values[sample]:g}, more than "
                         f"{MAX_READS_TEXT}", file=table.label, place=table.sample_place(sample),
                         fix="give the sample's real depth")


def depth_phrase(depths: Depths) -> str:
    """``depth 10000 per sample`` or ``the depths in column 'reads' ... (median ...)``."""
    if depths.single:
        return f"depth {depths.values[0]:g} per sample"
    return f"the depths in {depths.origin} (median {np.median(depths.values):g} reads)"


def compare_depths(table: CountTable, depths: Depths) -> tuple[list[str], list[str]]:
    """Depths given with count data are not used; warn if they disagree with the totals."""
    totals = table.values.sum(axis=1)
    differ = np.flatnonzero(np.abs(depths.values - totals) >= 0.5)
    if differ.size == 0:
        return [f"depths are the sample totals; {depths.origin} agrees with them and was not "
                "used"], []
    k = int(differ[0])
    return [], [f"depths are the sample totals; {depths.origin} was not used and disagrees "
                f"with them for {differ.size} of {totals.size} samples (e.g. "
                f"'{table.samples[k]}': {depths.values[k]:g} given, {totals[k]:g} in the table)"]
