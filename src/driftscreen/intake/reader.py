"""``read_datasets``: from an abundance table (and metadata) to checked datasets."""

from __future__ import annotations

import inspect
import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from driftscreen.dataset import Dataset, Design, TechnicalReplicates
from driftscreen.errors import InputError, mention
from driftscreen.intake.abundance import (Converted, Depths, check_values, detect_abundance,
                                          to_counts)
from driftscreen.intake.biom import is_biom, read_biom
from driftscreen.intake.counts import CountTable, is_long, read_long, read_wide
from driftscreen.intake.metadata import (Biological, Metadata, Times, check_join, dataset_names,
                                         read_biological, read_depths, read_metadata,
                                         read_times)
from driftscreen.intake.tables import (file_label, file_stem, plural, quoted_list,
                                       read_text_table)
from driftscreen.intake.taxonomy import (Rank, aggregate, aggregation_notes, lineage_grouping,
                                         map_grouping, parse_rank)
from driftscreen.limits import (FEW_SAMPLES_FIX, MAX_READS, MAX_READS_TEXT, MAX_SPAN_DAYS,
                               MAX_SPAN_YEARS, MIN_SAMPLES_SNAPSHOT, MIN_TAXA)

OTHER = "other"
#: The choices of the intake options that take one (the parser offers the same).
CHOICES = {
    "layout": ("auto", "wide", "long"),
    "orientation": ("auto", "taxa-rows", "taxa-columns"),
    "abundance": ("auto", "counts", "fraction", "percent"),
    "remainder": ("auto", "pool", "renormalise"),
}

#: The fix of a depth that is not a number of reads.
DEPTH_FIX = f"give the number of reads per sample, e.g. {mention('depth')} 10000"


@dataclass(frozen=True)
class Columns:
    """Metadata columns named by the ``*_by`` options (indices; ``None`` if not given)."""

    datasets: tuple[int, ...] = ()
    time: int | None = None
    depth: int | None = None
    replicate: int | None = None


@dataclass(frozen=True)
class Table:
    """The whole counts table after conversion and aggregation (all samples).

    Attributes
    ----------
    counts:
        Integer reads, shape ``(samples, taxa)``.
    samples, taxa:
        Ids of rows and columns.
    converted:
        The conversion record (remainder shares for per-dataset notes).
    notes, warnings:
        Sentences that apply to every dataset.
    """

    counts: np.ndarray
    samples: tuple[str, ...]
    taxa: tuple[str, ...]
    converted: Converted
    notes: tuple[str, ...]
    warnings: tuple[str, ...]


