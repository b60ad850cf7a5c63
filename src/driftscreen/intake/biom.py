"""BIOM tables (JSON 1.0 and HDF5 2.1), read with the format's reference package.

A BIOM file holds observations (taxa) by samples, and may carry sample metadata and
observation metadata. It becomes the :class:`CountTable` a wide table with taxa as rows
would give, its sample metadata a :class:`Metadata` that serves ``--dataset-by``,
``--time-by`` and ``--depth-by``, and its observation metadata ``taxonomy`` (a list of
ranks or a ``;``-separated string) the lineages of ``--rank``. The rest of intake is the
same as for text tables. A BIOM file has no rows to point at, so messages name the
observation, the sample and the metadata field instead.

Detection: HDF5 content, a JSON object, or a ``.biom`` name (a ``.biom`` file starting
with ``#`` is the classic tab-separated export and is read as a text table). Reading
needs the optional extra ``driftscreen[biom]`` (``biom-format`` and ``h5py``).
"""

from __future__ import annotations

import gzip
import io
import json
import numbers
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from driftscreen.errors import InputError, mention
from driftscreen.intake.counts import LINEAGE_NAMES, CountTable, normalised_name
from driftscreen.intake.metadata import Metadata
from driftscreen.intake.tables import TextTable, file_label, quoted_list, read_bytes

if TYPE_CHECKING:
    from biom import Table as ReferenceTable

HDF5_MAGIC = b"\x89HDF\r\n\x1a\n"
FORMAT_FIX = "give a BIOM 1.0 (JSON) or 2.1 (HDF5) file"
JSON_FIELDS = ("rows", "columns", "shape", "data")  # what a reader needs of BIOM 1.0's fields
INSTALL_FIX = "install the BIOM reader with: pip install 'driftscreen[biom]'"
SAMPLE_ID_HEADER = "sample id"


@dataclass
class BiomCounts(CountTable):
    """The counts of a BIOM table; places are named by observation and sample ids."""

    def cell_place(self, sample: int, taxon: int) -> str:
        return f"observation '{self.taxa[taxon]}', sample '{self.samples[sample]}'"

    def sample_place(self, sample: int) -> str:
        return f"sample '{self.samples[sample]}'"


@dataclass(frozen=True)
class BiomMetadataCells(TextTable):
    """Sample metadata of a BIOM table as text cells, one row per sample."""

    def place(self, row: int, column: int | None = None) -> str:
        sample = str(self.cells.iat[row, 0]).strip()
        where = f"sample '{sample}'"
        return where if column is None else f"{where}, metadata field '{self.header[column]}'"


@dataclass(frozen=True)
class BiomSampleMetadata(Metadata):
    """The sample metadata stored inside a BIOM file (fields instead of columns)."""

    def column(self, name: str, parameter: str) -> int:
        fields = self.table.header[1:]
        if name in fields:
            return fields.index(name) + 1
        folded = [k for k, field in enumerate(fields) if field.casefold() == name.casefold()]
        if len(folded) == 1:
            return folded[0] + 1
        raise InputError(f"no sample metadata field '{name}' "
                         f"({mention(parameter, named=True)})",
                         file=self.label, fix=f"use one of the fields {quoted_list(fields)}, "
                                              f"or give {mention('metadata')} FILE")


@dataclass(frozen=True)
class BiomInput:
    """What a BIOM file offers intake.

    Attributes
    ----------
    counts:
        The counts table (taxa as rows), lineages filled in if a lineage field is used.
    samples:
        Its sample metadata, or ``None`` if it has none or a metadata file wins.
    lineage:
        The observation metadata field used for ``--rank`` (``None`` if not needed).
    """

    counts: BiomCounts
    samples: BiomSampleMetadata | None
    lineage: str | None


def is_biom(path: str | os.PathLike) -> bool:
    """True for HDF5 or JSON content, or a ``.biom`` name not starting with ``#``."""
    head = file_head(path)
    if head.startswith(HDF5_MAGIC) or head.lstrip(b"\xef\xbb\xbf \t\r\n").startswith(b"{"):
        return True
    name = file_label(path).lower()
    name = name[:-3] if name.endswith(".gz") else name
    return Path(name).suffix == ".biom" and not head.lstrip().startswith(b"#")


def file_head(path: str | os.PathLike, size: int = 64) -> bytes:
    """The first bytes of a file (decompressed if gzip); empty if it cannot be read."""
    try:
        with open(path, "rb") as stream:
            head = stream.read(size)
            if head[:2] == b"\x1f\x8b":
                stream.seek(0)
                with gzip.open(stream) as unpacked:
                    head = unpacked.read(size)
    except (OSError, EOFError):
        return b""
    return head


