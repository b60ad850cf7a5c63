"""``write_tables``: datasets as one wide counts table and one metadata table.

The counts table is a TSV with taxa as rows (first column ``taxon``) and one column
per sample; the metadata table has ``sample``, the dataset column and, for time series,
the time column (days). Reading them back with ``dataset_by=[dataset_column]`` and
``time_by=time_column`` gives the same counts, times and names. Files are written
through a temporary file and a rename, so no half-written table is left behind.
"""

from __future__ import annotations

import os
from collections.abc import Sequence

import numpy as np
import pandas as pd

from driftscreen.dataset import Dataset
from driftscreen.files import atomic_write_text


def write_tables(datasets: Sequence[Dataset], counts_path: str | os.PathLike,
                 metadata_path: str | os.PathLike, *, dataset_column: str = "dataset",
                 time_column: str = "day") -> None:
    """Write ``datasets`` as a wide counts TSV and a metadata TSV that intake reads back.

    Parameters
    ----------
    datasets:
        Datasets with distinct sample ids; all time series or all snapshots.
    counts_path, metadata_path:
        Output files (plain TSV text).
    dataset_column, time_column:
        Names of the metadata columns holding dataset names and times in days.
    """
    if not datasets:
        raise ValueError("no datasets to write")
    kinds = {d.is_time_series for d in datasets}
    if len(kinds) > 1:
        raise ValueError("cannot write time series and snapshot datasets to one metadata table")
    samples = [s for d in datasets for s in d.samples]
    if len(set(samples)) != len(samples):
        raise ValueError("sample ids must be distinct across datasets")
    counts = counts_frame(datasets, samples)
    atomic_write_text(counts_path, counts.to_csv(sep="\t", index_label="taxon",
                                                 lineterminator="\n"))
    metadata = metadata_frame(datasets, dataset_column, time_column)
    atomic_write_text(metadata_path, metadata.to_csv(sep="\t", index=False, lineterminator="\n"))


def counts_frame(datasets: Sequence[Dataset], samples: Sequence[str]) -> pd.DataFrame:
    """Taxa x samples integer frame over the union of taxa (0 where a taxon is absent)."""
    taxa = list(dict.fromkeys(t for d in datasets for t in d.taxa))
    row = {t: k for k, t in enumerate(taxa)}
    table = np.zeros((len(taxa), len(samples)), dtype=np.int64)
    start = 0
    for dataset in datasets:
        rows = [row[t] for t in dataset.taxa]
        table[np.ix_(rows, range(start, start + dataset.n_samples))] = dataset.counts.T
        start += dataset.n_samples
    return pd.DataFrame(table, index=pd.Index(taxa, name="taxon"), columns=list(samples))


def metadata_frame(datasets: Sequence[Dataset], dataset_column: str, time_column: str
                   ) -> pd.DataFrame:
    """One row per sample: id, dataset name and (time series) time in days."""
    frame = pd.DataFrame({
        "sample": [s for d in datasets for s in d.samples],
        dataset_column: [d.name for d in datasets for _ in d.samples],
    })
    if datasets[0].is_time_series:
        frame[time_column] = [repr(float(t)) for d in datasets for t in d.design.times]
    return frame