def read_datasets(
    counts: str | os.PathLike,
    metadata: str | os.PathLike | None = None,
    *,
    layout: Literal["auto", "wide", "long"] = "auto",
    orientation: Literal["auto", "taxa-rows", "taxa-columns"] = "auto",
    sample_id: str | None = None,
    dataset_by: Sequence[str] = (),
    time_by: str | None = None,
    depth_by: str | None = None,
    depth: float | None = None,
    abundance: Literal["auto", "counts", "fraction", "percent"] = "auto",
    remainder: Literal["auto", "pool", "renormalise"] = "auto",
    lineage: str | None = None,
    rank: str | None = None,
    taxon_map: str | os.PathLike | None = None,
    replicate_by: str | None = None,
    min_samples: int = MIN_SAMPLES_SNAPSHOT,
    min_taxa: int = MIN_TAXA,
) -> list[Dataset]:
    """Read an abundance table and its metadata into checked datasets.

    Parameters
    ----------
    counts:
        Wide (taxa as rows or columns) or long (sample, taxon, count) CSV/TSV table,
        optionally gzip-compressed, or a BIOM file (JSON 1.0 or HDF5 2.1; needs the
        ``biom`` extra); read counts or relative abundances.
    metadata:
        Sample metadata table joined on sample id (needed for the ``*_by`` options,
        unless a BIOM file carries sample metadata; given with one, this table wins).
    layout, orientation:
        Table layout and, for wide tables, which axis holds taxa (``"auto"`` detects).
    sample_id:
        Metadata column with sample ids (default: the first column).
    dataset_by:
        Metadata columns whose value combinations define datasets.
    time_by:
        Metadata column with sampling times (days, or ISO dates -> days since the
        dataset's first sample). Without it every dataset is a snapshot design.
    depth_by, depth:
        Per-sample depths (metadata column) or one depth, to convert relative data.
    abundance:
        ``"counts"``, ``"fraction"``, ``"percent"`` or ``"auto"`` (detect).
    remainder:
        For relative samples summing below 1: pool the rest as taxon ``other``
        (``"auto"``, ``"pool"``) or ``"renormalise"``.
    lineage, rank, taxon_map:
        Aggregate taxa to ``rank`` using a lineage column (of a BIOM file: an observation
        metadata field, ``taxonomy`` if not named), or to the groups of a two-column
        taxon map file (whose groups are lineages when ``rank`` is given).
    replicate_by:
        Metadata column naming the biological sample each sequenced sample comes from:
        sequenced samples of one dataset sharing a value are technical replicates (the
        same extract or library sequenced again). The deepest of each biological sample
        (the first in table order among equals) is analysed; the others are kept in
        :attr:`Dataset.technical` and give the read precision.
    min_samples, min_taxa:
        Smallest acceptable dataset (taxa counted after dropping all-zero taxa).

    Returns
    -------
    list of Dataset
        One per dataset, sorted by name; samples of a time series ordered by time.

    Raises
    ------
    InputError
        For any problem in the files or options, as one line naming file, place and fix.
    """
    check_arguments(layout, orientation, abundance, remainder, min_samples, min_taxa)
    dataset_by = (dataset_by,) if isinstance(dataset_by, str) else tuple(dict.fromkeys(dataset_by))
    inside = None
    if is_biom(counts):
        inside = read_biom(counts, layout=layout, orientation=orientation, sample_id=sample_id,
                           metadata=metadata, lineage=lineage, rank=rank, taxon_map=taxon_map)
        lineage = inside.lineage
    own_metadata = None if inside is None else inside.samples
    check_options(metadata if own_metadata is None else own_metadata, sample_id, dataset_by,
                  time_by, depth_by, depth, lineage, rank, taxon_map, replicate_by)
    parsed_rank = None if rank is None else parse_rank(rank)
    meta = None if metadata is None else read_metadata(file_label(metadata), sample_id)
    meta = meta if own_metadata is None else own_metadata
    columns = metadata_columns(meta, dataset_by, time_by, depth_by, replicate_by)
    raw = (read_count_table(counts, layout, orientation, lineage, meta) if inside is None
           else inside.counts)
    table = prepare_table(raw, meta, columns.depth, depth, abundance, remainder, lineage,
                          parsed_rank, taxon_map)
    if meta is not None and columns.datasets:
        names, where = dataset_names(meta, columns.datasets, table.samples), meta.label
    else:
        names, where = [file_stem(counts)] * len(table.samples), raw.label
    times = None
    if meta is not None and columns.time is not None:
        times = read_times(meta, columns.time, table.samples)
    biological = None
    if meta is not None and columns.replicate is not None:
        biological = read_biological(meta, columns.replicate, table.samples)
    source = tuple(file_label(p) for p in (counts, metadata, taxon_map) if p is not None)
    limits = (min_samples, min_taxa)
    return [build_dataset(name, np.flatnonzero(np.array(names) == name), table, times,
                          source, limits, where, biological)
            for name in sorted(set(names))]


def check_arguments(layout: str, orientation: str, abundance: str, remainder: str,
                    min_samples: int, min_taxa: int) -> None:
    """Programming errors in the call (not user input)."""
    for option, value in (("layout", layout), ("orientation", orientation),
                          ("abundance", abundance), ("remainder", remainder)):
        if value not in CHOICES[option]:
            raise ValueError(f"{option} must be one of {CHOICES[option]}, got {value!r}")
    if min_samples < 1 or min_taxa < 1:
        raise ValueError("min_samples and min_taxa must be at least 1")


def check_options(metadata: object, sample_id: str | None, dataset_by: Sequence[str],
                  time_by: str | None, depth_by: str | None, depth: float | None,
                  lineage: str | None, rank: str | None, taxon_map: object,
                  replicate_by: str | None = None) -> None:
    """Option combinations that cannot work, reported before any file is read."""
    if metadata is None:
        for name, value in (("sample_id", sample_id), ("dataset_by", dataset_by or None),
                            ("time_by", time_by), ("depth_by", depth_by),
                            ("replicate_by", replicate_by)):
            if value is not None:
                raise InputError("needs a metadata table", parameter=name,
                                 fix=f"give {mention('metadata')} FILE")
    if depth is not None:
        check_depth_number(depth)
        if depth_by is not None:
            raise InputError(f"{mention('depth')} and {mention('depth_by')} are both given",
                             parameter="depth",
                             fix="give one of them")
    if lineage is not None and taxon_map is not None:
        raise InputError(f"{mention('lineage')} and {mention('taxon_map')} are both given",
                         parameter="lineage",
                         fix="give one of them")
    if rank is not None and lineage is None and taxon_map is None:
        raise InputError("needs lineages to aggregate taxa", parameter="rank",
                         fix=f"give {mention('lineage')} COLUMN or {mention('taxon_map')} FILE")