def read_biom(path: str | os.PathLike, *, layout: str, orientation: str, sample_id: str | None,
              metadata: str | os.PathLike | None, lineage: str | None, rank: str | None,
              taxon_map: object) -> BiomInput:
    """Read a BIOM file and check the options that concern it.

    A separate ``metadata`` file wins over the sample metadata inside (``samples`` is
    then ``None``), with a note.
    """
    label = file_label(path)
    check_text_options(label, layout, orientation, sample_id, metadata is not None)
    table = load_reference_table(label, read_bytes(path, label))
    counts = count_table(label, table)
    samples = sample_metadata(label, counts.samples, table.metadata(axis="sample"))
    if samples is not None and metadata is not None:
        counts.notes.append(f"the sample metadata inside {label} was not used: "
                            f"{file_label(metadata)} was given and wins")
        samples = None
    observations = table.metadata(axis="observation")
    key = lineage_field(label, observations, lineage, rank is not None and taxon_map is None)
    if key is not None:
        counts.lineages = tuple(lineage_text(meta, key) for meta in observations or ())
    return BiomInput(counts, samples, key)


def check_text_options(label: str, layout: str, orientation: str, sample_id: str | None,
                       metadata_given: bool) -> None:
    """Options that describe text tables do not apply to a BIOM file."""
    for name, value in (("layout", layout), ("orientation", orientation)):
        if value != "auto":
            raise InputError(f"applies to CSV/TSV tables only, but {label} is a BIOM table",
                             parameter=name, fix="drop it")
    if sample_id is not None and not metadata_given:
        raise InputError(f"names a column of a {mention('metadata')} file; the sample ids of "
                         f"{label} are those stored in it", parameter="sample_id",
                         fix=f"drop it, or give {mention('metadata')} FILE")


def load_reference_table(label: str, raw: bytes) -> ReferenceTable:
    """Parse the bytes with the reference package (HDF5 2.1 or JSON 1.0)."""
    try:
        from biom import Table
        from biom.exception import BiomException
    except ImportError:
        raise InputError("reading BIOM tables needs the biom-format package", file=label,
                         fix=INSTALL_FIX) from None
    if not raw.strip():
        raise InputError("the file is empty", file=label, fix="give a BIOM table")
    is_hdf5 = raw.startswith(HDF5_MAGIC)
    document = None if is_hdf5 else json_document(label, raw)
    try:
        return table_from_hdf5(label, raw, Table) if is_hdf5 else Table.from_json(document)
    except InputError:
        raise
    except BiomException as error:
        raise biom_problem(label, raw, error) from None
    except (KeyError, TypeError, ValueError, IndexError, AttributeError) as error:
        raise InputError(f"not a readable BIOM table ({describe(error)})", file=label,
                         fix=FORMAT_FIX) from None


def table_from_hdf5(label: str, raw: bytes, table_class: type[ReferenceTable]
                    ) -> ReferenceTable:
    """A BIOM 2.1 table from HDF5 bytes; a damaged file is an input error."""
    try:
        import h5py
    except ImportError:
        raise InputError("reading BIOM 2.1 (HDF5) tables needs the h5py package", file=label,
                         fix=INSTALL_FIX) from None
    try:
        handle = h5py.File(io.BytesIO(raw), "r")
    except OSError as error:
        raise InputError(f"damaged HDF5 file ({describe(error)})", file=label,
                         fix="write the BIOM file again, or export it as BIOM 1.0 (JSON)"
                         ) from None
    with handle:
        return table_class.from_hdf5(handle)


