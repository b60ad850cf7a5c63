"""Delimited text tables (CSV or TSV, optionally gzip-compressed) read as cells of text.

Every cell is kept as stripped text; numbers are converted later, where the meaning of
a column is known, so that each problem can be reported with its file, row and column.
Row numbers in messages are line numbers of the file (the header is row 1 unless
comment lines precede it), i.e. the row a spreadsheet shows.
"""

from __future__ import annotations

import csv
import gzip
import io
import math
import os
import re
import zlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from driftscreen.errors import InputError, mention

GZIP_MAGIC = b"\x1f\x8b"
MISSING_TOKENS = frozenset({"", "na", "nan", "n/a", "null", "none", "-"})
MAX_LISTED = 12
LINE_BREAK = re.compile(r"\r\n|\r|\n")


@dataclass(frozen=True)
class TextTable:
    """A parsed table: header names, data cells as text, and file line numbers.

    Attributes
    ----------
    label:
        The file as the user gave it (used in every message).
    header:
        Column names, stripped.
    cells:
        Data cells as read, one row per data line, positional integer columns
        (use :meth:`column_text` for stripped text; number parsing ignores spaces).
    lines:
        File line number of every data row, shape ``(rows,)``.
    header_line:
        File line number of the header.
    """

    label: str
    header: tuple[str, ...]
    cells: pd.DataFrame
    lines: np.ndarray
    header_line: int = 1

    @property
    def n_rows(self) -> int:
        return int(self.cells.shape[0])

    def column_text(self, index: int) -> list[str]:
        """The cells of one column as a list of stripped strings."""
        return [text.strip() for text in self.cells.iloc[:, index].tolist()]

    def place(self, row: int, column: int | None = None) -> str:
        """``row N`` or ``row N, column 'name'`` for data row ``row``."""
        where = f"row {int(self.lines[row])}"
        return where if column is None else f"{where}, column '{self.header[column]}'"


def file_label(path: str | os.PathLike) -> str:
    """The path as the user gave it, as text."""
    return str(os.fspath(path))


def file_stem(path: str | os.PathLike) -> str:
    """File name without directory, ``.gz`` and the table extension."""
    name = Path(os.fspath(path)).name
    if name.lower().endswith(".gz"):
        name = name[:-3]
    return Path(name).stem or name


def read_text_table(path: str | os.PathLike, min_columns: int = 2) -> TextTable:
    """Read a CSV/TSV table (gzip allowed) into a :class:`TextTable`.

    The delimiter is chosen from the extension (``.csv``, ``.tsv``, ``.txt``, after
    removing ``.gz``) and confirmed on the header line: a tab or comma found there
    wins. Blank lines, and comment lines starting with ``#`` that contain no delimiter
    and precede the header, are skipped. A header one field shorter than every data row
    (a table written with row names) gets an empty first name; a trailing empty column
    (every line ending in a delimiter) is dropped. A table may have a single column
    (no delimiter at all) only if ``min_columns`` is 1.
    """
    label = file_label(path)
    text = decode_text(read_bytes(path, label), label)
    numbered = list(enumerate(split_lines(text), start=1))
    header_at = first_header_line(numbered)
    if header_at is None:
        raise InputError("the file is empty", file=label,
                         fix="give a table with a header row and data rows")
    sep = choose_delimiter(label, *numbered[header_at], single_ok=min_columns < 2)
    kept = [(n, line) for n, line in numbered[header_at:] if line.replace(sep, "").strip()]
    if len(kept) < 2:
        raise InputError("the table has a header but no data rows", file=label,
                         fix="give a table with a header row and data rows")
    widths = [field_count(line, sep) for _, line in kept]
    kept, widths = align_header(kept, widths, sep)
    check_ragged(label, kept, widths)
    cells = tokenize(label, "\n".join(line for _, line in kept), sep, len(kept))
    header = tuple(name.strip() for name in cells.iloc[0].tolist())
    data = cells.iloc[1:].reset_index(drop=True)
    lines = np.array([n for n, _ in kept[1:]], dtype=np.int64)
    header, data = drop_trailing_empty_column(header, data)
    check_header_names(label, header, min_columns)
    data.columns = range(data.shape[1])
    return TextTable(label, header, data, lines, kept[0][0])