def check_depth_number(depth: object) -> None:
    """One depth for all samples: a finite number > 0 and at most :data:`MAX_READS`."""
    try:
        value = float(depth)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise InputError(f"non-numeric depth '{depth}'", parameter="depth",
                         fix=DEPTH_FIX) from None
    if not (math.isfinite(value) and value > 0):
        raise InputError(f"depth {depth} is not a positive number", parameter="depth",
                         fix=DEPTH_FIX)
    if value > MAX_READS:
        raise InputError(f"depth {depth} is more reads than any sequencing run gives (at most "
                         f"{MAX_READS_TEXT})", parameter="depth",
                         fix=DEPTH_FIX)


def metadata_columns(meta: Metadata | None, dataset_by: Sequence[str], time_by: str | None,
                     depth_by: str | None, replicate_by: str | None = None) -> Columns:
    """Column indices of the ``*_by`` options; a missing column is an input error."""
    if meta is None:
        return Columns()
    return Columns(
        datasets=tuple(meta.column(name, "dataset_by") for name in dataset_by),
        time=None if time_by is None else meta.column(time_by, "time_by"),
        depth=None if depth_by is None else meta.column(depth_by, "depth_by"),
        replicate=None if replicate_by is None else meta.column(replicate_by, "replicate_by"))


def read_count_table(counts: str | os.PathLike, layout: str, orientation: str,
                     lineage: str | None, meta: Metadata | None) -> CountTable:
    """Parse the counts file in its layout and check it against the metadata ids."""
    text = read_text_table(counts)
    if layout == "long" or (layout == "auto" and is_long(text, lineage)):
        if orientation != "auto":
            raise InputError(f"applies to wide tables only, but {text.label} is a long table",
                             parameter="orientation",
                             fix=f"drop it, or give {mention('layout')} wide")
        return read_long(text, lineage)
    return read_wide(text, orientation, lineage, None if meta is None else meta.ids())


def prepare_table(raw: CountTable, meta: Metadata | None, depth_column: int | None,
                  depth: float | None, abundance: str, remainder: str, lineage: str | None,
                  rank: Rank | None, taxon_map: str | os.PathLike | None) -> Table:
    """Join, check, convert to counts, aggregate and add the pooled remainder."""
    warnings = [] if meta is None else check_join(meta, raw.samples, raw.label)
    check_values(raw, abundance)
    kind, notes = detect_abundance(raw, abundance)
    depths = given_depths(meta, depth_column, depth, raw.samples)
    converted = to_counts(raw, kind, remainder, depths)
    notes = raw.notes + notes + converted.notes
    counts, taxa = converted.counts, raw.taxa
    if rank is not None or taxon_map is not None:
        grouping = (map_grouping(file_label(taxon_map), taxa, rank) if taxon_map is not None
                    else lineage_grouping(raw.lineages, rank, lineage))
        counts, names, n_unassigned = aggregate(counts, grouping)
        notes += aggregation_notes(len(taxa), names, n_unassigned, grouping)
        taxa = names
    elif lineage is not None:
        notes.append(f"column '{lineage}' holds lineages; taxa were not aggregated (no --rank)")
    counts, taxa, other_notes = add_remainder(counts, taxa, converted.other)
    return Table(counts, raw.samples, tuple(taxa), converted,
                 tuple(notes + other_notes), tuple(warnings + converted.warnings))


def given_depths(meta: Metadata | None, column: int | None, depth: float | None,
                 samples: Sequence[str]) -> Depths | None:
    """Depths from the metadata column or the one number, if either is given."""
    if column is not None and meta is not None:
        return Depths(read_depths(meta, column, samples),
                      f"column '{meta.table.header[column]}' of {meta.label}", single=False)
    if depth is not None:
        return Depths(np.full(len(samples), float(depth)), f"--depth {float(depth):g}",
                      single=True)
    return None


def add_remainder(counts: np.ndarray, taxa: Sequence[str], other: np.ndarray | None
                  ) -> tuple[np.ndarray, list[str], list[str]]:
    """Append the pooled remainder as taxon ``other`` (or add it to an existing one)."""
    taxa = list(taxa)
    if other is None:
        return counts, taxa, []
    if OTHER in taxa:
        column = taxa.index(OTHER)
        counts = counts.copy()
        counts[:, column] += other
        return counts, taxa, [f"the unlisted remainder was added to the existing "
                                      f"taxon '{OTHER}'"]
    return np.column_stack([counts, other]), taxa + [OTHER], []