def json_document(label: str, raw: bytes) -> dict:
    """The JSON object of a BIOM 1.0 file; invalid JSON is reported at its line and column."""
    if not raw.lstrip(b"\xef\xbb\xbf \t\r\n").startswith(b"{"):
        raise InputError("neither BIOM 2.1 (HDF5) nor BIOM 1.0 (JSON) content", file=label,
                         fix=FORMAT_FIX)
    try:
        document = json.loads(raw.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise InputError("the JSON is not UTF-8 text", file=label, fix=FORMAT_FIX) from None
    except json.JSONDecodeError as error:
        raise InputError(f"not valid JSON ({error.msg})", file=label,
                         place=f"line {error.lineno}, column {error.colno}",
                         fix="write the BIOM file again (a truncated download or an edit "
                             "may have damaged it)") from None
    missing = [name for name in JSON_FIELDS if name not in document]
    if missing:
        raise InputError(f"the JSON is not a BIOM table (no field {quoted_list(missing)})",
                         file=label, fix=FORMAT_FIX)
    return document


def biom_problem(label: str, raw: bytes, error: Exception) -> InputError:
    """The message for a table the reference package refuses (duplicate ids, mostly)."""
    for axis in ("observation", "sample"):
        repeated = first_repeated(stored_ids(raw, axis))
        if repeated is not None:
            return InputError(f"duplicate {axis} id '{repeated}'", file=label,
                              place=f"{axis} ids", fix=f"give every {axis} a unique id" +
                                  (" (merge the duplicates)" if axis == "observation" else ""))
    return InputError(f"not a readable BIOM table ({describe(error)})", file=label,
                      fix=FORMAT_FIX)


def stored_ids(raw: bytes, axis: str) -> list[str]:
    """The ids of one axis as stored (JSON rows/columns or HDF5 ``AXIS/ids``)."""
    if raw.startswith(HDF5_MAGIC):
        import h5py

        with h5py.File(io.BytesIO(raw), "r") as handle:
            return [value.decode() if isinstance(value, bytes) else str(value)
                    for value in handle[f"{axis}/ids"][()]]
    entries = json.loads(raw.decode("utf-8-sig"))["rows" if axis == "observation" else "columns"]
    return [str(entry["id"]) for entry in entries]


def first_repeated(ids: Sequence[str]) -> str | None:
    """The first id that occurs a second time, or ``None``."""
    seen: set[str] = set()
    for value in ids:
        if value in seen:
            return value
        seen.add(value)
    return None


def describe(error: Exception) -> str:
    """A short, one-line description of a parser's exception."""
    text = " ".join(str(error).split()).strip("'\"")
    return f"{type(error).__name__}: {text}" if text else type(error).__name__


def count_table(label: str, table: ReferenceTable) -> BiomCounts:
    """The observation x sample matrix as a ``(samples, taxa)`` count table."""
    taxa = tuple(str(t) for t in table.ids(axis="observation"))
    samples = tuple(str(s) for s in table.ids(axis="sample"))
    if not taxa or not samples:
        raise InputError(f"the table is empty ({len(taxa)} observations, {len(samples)} "
                         "samples)", file=label,
                         fix="give a BIOM table with at least one observation and one sample")
    values = np.asarray(table.matrix_data.toarray(), dtype=np.float64).T.copy()
    bad = ~np.isfinite(values)
    if bad.any():
        sample, taxon = (int(k) for k in np.argwhere(bad.T)[0][::-1])
        raise InputError(f"value {values[sample, taxon]} is not a number", file=label,
                         place=f"observation '{taxa[taxon]}', sample '{samples[sample]}'",
                         fix="write every count as a finite number")
    return BiomCounts(values, samples, taxa, None, label, "taxa-rows",
                      np.arange(1, len(taxa) + 1))


def sample_metadata(label: str, samples: Sequence[str],
                    stored: Sequence[Mapping | None] | None) -> BiomSampleMetadata | None:
    """The sample metadata as text cells, or ``None`` if the file has none."""
    records = [dict(entry or {}) for entry in (stored or ())]
    fields = list(dict.fromkeys(str(key) for record in records for key in record))
    if not fields:
        return None
    rows = [[sample] + [metadata_text(record.get(name)) for name in fields]
            for sample, record in zip(samples, records)]
    cells = pd.DataFrame(rows, dtype=object)
    cells.columns = range(cells.shape[1])
    table = BiomMetadataCells(label, (SAMPLE_ID_HEADER, *fields), cells,
                              np.arange(1, len(samples) + 1), 0)
    return BiomSampleMetadata(table, 0, {sample: row for row, sample in enumerate(samples)})


def metadata_text(value: object) -> str:
    """A metadata value as text: whole numbers without a decimal point, lists joined by ``;``."""
    if value is None:
        return ""
    if isinstance(value, bytes):
        return value.decode()
    if isinstance(value, (list, tuple, np.ndarray)):
        return "; ".join(metadata_text(part) for part in value)
    if isinstance(value, numbers.Integral) and not isinstance(value, bool):
        return str(int(value))
    if isinstance(value, numbers.Real) and not isinstance(value, bool):
        number = float(value)
        return str(int(number)) if number.is_integer() else repr(number)
    return str(value).strip()


def lineage_field(label: str, observations: Sequence[Mapping | None] | None,
                  lineage: str | None, needed: bool) -> str | None:
    """The observation metadata field holding lineages: the one named, else ``taxonomy``."""
    fields = list(dict.fromkeys(str(key) for meta in observations or () for key in meta or {}))
    if lineage is not None:
        if lineage in fields:
            return lineage
        folded = [field for field in fields if field.casefold() == lineage.casefold()]
        if len(folded) == 1:
            return folded[0]
        raise InputError(f"no observation metadata field '{lineage}' "
                         f"({mention('lineage', named=True)})",
                         file=label, fix=f"use one of the fields {quoted_list(fields)}"
                         if fields else f"give {mention('taxon_map')} FILE (the file has no "
                                        "observation metadata)")
    if not needed:
        return None
    found = [field for field in fields if normalised_name(field) in LINEAGE_NAMES]
    if not found:
        raise InputError(f"no taxonomy in the observation metadata, so {mention('rank')} cannot "
                         "aggregate taxa", file=label,
                         fix=f"give {mention('taxon_map')} FILE, or add the taxonomy to the BIOM "
                             "file")
    return found[0]


def lineage_text(meta: Mapping | None, key: str) -> str:
    """One observation's lineage as a ``;``-separated string (empty if it has none)."""
    return metadata_text((meta or {}).get(key))
