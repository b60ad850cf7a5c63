"""Sample metadata: join on sample id, datasets, sampling times and depths.

Sample ids are compared as text after stripping whitespace. Times are either all
numbers (days, fractions allowed) or all ISO 8601 dates (``YYYY-MM-DD``, optionally
with a time ``THH:MM[:SS[.f]]`` and an offset ``Z``/``+HH:MM``); dates become days
since the first sample of their dataset.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from driftscreen.errors import InputError
from driftscreen.intake.tables import (TextTable, find_column, parse_numbers, quoted_list,
                                       read_text_table)
from driftscreen.limits import MAX_READS, MAX_READS_TEXT

ISO_DATE = re.compile(r"\d{4}-\d{2}-\d{2}([T ]\d{2}:\d{2}(:\d{2}(\.\d+)?)?(Z|[+-]\d{2}:?\d{2})?)?")
DAY = np.timedelta64(1, "D")


@dataclass(frozen=True)
class Metadata:
    """A metadata table indexed by sample id.

    Attributes
    ----------
    table:
        The parsed file.
    id_column:
        Index of the sample id column.
    row_of:
        Data row of every sample id.
    """

    table: TextTable
    id_column: int
    row_of: dict[str, int]

    @property
    def label(self) -> str:
        return self.table.label

    def ids(self) -> frozenset[str]:
        return frozenset(self.row_of)

    def column(self, name: str, parameter: str) -> int:
        """Index of the column the intake option ``parameter`` names; a missing column is an
        input error listing the others."""
        return find_column(self.table, name, parameter)

    def rows(self, samples: Sequence[str]) -> np.ndarray:
        """Data rows of the given samples (all must be present)."""
        return np.array([self.row_of[s] for s in samples], dtype=np.int64)

    def text(self, column: int, samples: Sequence[str]) -> list[str]:
        """Stripped cells of one column for the given samples, in that order."""
        cells = self.table.cells.iloc[self.rows(samples), column]
        return [text.strip() for text in cells.tolist()]


def read_metadata(path: str, sample_id: str | None) -> Metadata:
    """Read a metadata table; sample ids come from ``sample_id`` or the first column."""
    table = read_text_table(path, min_columns=1)
    id_column = 0 if sample_id is None else find_column(table, sample_id, "sample_id")
    ids = table.column_text(id_column)
    row_of: dict[str, int] = {}
    for row, sample in enumerate(ids):
        if not sample:
            raise InputError("empty sample id", file=table.label, place=table.place(row, id_column),
                             fix="give every metadata row a sample id, or remove the row")
        if sample in row_of:
            raise InputError(f"duplicate sample id '{sample}' (also on row "
                             f"{table.lines[row_of[sample]]})", file=table.label,
                             place=table.place(row, id_column),
                             fix="give each sample one metadata row")
        row_of[sample] = row
    return Metadata(table, id_column, row_of)


def check_join(metadata: Metadata, samples: Sequence[str], counts_label: str) -> list[str]:
    """Every counts sample needs a metadata row; unused metadata rows give a warning."""
    missing = [s for s in samples if s not in metadata.row_of]
    if missing:
        raise InputError(f"{len(missing)} sample(s) of {counts_label} have no metadata row: "
                         f"{quoted_list(missing, 3)}", file=metadata.label,
                         place=f"column '{metadata.table.header[metadata.id_column]}'",
                         fix=f"add rows for them to {metadata.label} or remove them from "
                             f"{counts_label}")
    present = set(samples)
    unused = [s for s in metadata.row_of if s not in present]
    if not unused:
        return []
    return [f"{len(unused)} metadata row(s) of {metadata.label} have no sample in "
            f"{counts_label} and were ignored: {quoted_list(unused, 3)}"]


def dataset_names(metadata: Metadata, columns: Sequence[int], samples: Sequence[str]
                  ) -> list[str]:
    """Dataset name of every sample: its values in ``columns`` joined with ``/``."""
    parts = []
    for column in columns:
        values = metadata.text(column, samples)
        for sample, value in zip(samples, values):
            if not value:
                raise InputError("empty dataset value", file=metadata.label,
                                 place=metadata.table.place(metadata.row_of[sample], column),
                                 fix="fill in the cell or remove the sample")
        parts.append(values)
    return ["/".join(values) for values in zip(*parts)]


@dataclass(frozen=True)
class Times:
    """Parsed sampling times of some samples.

    Attributes
    ----------
    values:
        Days (float64) for numeric times, or ``datetime64[us]`` for dates.
    text:
        The cells as written.
    is_date:
        True for dates (converted to days per dataset by :meth:`days`).
    label, column:
        The metadata file and the time column's name.
    """

    values: np.ndarray
    text: tuple[str, ...]
    is_date: bool
    label: str
    column: str

    def days(self, members: np.ndarray) -> np.ndarray:
        """Times of the samples ``members`` in days (dates: since the earliest of them)."""
        selected = self.values[members]
        if not self.is_date:
            return selected.astype(np.float64)
        return (selected - selected.min()) / DAY


def read_times(metadata: Metadata, column: int, samples: Sequence[str]) -> Times:
    """Times of ``samples`` from ``column``: all numbers or all ISO dates."""
    text = metadata.text(column, samples)
    rows = metadata.rows(samples)

    def place(k: int) -> str:
        return metadata.table.place(int(rows[k]), column)

    numbers = pd.to_numeric(pd.Series(text, dtype=object), errors="coerce").to_numpy(
        dtype=np.float64, na_value=np.nan)
    is_number = np.isfinite(numbers)
    is_date = np.array([bool(ISO_DATE.fullmatch(t)) for t in text])
    for k, t in enumerate(text):
        if not (is_number[k] or is_date[k]):
            raise InputError(f"cannot read time '{t}'" if t else "empty time", file=metadata.label,
                             place=place(k), fix="write days as numbers or dates as YYYY-MM-DD")
    name = metadata.table.header[column]
    if is_number.all():
        return Times(numbers, tuple(text), False, metadata.label, name)
    if is_date.all():
        return Times(parse_dates(metadata, text, place), tuple(text), True, metadata.label, name)
    number_at, date_at = int(np.argmax(is_number)), int(np.argmax(is_date))
    raise InputError(f"mixed time formats: '{text[number_at]}' is a number but "
                     f"'{text[date_at]}' ({place(date_at)}) is a date", file=metadata.label,
                     place=place(number_at), fix="use either days or ISO dates for every sample")


def parse_dates(metadata: Metadata, text: Sequence[str], place: Callable[[int], str]
                ) -> np.ndarray:
    """ISO dates as ``datetime64[us]`` (UTC where an offset is given; microseconds cover
    every year from 1 to 9999 exactly); an impossible date (e.g. 30 February) is an input
    error."""
    stamps = []
    for k, t in enumerate(text):
        try:
            stamp = pd.Timestamp(t)
        except ValueError:
            raise InputError(f"impossible date '{t}'", file=metadata.label, place=place(k),
                             fix="correct the date (YYYY-MM-DD)") from None
        if stamp.tzinfo is not None:
            stamp = stamp.tz_convert("UTC").tz_localize(None)
        stamps.append(stamp.to_datetime64())
    return np.array(stamps, dtype="datetime64[us]")


def read_depths(metadata: Metadata, column: int, samples: Sequence[str]) -> np.ndarray:
    """Per-sample depths (reads) from ``column``: finite numbers > 0."""
    rows = metadata.rows(samples)
    depths = parse_numbers(metadata.table, rows, [column],
                           lambda r, c: metadata.table.place(int(rows[r]), column), "depth",
                           "give every sample its number of reads")[:, 0]
    bad = np.flatnonzero(depths <= 0)
    if bad.size:
        k = int(bad[0])
        raise InputError(f"depth {depths[k]:g} of sample '{samples[k]}' is not positive",
                         file=metadata.label, place=metadata.table.place(int(rows[k]), column),
                         fix="give the number of reads of the sample (> 0)")
    huge = np.flatnonzero(depths > MAX_READS)
    if huge.size:
        k = int(huge[0])
        raise InputError(f"depth {depths[k]:g} of sample '{samples[k]}' is more reads than any "
                         f"sequencing run gives (at most {MAX_READS_TEXT})", file=metadata.label,
                         place=metadata.table.place(int(rows[k]), column),
                         fix="give the number of reads of the sample")
    return depths


@dataclass(frozen=True)
class Biological:
    """The biological sample of every sequenced sample (``replicate_by``).

    Attributes
    ----------
    names:
        One name per sample of the counts table, in its order.
    column:
        The metadata column's name.
    """

    names: tuple[str, ...]
    column: str


def read_biological(metadata: Metadata, column: int, samples: Sequence[str]) -> Biological:
    """Biological sample names of ``samples`` from ``column``; an empty cell is an error."""
    names = metadata.text(column, samples)
    for sample, name in zip(samples, names):
        if not name:
            raise InputError("empty biological sample name", file=metadata.label,
                             place=metadata.table.place(metadata.row_of[sample], column),
                             fix="write the biological sample this sequenced sample comes "
                                 "from (its own sample id if it was sequenced once)")
    return Biological(tuple(names), metadata.table.header[column])
