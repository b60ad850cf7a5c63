"""A result carries its settings and gives one table of its statistics; a statistic added to
the registry reaches every output through that table."""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
import pandas as pd
import pytest

import driftscreen
from driftscreen.calibrate import CalibrationSettings, neutrality_test
from driftscreen.commands import screen_command
from driftscreen.dataset import Design
from driftscreen.neutral.model import NullFit, NullOptions
from driftscreen.results import STATISTIC_COLUMNS
from driftscreen.serialize import result_from_dict, result_to_dict
from driftscreen.statistics import registry
from driftscreen.synthetic import DesignSpec, neutral_collection, write_collection


@dataclass(frozen=True)
class ToySpread:
    """A toy statistic: the largest share of reads any taxon takes in any sample."""

    name: ClassVar[str] = "toy_spread"
    title: ClassVar[str] = "Toy spread"
    unit: ClassVar[str] = "largest share of reads of a taxon"
    methods: ClassVar[str] = "the largest share of reads of a taxon (a toy)"
    how_to_read: ClassVar[str] = "share: the taxon's largest share of reads."
    needs_time: ClassVar[bool] = False
    alternative: ClassVar[str] = "greater"
    marginal: ClassVar[bool] = False
    in_combination: ClassVar[bool] = True

    def compute(self, counts: np.ndarray, design: Design, fit: NullFit,
                rng: np.random.Generator) -> np.ndarray:
        shares = counts / counts.sum(axis=2, keepdims=True)
        return shares.max(axis=(1, 2))

    def diagnose(self, counts: np.ndarray, design: Design, model: object,
                 rng: np.random.Generator) -> pd.DataFrame:
        shares = counts / counts.sum(axis=1, keepdims=True)
        return pd.DataFrame({"taxon": np.arange(counts.shape[1]), "share": shares.max(axis=0)})


@pytest.fixture(scope="module")
def dataset():
    spec = DesignSpec(n_samples=15, interval=1.0, depth=2000)
    return neutral_collection(1, spec, 10, 40.0, 0.5, seed=3, prefix="pond")[0]


@pytest.fixture(scope="module")
def result(dataset):
    return neutrality_test(dataset, replicates=19, groupings=10, seed=2, noise="off")


def test_a_result_carries_its_settings_statistics_and_version(result):
    assert result.settings == CalibrationSettings(replicates=19, groupings=10, seed=2,
                                                  null=NullOptions(noise="off"))
    assert (result.replicates, result.seed) == (19, 2)
    assert result.version == driftscreen.__version__
    assert len(result.statistic_options) == len(result.statistics) - 1
    assert any("n_groupings=10" in options for options in result.statistic_options)
    again = result_from_dict(json.loads(json.dumps(result_to_dict(result))))
    assert (again.settings, again.statistic_options, again.version) == (
        result.settings, result.statistic_options, result.version)


def test_to_frame_is_the_statistics_table(result):
    frame = result.to_frame()
    assert tuple(frame.columns) == STATISTIC_COLUMNS
    assert list(frame["statistic"]) == list(result.statistics)
    assert list(frame["statistic"])[-1] == registry.COMBINED
    for row in frame.itertuples(index=False):
        statistic = result[row.statistic]
        assert row.p_value == statistic.pvalue or (np.isnan(row.p_value)
                                                  and np.isnan(statistic.pvalue))
        assert row.observed == statistic.statistic or np.isnan(statistic.statistic)


def test_rejected_reads_the_combined_pvalue(result):
    pvalue = result.pvalue
    assert result.rejected(alpha=pvalue) and not result.rejected(alpha=pvalue * 0.999)


def test_neutrality_test_refuses_zero_jobs(dataset):
    with pytest.raises(ValueError, match="jobs must be"):
        neutrality_test(dataset, replicates=9, groupings=2, jobs=0)


def test_a_statistic_in_the_registry_reaches_text_tsv_and_json(dataset, tmp_path, monkeypatch):
    """One class and one registry line: the toy statistic is in every output of a screen."""
    monkeypatch.setattr(registry, "STATISTIC_CLASSES", registry.STATISTIC_CLASSES + (ToySpread,))
    counts, metadata = write_collection([dataset], tmp_path / "tables")
    out = tmp_path / "screen"
    screen_command(str(counts), str(metadata), out=out,
                   intake={"dataset_by": ["dataset"], "time_by": "day"}, replicates=19,
                   groupings=10, seed=1, influence=False)
    report = (out / "report.txt").read_text(encoding="utf-8")
    statistics_table = report.split("Statistics\n")[1].split("\n\n")[0]
    assert "toy_spread" in statistics_table
    assert "the largest share of reads of a taxon (a toy)" in " ".join(report.split())
    assert "Toy spread. share: the taxon's largest share of reads." in report
    rows = (out / "results.tsv").read_text(encoding="utf-8").splitlines()
    toy = [row.split("\t") for row in rows if "\ttoy_spread\t" in row]
    assert len(toy) == 1 and toy[0][2] == "greater" and toy[0][9] != ""
    document = json.loads((out / "results.json").read_text(encoding="utf-8"))
    names = [s["name"] for s in document["datasets"][0]["statistics"]]
    assert names[-2:] == ["toy_spread", registry.COMBINED]
    assert "share" in [c["name"] for c in
                       document["datasets"][0]["diagnostics"]["toy_spread"]["columns"]]
