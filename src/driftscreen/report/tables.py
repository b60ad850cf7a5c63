"""Tables for programs: the screen's ``results.tsv``, ``parameters.tsv`` and ``results.json``.

Everything here is deterministic: the same results give the same bytes, whatever the
number of jobs and whether a run was resumed. TSV numbers are printed with ``%.6g``
(empty cell when missing); JSON numbers are exact (``repr``), with ``null`` when missing.
Each dataset's diagnostic tables and per-taxon scan appear in ``results.json`` column by
column, with each column's type (:func:`driftscreen.serialize.table_to_dict`). For a dataset with combined
p <= 0.05, ``influential_sample`` in ``results.tsv`` names its most influential sample and
``p_value_without_sample`` is each statistic's p-value without it (the combined one in
the ``combined`` row); both are empty for the other datasets. ``taxa.tsv`` has a row per
dataset and taxon (or pool of rare taxa) of the per-taxon scan (:mod:`driftscreen.taxon_scan`),
``taxa_across.tsv`` a row per taxon combined over the datasets where it was tested alone.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import pandas as pd

from driftscreen.serialize import (float_to_json, floats_to_json, influence_to_dict,
                                   summary_to_dict, table_to_dict)
from driftscreen.statistics.registry import COMBINED
from driftscreen.taxon_scan import ACROSS_COLUMNS, across_datasets

if TYPE_CHECKING:
    from driftscreen.results import NeutralityResult
    from driftscreen.screen import DatasetOutcome, ScreenResult

RESULTS_COLUMNS = ("dataset", "statistic", "alternative", "observed", "null_mean", "null_sd",
                   "null_median", "effect_size", "ratio_to_median", "p_value", "q_value",
                   "n_samples", "n_taxa", "replicates", "influential_sample",
                   "p_value_without_sample", "note")
PARAMETERS_COLUMNS = ("dataset", "design", "theta", "theta_low", "theta_high", "rate_per_day",
                      "rate_low", "rate_high", "read_precision", "read_precision_low",
                      "read_precision_high", "n_taxa", "n_taxa_dropped", "n_samples",
                      "depth_min", "depth_median", "depth_max", "span_days", "flags", "note")
TAXA_COLUMNS = ("dataset", "taxon", "members", "mean_abundance", "occupancy",
                "expected_occupancy", "occupancy_low", "occupancy_high", "occupancy_effect",
                "occupancy_p", "variability_effect", "variability_p", "persistence_effect",
                "persistence_p", "combined_p", "q_value", "direction")
FDR_METHOD = ("Benjamini-Hochberg (1995) q-values per statistic across the datasets; "
              "undefined p-values are left out")


def cell(value: object) -> str:
    """One TSV cell: floats as %.6g, missing numbers empty, text without tabs or newlines."""
    if value is None:
        return ""
    if isinstance(value, float):
        return "" if math.isnan(value) else format(value, ".6g")
    if isinstance(value, str):
        return " ".join(value.split())
    return str(value)


def tsv(columns: Sequence[str], rows: Sequence[Sequence[object]]) -> str:
    lines = ["\t".join(columns)] + ["\t".join(cell(v) for v in row) for row in rows]
    return "\n".join(lines) + "\n"


def statistic_rows(outcome: DatasetOutcome, index: int, run: ScreenResult) -> list[list[object]]:
    """results.tsv rows of one dataset; empty numbers and the reason if not analysed."""
    summary, result = outcome.summary, outcome.result
    size = [summary.n_samples, summary.n_taxa]
    if result is None:
        return [[summary.name, name] + [None] * 9 + size + [None, None, None, outcome.note]
                for name in outcome.statistic_names()]
    return [[summary.name] + list(row[:-1]) + [run.qvalue(index, row.statistic)] + size
            + [result.replicates] + without_sample_cells(result, row.statistic) + [row.note]
            for row in result.to_frame().itertuples(index=False)]


def without_sample_cells(result: NeutralityResult, name: str) -> list[object]:
    """The most influential sample and statistic ``name``'s p-value without it (or empty)."""
    influence = result.influence
    if influence is None:
        return [None, None]
    pvalue = influence.pvalue if name == COMBINED else influence.pvalues.get(name)
    return [influence.sample, pvalue]


def results_tsv(run: ScreenResult) -> str:
    """One row per dataset and statistic, ``combined`` last per dataset."""
    rows = [row for index, outcome in enumerate(run.outcomes)
            for row in statistic_rows(outcome, index, run)]
    return tsv(RESULTS_COLUMNS, rows)


