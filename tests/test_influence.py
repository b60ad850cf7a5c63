"""Most influential sample of a rejected dataset: a contaminated or swapped sample is named,
the test without it is an honest bootstrap of the table without it, results are
reproducible and survive the JSON records, and reports show them for rejected datasets."""

from __future__ import annotations

import json
import re
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from driftscreen import calibrate
from driftscreen.calibrate import (COMBINED, CalibrationSettings, assemble, plan_calibration,
                                   run_tasks)
from driftscreen.cli import main
from driftscreen.synthetic import neutral_collection, write_collection
from driftscreen.dataset import Dataset, Design
from driftscreen.influence import (LEVEL, NOTE_PREFIX, observed_statistics, outlyingness,
                                   plan_influence, sample_influence, wants_influence,
                                   with_influence, without_sample)
from driftscreen.intake import read_datasets
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.report.format import WIDTH
from driftscreen.screen import DatasetOutcome, outcome_from_dict, outcome_to_dict
from driftscreen.serialize import influence_to_dict, result_from_dict, result_to_dict
from driftscreen.store import ResultStore, settings_fingerprint
from driftscreen.synthetic import DesignSpec

SETTINGS = CalibrationSettings(replicates=39, groupings=10, seed=1)
CONTAMINATED = 17  # the aberrant sample of the time series
SWAPPED = 12       # the aberrant sample of the snapshot design


def calibrated(dataset: Dataset, settings: CalibrationSettings = SETTINGS):
    plan = plan_calibration(dataset, settings)
    return assemble(plan, run_tasks(plan.tasks, 1))


def contaminated(seed: int = 3, share: float = 0.8) -> Dataset:
    """A neutral time series whose sample 17 had ``share`` of its reads taken over by its
    rarest taxon (a contaminant). Successive samples correlate at 0.74 (rate 0.3 per day):
    with faster dynamics over 30 samples, fast drift and technical noise are hard to tell
    apart, and the noise estimate absorbs part of a single aberrant sample."""
    spec = DesignSpec(n_samples=30, interval=1.0, depth=3000)
    dataset = neutral_collection(1, spec, 15, 40.0, 0.3, seed=seed, prefix="lake")[0]
    counts = dataset.counts.copy()
    moved = np.floor(counts[CONTAMINATED] * share).astype(np.int64)
    counts[CONTAMINATED] -= moved
    counts[CONTAMINATED, np.argmin(counts.sum(axis=0))] += moved.sum()
    return replace(dataset, counts=counts)


def swapped(seed: int = 2) -> Dataset:
    """A neutral snapshot design whose sample 12 was swapped with a sample of another
    community (other taxa dominant: the donor's abundances in reverse taxon order)."""
    spec = DesignSpec(n_samples=20, interval=None, depth=3000)
    dataset = neutral_collection(1, spec, 15, 40.0, 1.0, seed=seed, prefix="gut")[0]
    donor = neutral_collection(1, spec, 15, 40.0, 1.0, seed=seed + 100, prefix="soil")[0]
    row = donor.counts[SWAPPED][::-1]
    counts = dataset.counts.copy()
    counts[SWAPPED] = 0
    width = min(row.size, dataset.n_taxa)
    counts[SWAPPED, :width] = row[:width]
    counts[SWAPPED, 0] += row[width:].sum()
    return replace(dataset, counts=counts,
                   design=Design(depths=counts.sum(axis=1), times=None))


@pytest.fixture(scope="module")
def cases():
    """(dataset, its test, its influence, the aberrant sample) for both designs."""
    found = {}
    for name, dataset, aberrant in (("time series", contaminated(), CONTAMINATED),
                                    ("snapshot", swapped(), SWAPPED)):
        result = calibrated(dataset)
        found[name] = (dataset, result, sample_influence(dataset, result, SETTINGS), aberrant)
    return found


@pytest.fixture(scope="module")
def neutral():
    spec = DesignSpec(n_samples=30, interval=1.0, depth=3000)
    dataset = neutral_collection(1, spec, 15, 40.0, 1.0, seed=4, prefix="lake")[0]
    return dataset, calibrated(dataset)


# ----------------------------------------------------------------------------- the job
@pytest.mark.parametrize("design", ["time series", "snapshot"])
def test_the_aberrant_sample_is_named_and_leaving_it_out_weakens_the_evidence(cases, design):
    dataset, result, influence, aberrant = cases[design]
    assert result.pvalue <= LEVEL
    assert influence.sample == dataset.samples[aberrant] and influence.index == aberrant
    assert influence.pvalue > result.pvalue
    assert influence.verdict_changes == (influence.pvalue > LEVEL)
    assert set(influence.pvalues) == set(result.statistics) - {COMBINED}
    scores = outlyingness(dataset, result.model)
    assert influence.score == scores[aberrant] == scores.max()
    # The other samples are neutral: their outlyingness is about 1 (mean of terms of
    # expectation 1), the aberrant one far above.
    assert np.median(np.delete(scores, aberrant)) < 2.0 and influence.score > 5.0