def build_dataset(name: str, members: np.ndarray, table: Table, times: Times | None,
                  source: tuple[str, ...], limits: tuple[int, int], where: str,
                  biological: Biological | None = None) -> Dataset:
    """One dataset: its samples (time-ordered), taxa with reads, design and notes; with
    ``biological`` samples, one sequenced sample of each and its technical replicates."""
    min_samples, min_taxa = limits
    days = None
    extras = kept_of = np.zeros(0, dtype=np.int64)
    if biological is not None:
        members, extras, kept_of = split_replicates(name, members, table, biological, times)
    if times is not None:
        days_all = times.days(members)
        order = np.argsort(days_all, kind="stable")
        members, days = members[order], days_all[order]
        check_distinct_times(name, members, days, table, times)
        check_span(name, members, days, table, times)
    if members.size < min_samples:
        raise InputError(f"only {plural(int(members.size), 'sample', 'samples')}, at least "
                         f"{min_samples} are needed",
                         file=where, place=f"dataset '{name}'",
                         fix=FEW_SAMPLES_FIX)
    counts = table.counts[members]
    present = counts.sum(axis=0) > 0
    dropped = int((~present).sum())
    if present.sum() < min_taxa:
        raise InputError(f"only {plural(int(present.sum()), 'taxon', 'taxa')} with reads, at "
                         f"least {min_taxa} are needed", file=where, place=f"dataset '{name}'",
                         fix="check the table, or leave this dataset out")
    notes = list(table.notes) + remainder_notes(table, members)
    if times is not None and times.is_date:
        notes.append(f"converted the dates in column '{times.column}' to days since the "
                     f"dataset's first sample ({times.text[members[0]]})")
    notes += [f"dropped {dropped} taxa with no reads"] if dropped else []
    kept = counts[:, present]
    taxa = tuple(t for t, keep in zip(table.taxa, present) if keep)
    samples = tuple(table.samples[k] for k in members)
    depths = kept.sum(axis=1)
    technical = None
    if biological is not None and extras.size:
        technical, replicate_notes = technical_replicates(members, extras, kept_of, table,
                                                          present, biological)
        notes += replicate_notes
    elif biological is not None:
        notes.append(f"no biological sample was sequenced more than once (column "
                     f"'{biological.column}'): no technical replicates")
    return Dataset(name=name, counts=kept, taxa=taxa, samples=samples,
                   design=Design(depths=depths, times=days), notes=tuple(notes),
                   warnings=table.warnings + single_read_warning(samples, depths),
                   dropped_taxa=dropped, source=source, from_relative=table.converted.relative,
                   technical=technical)


