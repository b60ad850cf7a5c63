"""`driftscreen demo`: files, round trip through intake, determinism, resume, verdicts."""

from __future__ import annotations

import io
import re
import shlex
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from driftscreen.cli import main
from driftscreen.demo import (N_SAMPLES, N_TAXA, REACTORS, PULSED, STEADY, combined_qvalues,
                              demo_datasets, run_demo, write_inputs)
from driftscreen.intake import read_datasets

QUICK_REPLICATES = 19
OUTPUTS = ["results.tsv", "parameters.tsv", "results.json", "report.txt"]


@pytest.fixture(scope="module")
def quick_demo(tmp_path_factory) -> tuple[Path, str]:
    out = tmp_path_factory.mktemp("demo")
    return out, run_demo(out, replicates=QUICK_REPLICATES)


def printed_command(text: str) -> list[str]:
    """The `driftscreen screen ...` words printed by the demo."""
    lines = [line.strip() for line in text.splitlines()]
    return shlex.split(next(line for line in lines if line.startswith("driftscreen screen")))


def test_demo_writes_inputs_and_results(quick_demo):
    out, text = quick_demo
    assert (out / "input" / "counts.tsv").is_file()
    assert (out / "input" / "metadata.tsv").is_file()
    for name in OUTPUTS:
        assert (out / "results" / name).is_file()
    assert "report.txt" in text
    summary = [line.split() for line in text.splitlines()
               if re.match(r"reactor_[A-F] +(steady|pulsed) ", line)]
    assert [(row[0], row[1]) for row in summary] == list(REACTORS)
    assert all(row[3] == "neutrality" for row in summary)
    words = printed_command(text)
    assert words[:2] == ["driftscreen", "screen"]
    assert words[words.index("--out") + 1] == str(out / "results")


def test_metadata_has_the_scenario_columns(quick_demo):
    out, _ = quick_demo
    metadata = pd.read_csv(out / "input" / "metadata.tsv", sep="\t")
    assert list(metadata.columns) == ["sample", "reactor", "day", "feed"]
    assert metadata.groupby("reactor")["feed"].unique().map(tuple).to_dict() == {
        name: (feed,) for name, feed in REACTORS}
    for _, days in metadata.groupby("reactor")["day"]:
        np.testing.assert_array_equal(days.to_numpy(), np.arange(N_SAMPLES) * 2)


def test_inputs_round_trip_through_intake(quick_demo):
    out, _ = quick_demo
    read = read_datasets(out / "input" / "counts.tsv", out / "input" / "metadata.tsv",
                         dataset_by=["reactor"], time_by="day")
    made = demo_datasets()
    assert [d.name for d in read] == [d.name for d in made] == [name for name, _ in REACTORS]
    for got, want in zip(read, made):
        assert got.taxa == want.taxa and got.samples == want.samples
        np.testing.assert_array_equal(got.counts, want.counts)
        np.testing.assert_array_equal(got.design.times, want.design.times)
        np.testing.assert_array_equal(got.design.depths, want.design.depths)


def test_scenario_has_the_stated_design():
    for dataset in demo_datasets():
        assert dataset.n_samples == N_SAMPLES and dataset.n_taxa <= N_TAXA
        assert dataset.n_taxa >= N_TAXA - 5
        np.testing.assert_array_equal(np.diff(dataset.design.times), 2.0)
        assert 6000 < np.median(dataset.design.depths) < 10000
        assert dataset.design.depths.min() < dataset.design.depths.max()


def test_scenario_is_deterministic(tmp_path):
    first, second = demo_datasets(), demo_datasets()
    for a, b in zip(first, second):
        np.testing.assert_array_equal(a.counts, b.counts)
    other = demo_datasets(seed=7)
    assert not np.array_equal(first[0].counts, other[0].counts)
    one, two = write_inputs(tmp_path / "one"), write_inputs(tmp_path / "two")
    assert one.counts.read_bytes() == two.counts.read_bytes()
    assert one.metadata.read_bytes() == two.metadata.read_bytes()


def test_second_run_reuses_the_finished_results(quick_demo):
    out, text = quick_demo
    before = {name: (out / "results" / name).read_bytes() for name in OUTPUTS[:3]}
    messages = io.StringIO()
    again = run_demo(out, replicates=QUICK_REPLICATES, messages=messages)
    assert again == text
    assert f"reusing {len(REACTORS)} finished datasets" in messages.getvalue()
    assert {name: (out / "results" / name).read_bytes() for name in OUTPUTS[:3]} == before
    assert "6 datasets reused from an earlier run" in (out / "results" / "report.txt").read_text()


def test_printed_command_reproduces_the_results(quick_demo, tmp_path):
    out, text = quick_demo
    words = printed_command(text)
    words[words.index("--out") + 1] = str(tmp_path / "again")
    assert main(words[1:] + ["--quiet"]) == 0
    for name in ("results.tsv", "parameters.tsv"):
        assert (tmp_path / "again" / name).read_bytes() == (out / "results" / name).read_bytes()


def test_command_line_demo_prints_the_summary(quick_demo, capsys):
    out, text = quick_demo
    assert main(["demo", "--out", str(out), "--replicates", str(QUICK_REPLICATES)]) == 0
    assert capsys.readouterr().out == text


@pytest.mark.slow
def test_pulsed_reactors_are_rejected_and_steady_ones_mostly_not(tmp_path):
    """B = 99, fixed seeds. Margin: over scenario seeds 2020-2031 every pulsed reactor was
    at the p-value floor 0.01 (q = 0.02) and 2 of 36 steady ones had q <= 0.05."""
    run_demo(tmp_path, replicates=99)
    qvalues = combined_qvalues(tmp_path / "results" / "results.tsv")
    feeds = dict(REACTORS)
    pulsed = [qvalues[name] for name in feeds if feeds[name] == PULSED]
    steady = [qvalues[name] for name in feeds if feeds[name] == STEADY]
    assert all(q <= 0.05 for q in pulsed), qvalues
    assert sum(q <= 0.05 for q in steady) <= 1, qvalues