def test_pvalue_without_the_sample_is_that_of_the_table_without_it(cases, tmp_path):
    """Deleting the sample from the written tables and testing them gives the same p-values:
    the follow-up is the test of the reduced table, same settings, same streams."""
    dataset, _, influence, aberrant = cases["time series"]
    counts_path, metadata_path = write_collection([dataset], tmp_path)
    counts = pd.read_csv(counts_path, sep="\t").drop(columns=dataset.samples[aberrant])
    counts.to_csv(counts_path, sep="\t", index=False)
    metadata = pd.read_csv(metadata_path, sep="\t")
    metadata[metadata["sample"] != dataset.samples[aberrant]].to_csv(metadata_path, sep="\t",
                                                                    index=False)
    [reduced] = read_datasets(counts_path, metadata_path, dataset_by=["dataset"], time_by="day")
    again = calibrated(reduced)
    assert again.pvalue == influence.pvalue
    for name, pvalue in influence.pvalues.items():
        assert again[name].pvalue == pvalue or (np.isnan(pvalue)
                                                and np.isnan(again[name].pvalue))


def test_ranking_uses_the_observed_statistics_of_plan_calibration(cases):
    dataset, _, influence, _ = cases["time series"]
    reduced = without_sample(dataset, influence.index)
    plan = plan_calibration(reduced, SETTINGS)
    expected = dict(zip((s.name for s in plan.statistics), plan.observed))
    assert observed_statistics(reduced, SETTINGS) == pytest.approx(expected, nan_ok=True)


def test_same_seed_same_influence_whatever_the_number_of_jobs():
    dataset = contaminated()
    settings = CalibrationSettings(replicates=199, groupings=10, seed=5)
    plan = plan_calibration(dataset, settings)
    assert len(plan.tasks) > 1  # so that two jobs really share the work
    result = assemble(plan, run_tasks(plan.tasks, 1))
    one = sample_influence(dataset, result, settings, jobs=1)
    again = sample_influence(dataset, result, settings, jobs=1)
    two = sample_influence(dataset, result, settings, jobs=2)
    assert json.dumps(influence_to_dict(one)) == json.dumps(influence_to_dict(again))
    assert json.dumps(influence_to_dict(one)) == json.dumps(influence_to_dict(two))


def test_a_dataset_that_is_not_rejected_is_left_as_it_is(neutral):
    dataset, result = neutral
    assert result.pvalue > LEVEL and not wants_influence(result)
    assert with_influence(result, dataset, SETTINGS) is result
    assert result.influence is None and "Most influential sample" not in result.summary()


def test_no_sample_can_be_left_out_of_a_minimal_design():
    spec = DesignSpec(n_samples=3, interval=None, depth=2000)
    dataset = neutral_collection(1, spec, 8, 30.0, 1.0, seed=1, prefix="tiny")[0]
    result = calibrated(dataset, CalibrationSettings(replicates=9, groupings=10, seed=1))
    note = plan_influence(dataset, result, SETTINGS)
    assert isinstance(note, str) and note.startswith(NOTE_PREFIX)
    assert "needs at least 3 samples" in note
    rejected = replace(result, statistics={**result.statistics,
                                           COMBINED: replace(result[COMBINED], pvalue=0.01)})
    noted = with_influence(rejected, dataset, SETTINGS)
    assert noted.influence is None and noted.notes[-1] == note
    assert not wants_influence(noted)  # a resumed screen does not try again


# ----------------------------------------------------------------------------- helpers
def small_dataset(times: np.ndarray | None) -> Dataset:
    counts = np.array([[5, 0, 3, 2], [4, 0, 1, 6], [2, 7, 0, 1], [3, 0, 2, 2]])
    return Dataset("pond", counts, ("a", "b", "c", "d"), ("s1", "s2", "s3", "s4"),
                   Design(depths=counts.sum(axis=1), times=times), notes=("from intake",),
                   warnings=("a warning",), dropped_taxa=1, source=("counts.tsv",))