def split_replicates(name: str, members: np.ndarray, table: Table, biological: Biological,
                     times: Times | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The kept sequenced sample of every biological sample (the deepest; the first in
    table order among equals), the others, and the kept sample each of them replicates
    (table rows). Replicates of one biological sample of a time series share its time."""
    depth = dict(zip(members.tolist(), table.counts[members].sum(axis=1).tolist()))
    groups: dict[str, list[int]] = {}
    for row in members.tolist():
        groups.setdefault(biological.names[row], []).append(row)
    kept, extras, kept_of = [], [], []
    for rows in groups.values():
        best = max(rows, key=lambda row: (depth[row], -row))
        others = [row for row in rows if row != best]
        if times is not None:
            check_same_time(name, best, others, table, times, biological)
        kept.append(best)
        extras += others
        kept_of += [best] * len(others)
    return (np.array(sorted(kept), dtype=np.int64), np.array(extras, dtype=np.int64),
            np.array(kept_of, dtype=np.int64))


def check_same_time(name: str, kept: int, others: Sequence[int], table: Table,
                    times: Times, biological: Biological) -> None:
    """Technical replicates of a time series come from one community at one time."""
    for other in others:
        if times.values[other] != times.values[kept]:
            first, second = sorted((kept, other))
            raise InputError(f"samples '{table.samples[first]}' and '{table.samples[second]}' "
                             f"come from one biological sample ('{biological.names[kept]}' in "
                             f"column '{biological.column}') but have different times "
                             f"('{times.text[first]}', '{times.text[second]}')",
                             file=times.label, place=f"dataset '{name}'",
                             fix="give the sequenced samples of one biological sample the same "
                                 f"time in column '{times.column}', or different biological "
                                 "sample names")


def technical_replicates(members: np.ndarray, extras: np.ndarray, kept_of: np.ndarray,
                         table: Table, present: np.ndarray, biological: Biological
                         ) -> tuple[TechnicalReplicates | None, list[str]]:
    """The record of the technical replicates on the dataset's taxa, and its notes.

    ``members`` are the dataset's rows in its order; a replicate without reads on the
    dataset's taxa is left out."""
    counts = table.counts[extras][:, present]
    usable = counts.sum(axis=1) > 0
    position = {row: k for k, row in enumerate(members.tolist())}
    notes = []
    if not usable.all():
        left_out = [table.samples[row] for row in extras[~usable]]
        count = plural(len(left_out), "technical replicate", "technical replicates")
        notes.append(f"left out {count} without reads on the dataset's taxa: "
                     + quoted_list(left_out, 3))
    if not usable.any():
        return None, notes
    technical = TechnicalReplicates([position[row] for row in kept_of[usable].tolist()],
                                    tuple(table.samples[row] for row in extras[usable]),
                                    counts[usable])
    chosen = [f"'{table.samples[row]}' for '{biological.names[row]}'"
              for row in dict.fromkeys(kept_of[usable].tolist())]
    replicated = plural(technical.n_replicated, "biological sample was",
                        "biological samples were")
    others = plural(technical.n_pairs, "sequenced sample is a technical replicate",
                    "sequenced samples are technical replicates")
    notes.append(f"{replicated} sequenced more than once (column '{biological.column}'): "
                 f"the deepest sequenced sample of each is analysed "
                 f"({', '.join(chosen[:3])}{', ...' if len(chosen) > 3 else ''}); {others} "
                 "beside it")
    return technical, notes


def single_read_warning(samples: Sequence[str], depths: np.ndarray) -> tuple[str, ...]:
    """Samples with one read carry no information on sampling variance (n - 1 = 0)."""
    single = [s for s, n in zip(samples, depths) if n < 2]
    if not single:
        return ()
    return (f"{plural(len(single), 'sample has', 'samples have')} a single read "
            f"({quoted_list(single, 3)}); consider removing them",)


def check_distinct_times(name: str, members: np.ndarray, days: np.ndarray, table: Table,
                         times: Times) -> None:
    """Two samples of one time series may not share a time."""
    same = np.flatnonzero(np.diff(days) == 0)
    if same.size:
        first, second = int(members[same[0]]), int(members[same[0] + 1])
        raise InputError(f"samples '{table.samples[first]}' and '{table.samples[second]}' have "
                         f"the same time '{times.text[second]}'", file=times.label,
                         place=f"dataset '{name}'",
                         fix="give each sample of a time series its own time, or split the "
                             f"data into more datasets with {mention('dataset_by')}")


def check_span(name: str, members: np.ndarray, days: np.ndarray, table: Table,
               times: Times) -> None:
    """One dataset's sampling times may span at most :data:`MAX_SPAN_YEARS` years."""
    if days[-1] - days[0] > MAX_SPAN_DAYS:
        first, last = int(members[0]), int(members[-1])
        raise InputError(f"samples '{table.samples[first]}' ('{times.text[first]}') and "
                         f"'{table.samples[last]}' ('{times.text[last]}') are "
                         f"{(days[-1] - days[0]) / 365.25:.0f} years apart, more than a "
                         f"sampling campaign of {MAX_SPAN_YEARS} years", file=times.label,
                         place=f"dataset '{name}'",
                         fix=f"correct the times in column '{times.column}' (a mistyped year, "
                             "or times not in days?)")


def remainder_notes(table: Table, members: np.ndarray) -> list[str]:
    """Per-dataset sentence about pooled or rescaled remainders."""
    converted = table.converted
    if converted.listed_share is None:
        return []
    if converted.rescaled:
        share = float(np.mean(converted.listed_share[members]))
        return [f"rescaled the listed abundances of each sample to sum to 1 (they summed to "
                f"{share:.1%} on average)"]
    if converted.other is None:
        return []
    share = float(np.mean(converted.other[members] / table.counts[members].sum(axis=1)))
    if share == 0:
        return []
    return [f"pooled the unlisted remainder of each sample as taxon '{OTHER}' "
            f"(mean {share:.1%} of reads)"]


def intake_defaults() -> dict[str, Any]:
    """Default intake options of :func:`driftscreen.intake.read_datasets` (size limits aside).

    Filling them in makes the settings fingerprint the same whether an option was given
    at its default value or left out.
    """
    return {name: parameter.default
            for name, parameter in inspect.signature(read_datasets).parameters.items()
            if parameter.kind is inspect.Parameter.KEYWORD_ONLY
            and name not in ("min_samples", "min_taxa")}
