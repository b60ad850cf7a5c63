"""The abundance table: wide (taxa as rows or columns) or long (sample, taxon, count).

Both layouts become a :class:`CountTable` of raw numbers, shape ``(samples, taxa)``,
that remembers where every cell sits in the file so later checks (negative values,
non-integer counts) can name the row and column.

Auto layout: a table whose columns (apart from a lineage column) are exactly three,
one each for sample, taxon and count, is long; anything else is wide.

Auto orientation of a wide table (``orientation="auto"``):

1. with metadata, the axis whose ids match more metadata sample ids holds the samples;
2. otherwise, a first-column name like taxon/otu/asv/feature/species/genus means taxa
   are rows, one like sample means taxa are columns;
3. otherwise a lineage column (named by ``lineage``, or called taxonomy/lineage) means
   taxa are rows;
4. otherwise the longer axis holds the taxa (a tie reads taxa as rows), and a note says so.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from driftscreen.errors import InputError, mention
from driftscreen.intake.tables import TextTable, find_column, parse_numbers, quoted_list

TAXON_WORDS = ("taxon", "taxa", "otu", "asv", "esv", "zotu", "feature", "species", "genus",
               "family", "phylum", "lineage", "sequence")
SAMPLE_WORDS = ("sample",)
LONG_ROLES = {
    "sample": frozenset({"sample", "samples", "sampleid", "samplename"}),
    "taxon": frozenset({"taxon", "taxa", "taxonid", "otu", "otuid", "asv", "asvid", "feature",
                        "featureid", "species", "genus"}),
    "count": frozenset({"count", "counts", "abundance", "value", "reads"}),
}
LINEAGE_NAMES = frozenset({"taxonomy", "lineage"})
MISSING_FIX = "write 0 where a taxon was not observed"


@dataclass
class CountTable:
    """Raw numbers of the abundance table with their file positions.

    Attributes
    ----------
    values:
        Numbers as read, shape ``(samples, taxa)``, float64, finite.
    samples, taxa:
        Ids of the rows and columns of ``values`` (file order).
    lineages:
        Lineage string per taxon (``""`` if none), or ``None`` without a lineage column.
    label:
        The counts file as given.
    kind:
        ``"taxa-rows"``, ``"taxa-columns"`` or ``"long"``.
    lines:
        File line of every taxon (taxa-rows), sample (taxa-columns), or of every cell
        (long, shape ``(samples, taxa)``, 0 where the pair is absent).
    value_column:
        Name of the count column (long tables).
    notes:
        Plain sentences about choices made while reading.
    """

    values: np.ndarray
    samples: tuple[str, ...]
    taxa: tuple[str, ...]
    lineages: tuple[str, ...] | None
    label: str
    kind: str
    lines: np.ndarray
    value_column: str = ""
    notes: list[str] = field(default_factory=list)

    def cell_place(self, sample: int, taxon: int) -> str:
        """Row and column text for the cell of ``(sample, taxon)``."""
        s, t = self.samples[sample], self.taxa[taxon]
        if self.kind == "taxa-rows":
            return f"row {self.lines[taxon]} (taxon '{t}'), column '{s}'"
        if self.kind == "taxa-columns":
            return f"row {self.lines[sample]} (sample '{s}'), column '{t}'"
        return (f"row {self.lines[sample, taxon]} (sample '{s}', taxon '{t}'), "
                f"column '{self.value_column}'")

    def sample_place(self, sample: int) -> str:
        """Where a sample sits in the file."""
        s = self.samples[sample]
        if self.kind == "taxa-columns":
            return f"row {self.lines[sample]} (sample '{s}')"
        if self.kind == "taxa-rows":
            return f"column '{s}'"
        return f"sample '{s}'"

    def first_cell(self, mask: np.ndarray) -> tuple[int, int]:
        """``(sample, taxon)`` of the first True cell of ``mask`` in file order."""
        if self.kind == "taxa-rows":
            taxon, sample = np.argwhere(mask.T)[0]
        elif self.kind == "taxa-columns":
            sample, taxon = np.argwhere(mask)[0]
        else:
            order = np.where(mask, self.lines, np.iinfo(np.int64).max)
            sample, taxon = np.unravel_index(int(np.argmin(order)), mask.shape)
        return int(sample), int(taxon)


def normalised_name(name: str) -> str:
    """Lower-case letters and digits only (``'#OTU ID'`` -> ``'otuid'``)."""
    return re.sub(r"[^0-9a-z]", "", name.casefold())


def long_roles(table: TextTable, lineage_index: int | None) -> dict[str, int] | None:
    """Column index per role if the table has exactly one column per long role."""
    roles: dict[str, int] = {}
    for index, name in enumerate(table.header):
        if index == lineage_index:
            continue
        matches = [role for role, names in LONG_ROLES.items() if normalised_name(name) in names]
        if len(matches) != 1 or matches[0] in roles:
            return None
        roles[matches[0]] = index
    return roles if len(roles) == 3 else None


def is_long(table: TextTable, lineage: str | None) -> bool:
    """Auto layout: exactly three columns with the sample, taxon and count roles."""
    lineage_index = None
    if lineage is not None and lineage.casefold() in {c.casefold() for c in table.header}:
        lineage_index = find_column(table, lineage, "lineage")
    return long_roles(table, lineage_index) is not None


def read_long(table: TextTable, lineage: str | None) -> CountTable:
    """A long table: one row per (sample, taxon) with its count; absent pairs are 0."""
    lineage_index = None if lineage is None else find_column(table, lineage, "lineage")
    roles = long_roles(table, lineage_index) or required_long_roles(table, lineage_index)
    samples_text = ids_of(table, roles["sample"], "sample")
    taxa_text = ids_of(table, roles["taxon"], "taxon")
    values = parse_numbers(table, slice(None), [roles["count"]],
                           lambda r, c: long_place(table, r, roles), "count", MISSING_FIX)[:, 0]
    sample_codes, samples = pd.factorize(pd.Series(samples_text, dtype=object))
    taxon_codes, taxa = pd.factorize(pd.Series(taxa_text, dtype=object))
    check_unique_pairs(table, sample_codes, taxon_codes, samples_text, taxa_text)
    shape = (len(samples), len(taxa))
    matrix = np.zeros(shape)
    matrix[sample_codes, taxon_codes] = values
    lines = np.zeros(shape, dtype=np.int64)
    lines[sample_codes, taxon_codes] = table.lines
    lineages = None
    if lineage_index is not None:
        lineages = lineage_per_taxon(table, lineage_index, taxon_codes, len(taxa))
    ignored = [table.header[i] for i in range(len(table.header))
               if i not in roles.values() and i != lineage_index]
    notes = [f"ignored columns {quoted_list(ignored)} of the long table"] if ignored else []
    return CountTable(matrix, tuple(samples), tuple(taxa), lineages, table.label, "long", lines,
                      table.header[roles["count"]], notes)


def long_place(table: TextTable, row: int, roles: dict[str, int]) -> str:
    """``row N (sample 'S1', taxon 'x'), column 'count'`` for a long-table value."""
    sample = table.cells.iat[row, roles["sample"]].strip()
    taxon = table.cells.iat[row, roles["taxon"]].strip()
    return (f"row {table.lines[row]} (sample '{sample}', taxon '{taxon}'), "
            f"column '{table.header[roles['count']]}'")


def required_long_roles(table: TextTable, lineage_index: int | None) -> dict[str, int]:
    """Find the role columns of a table declared long; extra columns are allowed."""
    roles: dict[str, int] = {}
    for role, names in LONG_ROLES.items():
        taken = set(roles.values()) | {lineage_index}
        found = [i for i, name in enumerate(table.header)
                 if normalised_name(name) in names and i not in taken]
        if not found:
            wanted = "count (or abundance, value, reads)" if role == "count" else role
            raise InputError(f"a long table needs a {wanted} column", file=table.label,
                             place="header", fix=f"name the columns sample, taxon and count "
                                                 f"(found {quoted_list(table.header)})")
        roles[role] = found[0]
    return roles


def ids_of(table: TextTable, column: int, what: str) -> list[str]:
    """Ids from one column; an empty id is an input error."""
    ids = table.column_text(column)
    empty = [row for row, text in enumerate(ids) if not text]
    if empty:
        raise InputError(f"empty {what} id", file=table.label, place=table.place(empty[0], column),
                         fix=f"give every row a {what} id")
    return ids


def check_unique_pairs(table: TextTable, sample_codes: np.ndarray, taxon_codes: np.ndarray,
                       samples: Sequence[str], taxa: Sequence[str]) -> None:
    """Each (sample, taxon) pair may appear once in a long table."""
    pairs = sample_codes.astype(np.int64) * (int(taxon_codes.max()) + 1) + taxon_codes
    repeated = pd.Series(pairs).duplicated().to_numpy()
    if repeated.any():
        second = int(np.argmax(repeated))
        first = int(np.flatnonzero(pairs == pairs[second])[0])
        raise InputError(f"sample '{samples[second]}' and taxon '{taxa[second]}' also appear on "
                         f"row {table.lines[first]}", file=table.label,
                         place=f"row {table.lines[second]}",
                         fix="list each sample-taxon pair once (sum the duplicate rows)")


def lineage_per_taxon(table: TextTable, column: int, taxon_codes: np.ndarray,
                      n_taxa: int) -> tuple[str, ...]:
    """One lineage string per taxon of a long table; conflicting strings are an error."""
    text = table.column_text(column)
    lineages = [""] * n_taxa
    origin = [-1] * n_taxa
    for row, (code, lineage) in enumerate(zip(taxon_codes, text)):
        if not lineage:
            continue
        if not lineages[code]:
            lineages[code], origin[code] = lineage, row
        elif lineages[code] != lineage:
            raise InputError(f"taxon has lineage '{lineage}' here but '{lineages[code]}' on "
                             f"row {table.lines[origin[code]]}", file=table.label,
                             place=table.place(row, column),
                             fix="give each taxon one lineage")
    return tuple(lineages)


def read_wide(table: TextTable, orientation: str, lineage: str | None,
              metadata_ids: frozenset[str] | None) -> CountTable:
    """A wide table; the first column holds the row ids."""
    lineage_index = wide_lineage_column(table, lineage)
    notes: list[str] = []
    if orientation == "auto":
        orientation, note = guess_orientation(table, lineage_index, metadata_ids)
        notes += [note] if note else []
    if orientation == "taxa-columns":
        if lineage is not None:
            raise InputError(f"a lineage column needs taxa as rows, but {table.label} has taxa "
                             "as columns", parameter="lineage",
                             fix=f"give lineages in a {mention('taxon_map')} file instead")
        lineage_index = None
    elif lineage_index is not None and lineage is None:
        name = table.header[lineage_index]
        notes.append(f"column '{name}' holds lineages and was not read as a sample "
                     f"(give --lineage '{name}' --rank RANK to aggregate taxa)")
    value_columns = [i for i in range(1, len(table.header)) if i != lineage_index]
    row_kind, column_kind = (("taxon", "sample") if orientation == "taxa-rows"
                             else ("sample", "taxon"))
    row_ids = ids_of(table, 0, row_kind)
    check_unique_ids(table, row_ids, row_kind)
    column_ids = [table.header[i] for i in value_columns]
    check_unique_header(table, value_columns, column_kind)
    values = parse_numbers(table, slice(None), value_columns,
                           lambda r, c: wide_place(table, r, value_columns[c], row_kind),
                           "count", MISSING_FIX)
    if orientation == "taxa-columns":
        return CountTable(values, tuple(row_ids), tuple(column_ids), None, table.label,
                          "taxa-columns", table.lines, notes=notes)
    lineages = None
    if lineage is not None:
        lineages = tuple(table.column_text(lineage_index))
    return CountTable(values.T.copy(), tuple(column_ids), tuple(row_ids), lineages,
                      table.label, "taxa-rows", table.lines, notes=notes)


def wide_lineage_column(table: TextTable, lineage: str | None) -> int | None:
    """The lineage column of a wide table: the one named, or one called taxonomy/lineage."""
    if lineage is not None:
        return find_column(table, lineage, "lineage")
    for index, name in enumerate(table.header[1:], start=1):
        if normalised_name(name) in LINEAGE_NAMES:
            return index
    return None


def wide_place(table: TextTable, row: int, column: int, row_kind: str) -> str:
    """``row N (taxon 'x'), column 'S1'`` for a wide-table cell."""
    row_id = table.cells.iat[row, 0].strip()
    return f"row {table.lines[row]} ({row_kind} '{row_id}'), column '{table.header[column]}'"


def check_unique_ids(table: TextTable, ids: Sequence[str], what: str) -> None:
    """Row ids must be unique."""
    duplicated = pd.Series(ids).duplicated().to_numpy()
    if duplicated.any():
        second = int(np.argmax(duplicated))
        first = list(ids).index(ids[second])
        raise InputError(f"duplicate {what} id '{ids[second]}' (also on row {table.lines[first]})",
                         file=table.label, place=f"row {table.lines[second]}",
                         fix=f"give every {what} a unique id" +
                             (", or sum the duplicate rows" if what == "taxon" else ""))


def check_unique_header(table: TextTable, columns: Sequence[int], what: str) -> None:
    """Column names (sample or taxon ids) must be unique."""
    seen: dict[str, int] = {}
    for index in columns:
        name = table.header[index]
        if name in seen:
            raise InputError(f"duplicate {what} id '{name}' in columns {seen[name] + 1} and "
                             f"{index + 1}", file=table.label, place="header",
                             fix=f"give every {what} a unique id")
        seen[name] = index


def guess_orientation(table: TextTable, lineage_index: int | None,
                      metadata_ids: frozenset[str] | None) -> tuple[str, str]:
    """``("taxa-rows" | "taxa-columns", note)`` by the rules in the module docstring."""
    value_columns = [i for i in range(1, len(table.header)) if i != lineage_index]
    column_ids = {table.header[i] for i in value_columns}
    row_ids = set(table.column_text(0))
    if metadata_ids is not None:
        return orientation_from_metadata(table, column_ids, row_ids, metadata_ids), ""
    first = normalised_name(table.header[0])
    if first.startswith(TAXON_WORDS):
        return "taxa-rows", ""
    if first.startswith(SAMPLE_WORDS):
        return "taxa-columns", ""
    if lineage_index is not None:
        return "taxa-rows", ""
    n_rows, n_columns = table.n_rows, len(value_columns)
    if n_columns > n_rows:
        return "taxa-columns", (f"read taxa as columns ({n_columns} columns against {n_rows} "
                                "rows); give --orientation to change this")
    return "taxa-rows", (f"read taxa as rows ({n_rows} rows against {n_columns} columns); "
                         "give --orientation to change this")


def orientation_from_metadata(table: TextTable, column_ids: set[str], row_ids: set[str],
                              metadata_ids: frozenset[str]) -> str:
    """The axis whose ids match more metadata sample ids holds the samples."""
    in_columns, in_rows = len(column_ids & metadata_ids), len(row_ids & metadata_ids)
    if in_columns > in_rows:
        return "taxa-rows"
    if in_rows > in_columns:
        return "taxa-columns"
    if in_columns == 0:
        raise InputError("no row or column id matches a metadata sample id", file=table.label,
                         fix=f"check {mention('sample_id')} (the metadata column with sample "
                             "ids) and the ids in both files")
    raise InputError(f"{in_rows} row ids and {in_columns} column ids match metadata sample ids",
                     file=table.label,
                     fix=f"give {mention('orientation')} taxa-rows or taxa-columns")