@pytest.mark.parametrize("times", [np.array([0.0, 1.0, 2.5, 4.0]), None])
def test_without_sample_keeps_ids_design_and_notes_and_drops_empty_taxa(times):
    dataset = small_dataset(times)
    reduced = without_sample(dataset, 2)
    assert reduced.samples == ("s1", "s2", "s4")
    assert reduced.taxa == ("a", "c", "d")  # b had reads in s3 only
    np.testing.assert_array_equal(reduced.counts,
                                  np.delete(dataset.counts, 2, axis=0)[:, [0, 2, 3]])
    np.testing.assert_array_equal(reduced.design.depths, [10, 11, 7])
    if times is None:
        assert reduced.design.times is None
    else:
        np.testing.assert_array_equal(reduced.design.times, [0.0, 1.0, 4.0])
    assert (reduced.name, reduced.notes, reduced.warnings, reduced.source) == (
        dataset.name, dataset.notes, dataset.warnings, dataset.source)
    assert reduced.dropped_taxa == 2
    for index in (-1, 4):
        with pytest.raises(ValueError):
            without_sample(dataset, index)


def test_marginal_outlyingness_uses_the_dirichlet_multinomial_variance():
    """Each term is (y - p)^2 over Var(N_i) / n^2 of a Dirichlet-multinomial count.

    Source: scipy.stats.dirichlet_multinomial(alpha = theta p, n).var(), the moments of
    Mosimann (1962, Biometrika 49:65).
    """
    p = np.array([0.5, 0.3, 0.15, 0.05])
    model = NeutralModel(p, theta=20.0)
    counts = np.array([[40, 30, 20, 10], [900, 50, 40, 10], [3, 3, 2, 2]])
    dataset = Dataset("d", counts, tuple("abcd"), ("x", "y", "z"),
                      Design(depths=counts.sum(axis=1)))
    expected = []
    for row in counts:
        n = row.sum()
        variance = stats.dirichlet_multinomial(model.theta * p, n).var() / n**2
        expected.append(np.mean((row / n - p) ** 2 / variance))
    np.testing.assert_allclose(outlyingness(dataset, model), expected, rtol=1e-12)


@pytest.mark.parametrize("noise", [0.0, 0.02])
def test_outlyingness_of_neutral_time_series_averages_one(noise):
    """Simulated stationary neutral series at the true model: every term has expectation 1
    (E[(y - p)^2] is the variance the term divides by), so the mean over samples,
    taxa and replicates is 1 up to Monte Carlo error (5 standard errors)."""
    model = NeutralModel(np.array([0.4, 0.25, 0.2, 0.1, 0.05]), theta=30.0, rate=0.5,
                         noise=noise)
    design = Design(depths=np.full(25, 2000), times=np.arange(25.0) * 1.5)
    batch = simulate(model, design, 400, np.random.default_rng(11))
    means = np.array([outlyingness(Dataset("d", counts, tuple("abcde"),
                                           tuple(f"s{t}" for t in range(25)), design),
                                   model).mean()
                      for counts in batch])
    error = means.std(ddof=1) / np.sqrt(means.size)
    assert abs(means.mean() - 1.0) < 5 * error


# ----------------------------------------------------------------------------- records
def test_influence_survives_json_and_the_store(cases, tmp_path):
    dataset, result, influence, _ = cases["time series"]
    with_it = replace(result, influence=influence)
    back = result_from_dict(json.loads(json.dumps(result_to_dict(with_it), allow_nan=False)))
    assert result_to_dict(back) == result_to_dict(with_it)
    assert influence_to_dict(back.influence) == influence_to_dict(influence)
    assert back.influence.sample == influence.sample and back.influence.pvalue == influence.pvalue

    old = result_to_dict(result)
    del old["influence"]  # a record written before results carried one
    assert result_from_dict(old).influence is None

    source = tmp_path / "counts.tsv"
    source.write_text("taxon\ts1\na\t1\n", encoding="utf-8")
    store = ResultStore.open(tmp_path / "out", settings_fingerprint(
        inputs={"counts": source}, intake={}, replicates=39, groupings=10, seed=1,
        statistics=[]))
    store.save(dataset.name, outcome_to_dict(DatasetOutcome(with_it.dataset, with_it)))
    stored = outcome_from_dict(store.finished()[dataset.name])
    assert influence_to_dict(stored.result.influence) == influence_to_dict(influence)


def test_report_line_for_a_rejected_dataset(cases):
    _, result, influence, _ = cases["time series"]
    report = replace(result, influence=influence).summary()
    flat = " ".join(report.split())
    assert f"Most influential sample: {influence.sample} (outlyingness " in flat
    change = "verdict changes" if influence.verdict_changes else "verdict unchanged"
    assert "combined p without it" in flat and change in flat
    assert f"datasets with combined p <= {LEVEL:g}" in flat  # the rule, in the legend
    assert max(len(line) for line in report.splitlines()) <= WIDTH
    assert "Most influential sample" not in result.summary()