def read_bytes(path: str | os.PathLike, label: str) -> bytes:
    """The file's bytes, decompressed if gzip; unreadable files are input errors."""
    try:
        with open(path, "rb") as stream:
            raw = stream.read()
    except FileNotFoundError:
        raise InputError("file not found", file=label, fix="check the path") from None
    except IsADirectoryError:
        raise InputError("is a folder, not a file", file=label,
                         fix="give the table's file") from None
    except PermissionError:
        raise InputError("permission denied", file=label,
                         fix="make the file readable or copy it somewhere readable") from None
    except OSError as error:
        raise InputError(f"cannot read the file ({error.strerror})", file=label,
                         fix="check the path") from None
    if raw[:2] == GZIP_MAGIC:
        try:
            raw = gzip.decompress(raw)
        except (OSError, EOFError, zlib.error):
            raise InputError("damaged gzip file", file=label,
                             fix="compress it again or give the uncompressed table") from None
    return raw


def decode_text(raw: bytes, label: str) -> str:
    """UTF-8 text (a byte-order mark is removed); else the single-byte Windows-1252 (what
    spreadsheets on Windows write), or Latin-1 for the few bytes Windows-1252 leaves out."""
    if b"\x00" in raw[:65536]:
        raise InputError("not a text table (binary content)", file=label,
                         fix="export it as CSV or TSV text")
    for encoding in ("utf-8-sig", "cp1252"):
        try:
            return raw.decode(encoding)
        except UnicodeDecodeError:
            continue
    return raw.decode("latin-1")


def split_lines(text: str) -> list[str]:
    """Lines ended by ``\\n``, ``\\r\\n`` or ``\\r`` only: other characters Python reads as line
    breaks (e.g. U+0085, U+2028, form feed) may stand inside a cell."""
    return LINE_BREAK.split(text.removesuffix("\n").removesuffix("\r"))


def first_header_line(numbered: Sequence[tuple[int, str]]) -> int | None:
    """Index of the header line: first non-blank line that is not a ``#`` comment.

    A leading line starting with ``#`` is a comment only if it contains neither a tab
    nor a comma, so a header such as ``#OTU ID<TAB>S1`` is kept.
    """
    for index, (_, line) in enumerate(numbered):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#") and "\t" not in line and "," not in line:
            continue
        return index
    return None


def choose_delimiter(label: str, line_number: int, header_line: str, single_ok: bool) -> str:
    """Tab or comma, from the extension when the header agrees, else from the header."""
    name = label.lower()
    if name.endswith(".gz"):
        name = name[:-3]
    suffix = Path(name).suffix
    preferred = {".csv": ",", ".tsv": "\t", ".tab": "\t"}.get(suffix)
    if preferred is not None and preferred in header_line:
        return preferred
    for sep in ("\t", ","):
        if sep in header_line:
            return sep
    if single_ok:
        return preferred or "\t"
    raise InputError("no tab or comma in the header line (one column only)", file=label,
                     place=f"row {line_number}",
                     fix="save the table as tab- or comma-separated text")


def field_count(line: str, sep: str) -> int:
    """Number of fields on one line, honouring double quotes."""
    if '"' not in line:
        return line.count(sep) + 1
    return len(next(csv.reader([line], delimiter=sep)))


def align_header(kept: list[tuple[int, str]], widths: list[int], sep: str
                 ) -> tuple[list[tuple[int, str]], list[int]]:
    """Give a header that is one field short of every data row an empty first name."""
    if set(widths[1:]) == {widths[0] + 1}:
        number, line = kept[0]
        return [(number, sep + line)] + kept[1:], [widths[0] + 1] + widths[1:]
    return kept, widths


def check_ragged(label: str, kept: Sequence[tuple[int, str]], widths: Sequence[int]) -> None:
    """Every row must have as many fields as the header."""
    expected = widths[0]
    for (number, _), width in zip(kept[1:], widths[1:]):
        if width != expected:
            raise InputError(f"{plural(width, 'field', 'fields')} but the header has "
                             f"{expected}", file=label,
                             place=f"row {number}",
                             fix="give every row one field per header column "
                                 "(empty cells still need their delimiter)")


def tokenize(label: str, text: str, sep: str, n_lines: int) -> pd.DataFrame:
    """Split the text into a frame of strings (pandas C parser), one row per line."""
    try:
        frame = pd.read_csv(io.StringIO(text), sep=sep, header=None, dtype=object,
                            na_filter=False, skip_blank_lines=False, engine="c")
    except (pd.errors.ParserError, ValueError):
        frame = None
    if frame is None or frame.shape[0] != n_lines:
        raise InputError("cannot split the table into rows and columns (unbalanced quotes or "
                         "line breaks inside a cell?)", file=label,
                         fix="check the quoting of the cells")
    return frame


