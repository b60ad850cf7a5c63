"""Results as JSON-safe dictionaries and back, without losing a bit.

Floats are written as JSON numbers, which Python prints with ``repr`` (the shortest
string that reads back to the same double), so a round trip is exact (except the
metacommunity composition ``p``, which :class:`NeutralModel` renormalises: last-bit changes
at most). JSON has no NaN or infinity: NaN becomes ``null`` and the infinities the strings
``"inf"`` and ``"-inf"``. Diagnostic tables are stored column by column with each column's
type (``float``, ``int``, ``bool`` or ``text``), so they read back with the same dtypes.
A result's most influential sample is ``null`` when there is none (and in records written
before results carried one).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np
import pandas as pd

from driftscreen.neutral.model import NOISE_CHOICES, NeutralModel, NullOptions
from driftscreen.results import (CalibrationSettings, DatasetSummary, NeutralityResult,
                                 ParameterEstimate, SampleInfluence, StatisticResult)

INFINITIES = {"inf": math.inf, "-inf": -math.inf}


def float_to_json(value: float) -> float | str | None:
    """A float as a JSON value: itself, ``None`` for NaN, ``"inf"``/``"-inf"``."""
    value = float(value)
    if math.isnan(value):
        return None
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    return value


def float_from_json(value: float | str | None) -> float:
    """Inverse of :func:`float_to_json`."""
    if value is None:
        return math.nan
    if isinstance(value, str):
        return INFINITIES[value]
    return float(value)


def floats_to_json(values: Iterable[float]) -> list[float | str | None]:
    return [float_to_json(v) for v in np.asarray(values, dtype=np.float64).ravel()]


def floats_from_json(values: Iterable[float | str | None]) -> np.ndarray:
    return np.array([float_from_json(v) for v in values], dtype=np.float64)


def summary_to_dict(summary: DatasetSummary) -> dict[str, Any]:
    return {
        "name": summary.name, "n_samples": summary.n_samples, "n_taxa": summary.n_taxa,
        "dropped_taxa": summary.dropped_taxa, "time_series": summary.time_series,
        "span_days": float_to_json(summary.span_days), "depth_min": summary.depth_min,
        "depth_median": float_to_json(summary.depth_median), "depth_max": summary.depth_max,
        "notes": list(summary.notes), "warnings": list(summary.warnings),
    }


def summary_from_dict(data: Mapping[str, Any]) -> DatasetSummary:
    return DatasetSummary(
        name=data["name"], n_samples=int(data["n_samples"]), n_taxa=int(data["n_taxa"]),
        dropped_taxa=int(data["dropped_taxa"]), time_series=bool(data["time_series"]),
        span_days=float_from_json(data["span_days"]), depth_min=int(data["depth_min"]),
        depth_median=float_from_json(data["depth_median"]), depth_max=int(data["depth_max"]),
        notes=tuple(data["notes"]), warnings=tuple(data["warnings"]))


def model_to_dict(model: NeutralModel) -> dict[str, Any]:
    return {"p": floats_to_json(model.p), "theta": float_to_json(model.theta),
            "rate": None if model.rate is None else float_to_json(model.rate),
            "noise": float_to_json(model.noise), "flags": list(model.flags),
            "conditioned": model.conditioned}


def model_from_dict(data: Mapping[str, Any]) -> NeutralModel:
    rate = data["rate"]
    return NeutralModel(p=floats_from_json(data["p"]), theta=float_from_json(data["theta"]),
                        rate=None if rate is None else float_from_json(rate),
                        noise=float_from_json(data.get("noise", 0.0)),
                        flags=tuple(data["flags"]),
                        conditioned=bool(data.get("conditioned", False)))


def parameter_to_dict(parameter: ParameterEstimate) -> dict[str, Any]:
    return {"name": parameter.name, "estimate": float_to_json(parameter.estimate),
            "low": float_to_json(parameter.low), "high": float_to_json(parameter.high),
            "unit": parameter.unit}


def parameter_from_dict(data: Mapping[str, Any]) -> ParameterEstimate:
    return ParameterEstimate(data["name"], float_from_json(data["estimate"]),
                             float_from_json(data["low"]), float_from_json(data["high"]),
                             data["unit"])


def statistic_to_dict(result: StatisticResult) -> dict[str, Any]:
    return {"name": result.name, "statistic": float_to_json(result.statistic),
            "pvalue": float_to_json(result.pvalue), "alternative": result.alternative,
            "note": result.note, "null_distribution": floats_to_json(result.null_distribution)}


def statistic_from_dict(data: Mapping[str, Any]) -> StatisticResult:
    return StatisticResult(data["name"], float_from_json(data["statistic"]),
                           float_from_json(data["pvalue"]),
                           floats_from_json(data["null_distribution"]), data["alternative"],
                           data["note"])


def settings_to_dict(settings: CalibrationSettings) -> dict[str, Any]:
    noise = settings.null.noise
    return {"replicates": settings.replicates, "groupings": settings.groupings,
            "seed": settings.seed, "read_noise": noise if isinstance(noise, str)
            else float_to_json(noise), "start": settings.null.start}


def settings_from_dict(data: Mapping[str, Any]) -> CalibrationSettings:
    noise = data["read_noise"]
    return CalibrationSettings(
        replicates=int(data["replicates"]), groupings=int(data["groupings"]),
        seed=int(data["seed"]),
        null=NullOptions(noise=noise if noise in NOISE_CHOICES else float_from_json(noise),
                         start=data["start"]))


def influence_to_dict(influence: SampleInfluence | None) -> dict[str, Any] | None:
    if influence is None:
        return None
    return {"sample": influence.sample, "index": influence.index,
            "score": float_to_json(influence.score), "pvalue": float_to_json(influence.pvalue),
            "pvalues": {name: float_to_json(p) for name, p in influence.pvalues.items()},
            "verdict_changes": influence.verdict_changes}


def influence_from_dict(data: Mapping[str, Any] | None) -> SampleInfluence | None:
    if data is None:
        return None
    return SampleInfluence(
        sample=data["sample"], index=int(data["index"]), score=float_from_json(data["score"]),
        pvalue=float_from_json(data["pvalue"]),
        pvalues={name: float_from_json(p) for name, p in data["pvalues"].items()},
        verdict_changes=bool(data["verdict_changes"]))


def column_type(column: pd.Series) -> str:
    """``"bool"``, ``"int"``, ``"float"`` or ``"text"``: how a table column is stored."""
    if pd.api.types.is_bool_dtype(column):
        return "bool"
    if pd.api.types.is_integer_dtype(column):
        return "int"
    if pd.api.types.is_float_dtype(column):
        return "float"
    return "text"


def column_to_json(column: pd.Series, kind: str) -> list[Any]:
    if kind == "float":
        return floats_to_json(column.to_numpy(dtype=np.float64))
    if kind == "int":
        return [int(v) for v in column]
    if kind == "bool":
        return [bool(v) for v in column]
    return [str(v) for v in column]


def column_from_json(values: list[Any], kind: str) -> np.ndarray:
    if kind == "float":
        return floats_from_json(values)
    if kind == "int":
        return np.array(values, dtype=np.int64)
    if kind == "bool":
        return np.array(values, dtype=bool)
    return np.array(values, dtype=object)


def table_to_dict(table: pd.DataFrame) -> dict[str, Any]:
    """A table as ``{"columns": [{"name", "type", "values"}, ...]}``, in column order."""
    columns = []
    for name in table.columns:
        kind = column_type(table[name])
        columns.append({"name": str(name), "type": kind,
                        "values": column_to_json(table[name], kind)})
    return {"columns": columns}


def table_from_dict(data: Mapping[str, Any]) -> pd.DataFrame:
    """Inverse of :func:`table_to_dict` (same columns, order and dtypes)."""
    return pd.DataFrame({column["name"]: column_from_json(column["values"], column["type"])
                         for column in data["columns"]})


def result_to_dict(result: NeutralityResult) -> dict[str, Any]:
    """Everything needed to rebuild ``result`` exactly (null distributions included)."""
    return {
        "dataset": summary_to_dict(result.dataset),
        "model": model_to_dict(result.model),
        "statistics": [statistic_to_dict(s) for s in result.statistics.values()],
        "parameters": [parameter_to_dict(p) for p in result.parameters.values()],
        "settings": settings_to_dict(result.settings), "notes": list(result.notes),
        "diagnostics": {name: table_to_dict(table)
                        for name, table in result.diagnostics.items()},
        "influence": influence_to_dict(result.influence),
        "taxa": None if result.taxa is None else table_to_dict(result.taxa),
        "statistic_options": list(result.statistic_options), "version": result.version,
    }


def result_from_dict(data: Mapping[str, Any]) -> NeutralityResult:
    """Inverse of :func:`result_to_dict` (statistics and parameters keep their order).

    Records written before results carried diagnostics, an influential sample or a
    per-taxon scan read back with none.
    """
    statistics = [statistic_from_dict(s) for s in data["statistics"]]
    parameters = [parameter_from_dict(p) for p in data["parameters"]]
    diagnostics = {name: table_from_dict(table)
                   for name, table in data.get("diagnostics", {}).items()}
    return NeutralityResult(
        dataset=summary_from_dict(data["dataset"]), model=model_from_dict(data["model"]),
        statistics={s.name: s for s in statistics}, parameters={p.name: p for p in parameters},
        settings=settings_from_dict(data["settings"]), notes=tuple(data["notes"]),
        diagnostics=diagnostics, influence=influence_from_dict(data.get("influence")),
        taxa=None if data.get("taxa") is None else table_from_dict(data["taxa"]),
        statistic_options=tuple(data["statistic_options"]), version=data["version"])