# ----------------------------------------------------------------------------- commands
@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    """The contaminated series next to two neutral ones, as one table."""
    spec = DesignSpec(n_samples=30, interval=1.0, depth=3000)
    datasets = [contaminated()] + neutral_collection(2, spec, 15, 40.0, 1.0, seed=4,
                                                     prefix="pond")
    return write_collection(datasets, tmp_path_factory.mktemp("tables"))


def screen_args(tables, out, *extra, jobs=1):
    counts, metadata = tables
    return ["screen", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
            "--time-by", "day", "--replicates", "39", "--groupings", "10", "--seed", "1",
            "--jobs", str(jobs), "--out", str(out), "--quiet", *extra]


def read_rows(path):
    header, *lines = path.read_text(encoding="utf-8").splitlines()
    return [dict(zip(header.split("\t"), line.split("\t"))) for line in lines]


@pytest.fixture(scope="module")
def reference(tables, tmp_path_factory):
    out = tmp_path_factory.mktemp("reference")
    assert main(screen_args(tables, out)) == 0
    return out


def test_screen_names_the_sample_of_the_rejected_dataset_only(reference):
    document = json.loads((reference / "results.json").read_text(encoding="utf-8"))
    influences = {d["name"]: d["influence"] for d in document["datasets"]}
    combined = {d["name"]: next(s for s in d["statistics"] if s["name"] == COMBINED)
                for d in document["datasets"]}
    for name, influence in influences.items():
        assert (influence is not None) == (combined[name]["p_value"] <= LEVEL), name
    assert influences["lake_1"]["sample"] == f"lake_1_s{CONTAMINATED + 1}"
    rows = read_rows(reference / "results.tsv")
    for row in rows:
        influence = influences[row["dataset"]]
        assert row["influential_sample"] == ("" if influence is None else influence["sample"])
    lake = next(r for r in rows if r["dataset"] == "lake_1" and r["statistic"] == COMBINED)
    assert float(lake["p_value_without_sample"]) == pytest.approx(
        influences["lake_1"]["pvalue"], rel=1e-5)
    report = (reference / "report.txt").read_text(encoding="utf-8")
    parts = re.split(r"\n\[\d+\] Dataset '([^']+)'\n", report)
    for name, section in zip(parts[1::2], parts[2::2]):
        named = f"Most influential sample: {(influences[name] or {}).get('sample')} "
        assert (named in section) == (influences[name] is not None), name
    assert report.count("Most influential sample: ") == sum(
        i is not None for i in influences.values())
    assert "combined p, not q," in " ".join(report.split())
    assert max(len(line) for line in report.splitlines()) <= WIDTH


def test_screen_influence_does_not_depend_on_jobs(tables, reference, tmp_path):
    out = tmp_path / "two"
    assert main(screen_args(tables, out, jobs=2)) == 0
    for name in ("results.tsv", "parameters.tsv", "results.json"):
        assert (out / name).read_bytes() == (reference / name).read_bytes(), name


def test_resumed_screen_keeps_influences_and_finishes_missing_ones(tables, reference, tmp_path,
                                                                   monkeypatch, capsys):
    real_run_chunk = calibrate.run_chunk

    def interrupted_without_a_sample(task):
        if task.design.n_samples < 30:  # a test without one sample: the follow-up
            raise KeyboardInterrupt
        return real_run_chunk(task)

    out = tmp_path / "res"
    monkeypatch.setattr(calibrate, "run_chunk", interrupted_without_a_sample)
    assert main(screen_args(tables, out)) == 130
    capsys.readouterr()
    calls = []
    monkeypatch.setattr(calibrate, "run_chunk",
                        lambda task: calls.append(task) or real_run_chunk(task))
    assert main(screen_args(tables, out)) == 0
    assert calls and all(task.design.n_samples == 29 for task in calls)
    for name in ("results.tsv", "parameters.tsv", "results.json"):
        assert (out / name).read_bytes() == (reference / name).read_bytes(), name
    calls.clear()
    assert main(screen_args(tables, out)) == 0
    assert calls == []


def test_no_influence_option(tables, tmp_path, capsys):
    counts, metadata = tables
    test = ["test", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
            "--time-by", "day", "--dataset", "lake_1", "--replicates", "39",
            "--groupings", "10", "--seed", "1"]
    assert main(test) == 0
    assert "Most influential sample: lake_1_s18" in capsys.readouterr().out
    assert main(test + ["--no-influence"]) == 0
    assert "Most influential sample" not in capsys.readouterr().out

    out = tmp_path / "res"
    assert main(screen_args(tables, out, "--no-influence")) == 0
    document = json.loads((out / "results.json").read_text(encoding="utf-8"))
    assert all(d["influence"] is None for d in document["datasets"])
    capsys.readouterr()
    assert main(screen_args(tables, out)) == 2
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and "most influential samples: off" in err