def drop_trailing_empty_column(header: tuple[str, ...], data: pd.DataFrame
                               ) -> tuple[tuple[str, ...], pd.DataFrame]:
    """Remove a last column with no name and no values (lines ending in a delimiter)."""
    if len(header) > 2 and header[-1] == "" and (data.iloc[:, -1].str.strip() == "").all():
        return header[:-1], data.iloc[:, :-1]
    return header, data


def check_header_names(label: str, header: Sequence[str], min_columns: int) -> None:
    """Every column except the first (row ids) needs a name."""
    if len(header) < min_columns:
        raise InputError("only one column", file=label, place="header",
                         fix="give a table with an id column and value columns")
    for position, name in enumerate(header[1:], start=2):
        if not name:
            raise InputError(f"column {position} has no name", file=label, place="header",
                             fix="name every column in the header row")


def find_column(table: TextTable, name: str, parameter: str) -> int:
    """Index of the column ``name`` (exact, else unique case-insensitive match) that the
    intake option ``parameter`` names."""
    if name in table.header:
        return table.header.index(name)
    folded = [i for i, column in enumerate(table.header) if column.casefold() == name.casefold()]
    if len(folded) == 1:
        return folded[0]
    raise InputError(f"no column '{name}' ({mention(parameter, named=True)})", file=table.label,
                     place="header",
                     fix=f"use one of the columns {quoted_list(table.header)}")


def plural(count: int, singular: str, plural_form: str) -> str:
    """``1 taxon``, ``3 taxa``."""
    return f"{count} {singular if count == 1 else plural_form}"


def quoted_list(items: Sequence[str], limit: int = MAX_LISTED) -> str:
    """``'a', 'b', 'c'`` with ``(and N more)`` past ``limit``."""
    shown = ", ".join(f"'{item}'" for item in items[:limit])
    rest = len(items) - limit
    return shown + (f" (and {rest} more)" if rest > 0 else "")


def parse_numbers(table: TextTable, rows: np.ndarray | slice, columns: Sequence[int],
                  place: Callable[[int, int], str], what: str, fix_missing: str) -> np.ndarray:
    """Convert a block of cells to finite floats, or raise at the first bad cell.

    Parameters
    ----------
    table:
        The table the cells come from.
    rows, columns:
        Data rows (indices or slice) and column indices of the block.
    place:
        Maps (row, column) positions *within the block* to the place text of a message.
    what:
        What the values are, e.g. ``"count"`` (used in the message).
    fix_missing:
        The fix suggested for an empty or NA cell.
    """
    block = table.cells.iloc[rows, list(columns)].to_numpy(dtype=object)
    try:
        numbers = block.astype(np.float64)
    except ValueError:  # some cell is not a number: convert cell by cell to find it
        numbers = np.frompyfunc(float_or_nan, 1, 1)(block).astype(np.float64)
    bad = ~np.isfinite(numbers)
    if bad.any():
        row, column = (int(k) for k in np.argwhere(bad)[0])
        raise bad_cell_error(table.label, place(row, column), str(block[row, column]).strip(), what,
                             fix_missing)
    check_plain_numbers(table.label, block, place, what)
    return numbers


def check_plain_numbers(label: str, block: np.ndarray, place: Callable[[int, int], str],
                        what: str) -> None:
    """Numbers are written in ASCII digits without separators: Python also reads ``1_234``
    and digits of other scripts, which no table exporter writes for a number."""
    joined = "".join(block.ravel().tolist())
    if joined.isascii() and "_" not in joined:
        return
    for (row, column), text in np.ndenumerate(block):
        if not is_plain_number(text):
            raise InputError(f"'{text.strip()}' is not a plain number", file=label,
                             place=place(row, column),
                             fix=f"write the {what} with the digits 0-9 only (no separators)")


def is_plain_number(text: str) -> bool:
    """ASCII characters and no digit-group separator ``_`` (surrounding spaces allowed)."""
    stripped = text.strip()
    return stripped.isascii() and "_" not in stripped


def float_or_nan(text: str) -> float:
    """``float(text)``, or NaN where that fails."""
    try:
        return float(text)
    except ValueError:
        return math.nan


def bad_cell_error(label: str, place: str, text: str, what: str, fix_missing: str) -> InputError:
    """The message for an empty, NA or non-numeric cell."""
    if text.casefold() in MISSING_TOKENS:
        problem = "empty cell" if text == "" else f"missing value '{text}'"
        return InputError(f"{problem} where a {what} is needed", file=label, place=place,
                          fix=fix_missing)
    return InputError(f"non-numeric {what} '{text}'", file=label, place=place,
                      fix=f"write the {what} as a plain number")
