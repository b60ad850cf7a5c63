"""Aggregating taxa into groups: by a rank of their lineage, or by a taxon map file.

Lineage strings are split on ``;`` or ``|``. With rank prefixes (``k__``/``d__``,
``p__``, ``c__``, ``o__``, ``f__``, ``g__``, ``s__``, or ``D_0__``...), a named rank is
found by its prefix; otherwise (and for a level number) by position, kingdom being
level 1. Empty names and placeholders such as ``unclassified`` count as no assignment.
A one-word species name is prefixed with its genus. Taxa with no assignment go to the
group ``unassigned``. Counts of taxa in the same group are summed.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from driftscreen.errors import InputError
from driftscreen.intake.tables import TextTable, read_text_table

RANKS = ("kingdom", "phylum", "class", "order", "family", "genus", "species")
RANK_ALIASES = {"domain": "kingdom", "superkingdom": "kingdom"}
PREFIX_LEVEL = {"k": 0, "d": 0, "p": 1, "c": 2, "o": 3, "f": 4, "g": 5, "s": 6}
PREFIX = re.compile(r"^(?:([a-z])|D_(\d+))__")
UNASSIGNED = "unassigned"
NO_NAME = frozenset({"", "unassigned", "unclassified", "unknown", "unidentified", "na", "none",
                     "null"})
SPECIES_LEVEL = RANKS.index("species")
GENUS_LEVEL = RANKS.index("genus")


@dataclass(frozen=True)
class Rank:
    """A rank to aggregate to: 0-based ``level``, ``by_name`` if given as a rank name."""

    level: int
    by_name: bool
    label: str


@dataclass(frozen=True)
class Grouping:
    """Group of every taxon (``None`` = no assignment) and a description for notes."""

    groups: tuple[str | None, ...]
    description: str


def parse_rank(rank: str) -> Rank:
    """A rank name (kingdom ... species, or domain) or a 1-based level number."""
    text = rank.strip().casefold()
    text = RANK_ALIASES.get(text, text)
    if text in RANKS:
        return Rank(RANKS.index(text), True, text)
    if text.isdigit() and int(text) >= 1:
        return Rank(int(text) - 1, False, f"level {int(text)}")
    raise InputError(f"unknown rank '{rank}'", parameter="rank",
                     fix="use kingdom, phylum, class, order, family, genus, species or a level "
                         "number 1, 2, ...")


def name_at_rank(lineage: str, rank: Rank) -> str | None:
    """The name at ``rank`` in a lineage string, or None if it has none."""
    parts = [part.strip() for part in re.split(r"[;|]", lineage)]
    prefixed = [PREFIX.match(part) for part in parts]
    if rank.by_name and any(prefixed):
        value = next((part[m.end():] for part, m in zip(parts, prefixed)
                      if m and prefix_level(m) == rank.level), "")
    else:
        value = parts[rank.level] if rank.level < len(parts) else ""
        match = PREFIX.match(value)
        value = value[match.end():] if match else value
    value = value.strip()
    if value.casefold() in NO_NAME or value.casefold().startswith("unclassified"):
        return None
    if rank.by_name and rank.level == SPECIES_LEVEL:
        genus = name_at_rank(lineage, Rank(GENUS_LEVEL, True, "genus"))
        if genus and not value.startswith(genus):
            value = f"{genus} {value}"
    return value


def prefix_level(match: re.Match[str]) -> int:
    """Level of a rank prefix: ``g__`` -> 5, ``D_3__`` -> 3."""
    letter, number = match.groups()
    return int(number) if number is not None else PREFIX_LEVEL.get(letter, -1)


def lineage_grouping(lineages: Sequence[str], rank: Rank, column: str) -> Grouping:
    """Group taxa by their name at ``rank``."""
    groups = tuple(name_at_rank(lineage, rank) for lineage in lineages)
    return Grouping(groups, f"at rank '{rank.label}' (lineages in column '{column}')")


def map_grouping(path: str, taxa: Sequence[str], rank: Rank | None) -> Grouping:
    """Group taxa with a two-column file (taxon, group); with a rank, groups are lineages."""
    table = read_text_table(path)
    pairs = map_pairs(table, set(taxa))
    groups = []
    for taxon in taxa:
        group = pairs.get(taxon, "")
        if rank is not None:
            groups.append(name_at_rank(group, rank))
        else:
            groups.append(group or None)
    at = f"at rank '{rank.label}' " if rank is not None else ""
    return Grouping(tuple(groups), f"{at}with the taxon map {table.label}")


def map_pairs(table: TextTable, taxa: set[str]) -> dict[str, str]:
    """Taxon -> group from a map table; its first row is data if it names a known taxon."""
    if len(table.header) != 2:
        raise InputError(f"a taxon map needs exactly two columns (taxon, group), found "
                         f"{len(table.header)}", file=table.label, place="header",
                         fix="keep only the taxon and group columns")
    rows = list(zip(table.column_text(0), table.column_text(1)))
    lines = [int(line) for line in table.lines]
    if table.header[0] in taxa:
        rows.insert(0, (table.header[0], table.header[1]))
        lines.insert(0, table.header_line)
    pairs: dict[str, str] = {}
    where: dict[str, int] = {}
    for (taxon, group), line in zip(rows, lines):
        if not taxon:
            raise InputError("empty taxon id", file=table.label, place=f"row {line}",
                             fix="give every row of the taxon map a taxon id")
        if taxon in pairs:
            raise InputError(f"taxon '{taxon}' is mapped twice (also on row {where[taxon]})",
                             file=table.label, place=f"row {line}",
                             fix="map each taxon to one group")
        pairs[taxon], where[taxon] = group, line
    return pairs


def aggregate(counts: np.ndarray, grouping: Grouping) -> tuple[np.ndarray, tuple[str, ...], int]:
    """Sum the columns of ``counts`` by group.

    Returns the aggregated counts ``(samples, groups)``, the group names (order of first
    appearance, ``unassigned`` last) and the number of taxa without assignment.
    """
    assigned = [g for g in grouping.groups if g is not None]
    names = list(dict.fromkeys(assigned))
    n_unassigned = len(grouping.groups) - len(assigned)
    if n_unassigned and UNASSIGNED not in names:
        names.append(UNASSIGNED)
    index = {name: k for k, name in enumerate(names)}
    codes = np.array([index[g if g is not None else UNASSIGNED] for g in grouping.groups],
                     dtype=np.int64)
    order = np.argsort(codes, kind="stable")
    starts = np.flatnonzero(np.r_[True, np.diff(codes[order]) != 0])
    summed = np.add.reduceat(counts[:, order], starts, axis=1)
    return summed, tuple(names), n_unassigned


def aggregation_notes(n_taxa: int, names: Sequence[str], n_unassigned: int,
                      grouping: Grouping) -> list[str]:
    """Sentences describing an aggregation for the report."""
    notes = [f"aggregated {n_taxa} taxa to {len(names)} groups {grouping.description}"]
    if n_unassigned:
        notes.append(f"{n_unassigned} taxa without a group were pooled as '{UNASSIGNED}'")
    return notes
