"""Data intake: abundance tables and sample metadata into checked datasets.

:func:`read_datasets` reads wide or long CSV/TSV tables (gzip allowed), or BIOM files
(``biom.py``, with the sample metadata and taxonomy they carry), of read counts
or relative abundances, joins sample metadata, splits the samples into datasets,
converts dates to days, aggregates taxa, and reports every input problem as one line
naming the file, the place and the fix (:class:`driftscreen.errors.InputError`).
:func:`write_tables` writes datasets in a form :func:`read_datasets` reads back.
"""

from __future__ import annotations

from driftscreen.intake.reader import intake_defaults, read_datasets
from driftscreen.intake.writer import write_tables

__all__ = ["intake_defaults", "read_datasets", "write_tables"]