def parameter_row(outcome: DatasetOutcome) -> list[object]:
    summary, result = outcome.summary, outcome.result
    estimates: list[object] = [None] * 9
    flags = ""
    if result is not None:
        for offset, key in ((0, "theta"), (3, "rate"), (6, "precision")):
            if key in result.parameters:
                p = result.parameters[key]
                estimates[offset:offset + 3] = [p.estimate, p.low, p.high]
        flags = "; ".join(result.notes)
    return ([summary.name, "time series" if summary.time_series else "snapshot"] + estimates
            + [summary.n_taxa, summary.dropped_taxa, summary.n_samples, summary.depth_min,
               summary.depth_median, summary.depth_max,
               summary.span_days if summary.time_series else None, flags, outcome.note])


def parameters_tsv(run: ScreenResult) -> str:
    """One row per dataset: fitted null with 95% intervals, design and flags."""
    return tsv(PARAMETERS_COLUMNS, [parameter_row(o) for o in run.outcomes])


def statistic_records(result: NeutralityResult, index: int, run: ScreenResult
                      ) -> list[dict[str, Any]]:
    """results.json records of one dataset's statistics, from its :meth:`to_frame` rows
    (``statistic`` named ``name``), with the q-value after the p-value and the null
    distribution last."""
    records = []
    for row in result.to_frame().to_dict(orient="records"):
        record: dict[str, Any] = {}
        for column, value in row.items():
            record["name" if column == "statistic" else column] = (
                value if isinstance(value, str) else float_to_json(value))
            if column == "p_value":
                record["q_value"] = float_to_json(run.qvalue(index, row["statistic"]))
        record["null_distribution"] = floats_to_json(
            result.statistics[row["statistic"]].null_distribution)
        records.append(record)
    return records


def dataset_record(outcome: DatasetOutcome, index: int, run: ScreenResult) -> dict[str, Any]:
    result = outcome.result
    record: dict[str, Any] = {"name": outcome.name, "analysed": result is not None,
                              "note": outcome.note, "summary": summary_to_dict(outcome.summary)}
    if result is None:
        return record
    record["parameters"] = {key: {"estimate": float_to_json(p.estimate),
                                  "low": float_to_json(p.low), "high": float_to_json(p.high),
                                  "unit": p.unit}
                            for key, p in result.parameters.items()}
    record["flags"] = list(result.notes)
    record["replicates"] = result.replicates
    record["statistics"] = statistic_records(result, index, run)
    record["diagnostics"] = {name: table_to_dict(table)
                             for name, table in result.diagnostics.items()}
    record["influence"] = influence_to_dict(result.influence)
    record["taxa"] = None if result.taxa is None else table_to_dict(result.taxa)
    return record


def results_json(run: ScreenResult, provenance: Mapping[str, Any]) -> str:
    """Settings, inputs with checksums and every dataset's results, as JSON text.

    ``provenance`` is the settings fingerprint of :func:`driftscreen.store.settings_fingerprint`.
    """
    document = {
        "driftscreen_version": provenance["driftscreen_version"],
        "inputs": [{"role": role, **entry} for role, entry in provenance["inputs"].items()],
        "intake": provenance["intake"],
        "settings": {"replicates": run.settings.replicates, "groupings": run.settings.groupings,
                     "seed": run.settings.seed, "statistics": provenance["statistics"]},
        "fdr": FDR_METHOD,
        "datasets": [dataset_record(o, i, run) for i, o in enumerate(run.outcomes)],
    }
    return json.dumps(document, indent=1, allow_nan=False) + "\n"


def taxa_rows(result: NeutralityResult) -> list[list[object]]:
    """taxa.tsv rows of one dataset (none without a scan); snapshots leave persistence empty."""
    table = result.taxa
    if table is None:
        return []
    columns = [table[name].tolist() if name in table else [None] * len(table)
               for name in TAXA_COLUMNS[1:]]
    return [[result.dataset.name] + list(row) for row in zip(*columns)]


def result_taxa_tsv(result: NeutralityResult) -> str:
    """The per-taxon scan of one dataset (``test --taxa``)."""
    return tsv(TAXA_COLUMNS, taxa_rows(result))


def taxa_tsv(run: ScreenResult) -> str:
    """The per-taxon scan of every analysed dataset, in the screen's order."""
    return tsv(TAXA_COLUMNS, [row for outcome in run.outcomes if outcome.result is not None
                              for row in taxa_rows(outcome.result)])


def screen_taxa(run: ScreenResult) -> pd.DataFrame:
    """Taxa combined over the screen's datasets (:func:`driftscreen.taxon_scan.across_datasets`)."""
    return across_datasets([o.result.taxa for o in run.outcomes if o.result is not None])


def taxa_across_tsv(run: ScreenResult) -> str:
    """One row per taxon tested alone in at least one dataset, smallest q first."""
    across = screen_taxa(run)
    return tsv(ACROSS_COLUMNS, list(across[list(ACROSS_COLUMNS)].itertuples(index=False)))
