"""Per-taxon and per-grouping diagnostics: computed once on the observed data, stored with
the result, shown in the report."""

from __future__ import annotations

import json
import math
import re
import shutil
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from driftscreen import seeds
from driftscreen.calibrate import (CalibrationSettings, neutrality_test, observed_diagnostics,
                                   plan_calibration, storable_table, with_neutral_taylor_line)
from driftscreen.cli import main
from driftscreen.synthetic import neutral_collection, write_collection
from driftscreen.dataset import Design
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.report.format import WIDTH
from driftscreen.report.text import volatility_classes
from driftscreen.serialize import result_from_dict, result_to_dict
from driftscreen.statistics.stationary_divergence import StationaryDivergence
from driftscreen.store import RECORDS_FOLDER, STORE_FOLDER
from driftscreen.synthetic import DesignSpec, as_dataset

TIME_SERIES_STATISTICS = ["stationary_divergence", "regrouping_invariance",
                          "fluctuation_scaling", "dispersion_heterogeneity"]


@pytest.fixture(scope="module")
def series():
    """A neutral time series with rare taxa (theta 10: pools form) and uneven depths."""
    spec = DesignSpec(n_samples=50, interval=1.0, depth=2000, depth_spread=0.4)
    return neutral_collection(1, spec, 30, 10.0, 0.5, seed=11, prefix="pond")[0]


@pytest.fixture(scope="module")
def series_result(series):
    return neutrality_test(series, replicates=19, groupings=40, seed=3)


@pytest.fixture(scope="module")
def snapshot_result():
    spec = DesignSpec(n_samples=30, interval=None, depth=1500)
    dataset = neutral_collection(1, spec, 20, 30.0, 0.5, seed=12, prefix="jar")[0]
    return neutrality_test(dataset, replicates=19, seed=3)


def rounding_slack(values) -> float:
    """Largest error of a sum of numbers each rounded to 6 significant digits."""
    return 1e-6 * float(np.sum(np.abs(values))) + 1e-12


# ----------------------------------------------------------------------------- content
def test_one_table_per_statistic_that_was_run(series_result, snapshot_result):
    assert list(series_result.diagnostics) == TIME_SERIES_STATISTICS
    # Snapshots have no regrouping_invariance (it needs a time axis).
    assert list(snapshot_result.diagnostics) == [
        "stationary_divergence", "fluctuation_scaling", "dispersion_heterogeneity"]
    assert all(len(table) for table in series_result.diagnostics.values())


def test_stationary_contributions_sum_to_the_statistic(series_result, snapshot_result):
    for result in (series_result, snapshot_result):
        parts = result.diagnostics["stationary_divergence"]["contribution"]
        observed = result["stationary_divergence"].statistic
        assert abs(parts.sum() - observed) <= rounding_slack(parts)
        assert list(parts) == sorted(parts, reverse=True)


def test_dispersion_parts_sum_to_the_statistic(series_result):
    parts = series_result.diagnostics["dispersion_heterogeneity"]["lr_contribution"]
    observed = series_result["dispersion_heterogeneity"].statistic
    assert abs(parts.sum() - observed) <= rounding_slack(parts)


def test_taylor_line_is_the_observed_exponent(series_result):
    table = series_result.diagnostics["fluctuation_scaling"]
    assert table["slope"].nunique() == 1
    # Rounded to 6 significant digits: relative error at most 5e-6.
    assert table["slope"].iloc[0] == pytest.approx(series_result["fluctuation_scaling"].statistic,
                                                   rel=5e-6)
    used = table[table["used"]]
    # fitted_variance is the line exp(c) mean^b (Taylor 1961, Nature 189:732).
    line = np.exp(used["intercept"] + used["slope"] * np.log(used["mean"]))
    # intercept, slope and mean are each stored to 6 significant digits (relative error
    # 5e-6), so log(line) may be off by 5e-6 (|c| + |b log mean| + 1): about 1e-4 here
    np.testing.assert_allclose(used["fitted_variance"], line, rtol=2e-4)


def test_regrouping_table_holds_the_groupings_behind_the_observed_value(series, series_result):
    """Same sub-stream as compute: the weighted variance of log volatility is the statistic."""
    table = series_result.diagnostics["regrouping_invariance"]
    observed = series_result["regrouping_invariance"].statistic

    def spread(volatility, weight):
        kept = weight > 0
        logs = np.log(volatility[kept])
        mean = np.average(logs, weights=weight[kept])
        return np.average((logs - mean) ** 2, weights=weight[kept])

    assert len(table) == 40
    # Volatilities carry 6 significant digits: log error <= 5e-7, far below the tolerance.
    assert spread(table["volatility"].to_numpy(), table["weight"].to_numpy()) == pytest.approx(
        observed, rel=1e-4)
    # Control: groupings drawn from another stream give another value, so the check can fail.
    plan = plan_calibration(series, CalibrationSettings(replicates=19, groupings=40, seed=3))
    stat = plan.statistics[1]
    other = stat.diagnose(series.counts, series.design, plan.raw_model,
                          seeds.generator(np.random.SeedSequence(99)))
    assert abs(spread(other["volatility"].to_numpy(), other["weight"].to_numpy())
               - observed) > 1e-3 * observed


def test_observed_diagnostics_use_the_observed_fit_and_each_statistic_stream(series):
    plan = plan_calibration(series, CalibrationSettings(replicates=19, groupings=40, seed=3))
    tables = observed_diagnostics(plan)
    stream = seeds.substream(seeds.dataset_stream(3, series.name), seeds.STATISTICS)
    for j, stat in enumerate(plan.statistics):
        direct = stat.diagnose(series.counts, series.design, plan.raw_model,
                               seeds.generator(seeds.substream(stream, j)))
        expected = storable_table(with_neutral_taylor_line(direct), series.taxa)
        pd.testing.assert_frame_equal(tables[stat.name], expected)


def test_taxon_indices_become_taxon_ids(series, series_result):
    taxa = set(series.taxa)
    fluctuation = series_result.diagnostics["fluctuation_scaling"]
    assert list(fluctuation["taxon"]) == list(series.taxa)
    for name in ("dispersion_heterogeneity",):
        assert set(series_result.diagnostics[name]["taxon"]) <= taxa
    stationary = series_result.diagnostics["stationary_divergence"]
    assert (stationary["members"] > 1).any(), "theta 10 with rare taxa should pool some"
    for label, members in zip(stationary["taxon"], stationary["members"]):
        match = re.fullmatch(r"(.+?)(?: \+(\d+) rare)?", label)
        assert match.group(1) in taxa
        assert int(match.group(2) or 0) == members - 1
    assert stationary["members"].sum() <= len(series.taxa)


def test_pool_label_names_its_most_abundant_member():
    counts = np.array([[50, 0, 1, 0], [40, 1, 0, 0], [45, 0, 0, 1], [60, 1, 1, 0]])
    dataset = as_dataset("tiny", counts, Design(depths=counts.sum(axis=1)))
    table = pd.DataFrame({"taxon": [0, 2], "members": [1, 3]})
    assert list(storable_table(table, dataset.taxa)["taxon"]) == ["taxon_1", "taxon_3 +2 rare"]


def test_numbers_keep_six_significant_digits(series_result):
    for table in series_result.diagnostics.values():
        for name in table.columns:
            if pd.api.types.is_float_dtype(table[name]):
                values = table[name].to_numpy()
                finite = values[np.isfinite(values)]
                assert all(float(format(v, ".5e")) == v for v in finite), name


def test_neutral_taylor_line_of_rare_taxa_has_exponent_one():
    """For rare taxa p (1 - p)/(1 + theta) ~ p/(1 + theta): slope 1, intercept -log(1 + theta)."""
    theta = 25.0
    p = np.geomspace(1e-6, 1e-4, 12)
    # Source: variance of Beta(a, b) is ab / ((a + b)^2 (a + b + 1)) (scipy.stats.beta),
    # the stationary marginal Beta(theta p, theta (1 - p)) of the neutral model.
    neutral = stats.beta(theta * p, theta * (1 - p)).var()
    np.testing.assert_allclose(neutral, p * (1 - p) / (1 + theta), rtol=1e-12)
    table = pd.DataFrame({"mean": p, "neutral_variance": neutral,
                          "used": np.ones(p.size, dtype=bool)})
    line = with_neutral_taylor_line(table)
    assert line["neutral_slope"].iloc[0] == pytest.approx(1.0, abs=1e-4)
    assert line["neutral_intercept"].iloc[0] == pytest.approx(-math.log1p(theta), abs=1e-3)
    assert "neutral_slope" not in with_neutral_taylor_line(pd.DataFrame({"mean": p}))


def test_expected_zero_share_is_the_beta_binomial_zero_probability():
    """Equal depths: no pooling bins, so the expected share without reads is exact."""
    rng = np.random.default_rng(5)
    theta, depth = 40.0, 800
    model = NeutralModel(np.array([0.4, 0.3, 0.2, 0.06, 0.04]), theta)
    design = Design(depths=np.full(40, depth))
    counts = simulate(model, design, 1, rng)[0]
    dataset = as_dataset("equal", counts, design)
    table = storable_table(StationaryDivergence().diagnose(dataset.counts, dataset.design,
                                                           model, rng), dataset.taxa)
    single = table[table["members"] == 1]
    assert len(single) >= 3
    # Source: scipy.stats.betabinom, the neutral stationary law of a taxon's reads
    # (Beta(theta p, theta (1 - p)) abundance sampled binomially; design note section 1).
    expected = stats.betabinom.pmf(0, depth, theta * single["p"], theta * (1 - single["p"]))
    np.testing.assert_allclose(single["expected_zero_fraction"], expected, rtol=1e-4,
                               atol=1e-12)
    more = single["variance_ratio"] > 1
    assert (single["direction"][more] == "more variable").all()
    assert (single["direction"][~more] == "less variable").all()


# ----------------------------------------------------------------------------- storage
def test_diagnostics_survive_the_json_round_trip(series_result):
    text = json.dumps(result_to_dict(series_result), allow_nan=False)
    back = result_from_dict(json.loads(text))
    assert list(back.diagnostics) == list(series_result.diagnostics)
    for name, table in series_result.diagnostics.items():
        pd.testing.assert_frame_equal(back.diagnostics[name], table)
        assert list(back.diagnostics[name].dtypes) == list(table.dtypes)
    assert result_to_dict(back) == result_to_dict(series_result)


def test_records_without_diagnostics_read_back_with_none(series_result):
    record = result_to_dict(series_result)
    del record["diagnostics"]
    back = result_from_dict(record)
    assert back.diagnostics == {}
    assert "Diagnostics" not in back.summary()


@pytest.fixture(scope="module")
def screen_tables(tmp_path_factory):
    spec = DesignSpec(n_samples=30, interval=1.0, depth=3000, depth_spread=0.3)
    datasets = neutral_collection(3, spec, 15, 20.0, 0.8, seed=21, prefix="tank")
    return write_collection(datasets, tmp_path_factory.mktemp("tables"))


def screen_args(tables, out):
    counts, metadata = tables
    return ["screen", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
            "--time-by", "day", "--replicates", "19", "--groupings", "20", "--seed", "4",
            "--out", str(out), "--quiet"]


def dataset_sections(report: str) -> str:
    """The report without its header (date, run time): from the summary table on."""
    return report[report.index("Summary, sorted"):]


def test_resumed_screen_writes_identical_diagnostics(screen_tables, tmp_path):
    whole, resumed = tmp_path / "whole", tmp_path / "resumed"
    assert main(screen_args(screen_tables, whole)) == 0
    document = json.loads((whole / "results.json").read_text(encoding="utf-8"))
    for record in document["datasets"]:
        assert list(record["diagnostics"]) == TIME_SERIES_STATISTICS
        columns = record["diagnostics"]["stationary_divergence"]["columns"]
        assert columns[0]["name"] == "taxon" and columns[0]["type"] == "text"
    # A run that finds one finished dataset in its store, then computes the others.
    shutil.copytree(whole / STORE_FOLDER, resumed / STORE_FOLDER)
    records = sorted((resumed / STORE_FOLDER / RECORDS_FOLDER).glob("*.json"))
    for record in records[1:]:
        record.unlink()
    assert main(screen_args(screen_tables, resumed)) == 0
    assert (resumed / "results.json").read_bytes() == (whole / "results.json").read_bytes()
    report = (whole / "report.txt").read_text(encoding="utf-8")
    assert dataset_sections((resumed / "report.txt").read_text(encoding="utf-8")) == \
        dataset_sections(report)
    assert report.count("Stationary divergence: taxa contributing most") == 3


# ----------------------------------------------------------------------------- report
def test_report_has_one_block_per_statistic_within_the_width(series_result, snapshot_result):
    text = series_result.summary()
    for title in ("Diagnostics", "Stationary divergence: taxa contributing most",
                  "Regrouping invariance: volatility", "Fluctuation scaling: Taylor's law",
                  "Dispersion heterogeneity: taxa with the largest part"):
        assert title in text
    assert max(len(line) for line in text.splitlines()) <= WIDTH
    snapshot = snapshot_result.summary()
    assert "Fluctuation scaling: Taylor's law" in snapshot
    assert "Regrouping invariance" not in snapshot
    assert max(len(line) for line in snapshot.splitlines()) <= WIDTH


def test_report_lists_the_top_contributors_in_order(series_result):
    lines = series_result.summary().splitlines()
    start = lines.index("Stationary divergence: taxa contributing most")
    top = series_result.diagnostics["stationary_divergence"].head(5)
    rows = lines[start + 3:start + 3 + len(top)]
    for row, label in zip(rows, top["taxon"]):
        assert row.startswith(label)
    assert all(row.rstrip().endswith(("more variable", "less variable")) for row in rows)


def test_taylor_block_shows_the_observed_and_neutral_exponents(series_result):
    table = series_result.diagnostics["fluctuation_scaling"]
    text = series_result.summary()
    block = text[text.index("Fluctuation scaling: Taylor's law"):]
    observed = next(line for line in block.splitlines() if line.startswith("observed taxa"))
    neutral = next(line for line in block.splitlines()
                   if line.startswith("neutral expectation, same taxa"))
    assert f"{table['slope'].iloc[0]:.4g}" in observed
    assert f"{table['neutral_slope'].iloc[0]:.4g}" in neutral


def test_long_taxon_names_are_cut_to_fit(series):
    long_names = tuple(f"Bacteria;Firmicutes;Clostridia;Lachnospiraceae;genus_{i:02d}_unclassified"
                       for i in range(series.n_taxa))
    result = neutrality_test(replace(series, taxa=long_names), replicates=9, groupings=10,
                             seed=1)
    text = result.summary()
    assert max(len(line) for line in text.splitlines()) <= WIDTH
    block = text[text.index("Stationary divergence: taxa contributing most"):text.index("Regrouping invariance:")]
    assert "~" in block  # cut names are marked
    pooled = result.diagnostics["stationary_divergence"]
    for members in pooled["members"].head(5):
        if members > 1:
            assert f"+{members - 1} rare" in block


def test_volatility_classes_partition_the_weighted_groupings(series_result):
    table = series_result.diagnostics["regrouping_invariance"]
    classes = volatility_classes(table)
    kept = table[table["weight"] > 0]
    assert len(classes) == 4
    assert sum(count for *_, count in classes) == len(kept)
    highs = [high for _, high, _, _ in classes]
    lows = [low for low, _, _, _ in classes]
    assert all(h <= l for h, l in zip(highs, lows[1:]))
    # A class of equal weights averages plainly: check against the first class directly.
    first = kept.sort_values("mean_abundance", kind="stable").head(classes[0][3])
    assert classes[0][2] == pytest.approx(np.average(first["volatility"],
                                                     weights=first["weight"]))


def test_percentages_never_round_a_share_to_none_or_all():
    from driftscreen.report.format import percent

    assert [percent(v) for v in (0.0, 0.001, 0.25, 0.996, 1.0, float("nan"))] == [
        "0%", "<1%", "25%", ">99%", "100%", "-"]


def test_a_table_without_the_columns_a_block_reads_gets_no_block(series_result):
    tables = dict(series_result.diagnostics)
    tables["fluctuation_scaling"] = tables["fluctuation_scaling"].drop(columns=["slope"])
    tables["stationary_divergence"] = tables["stationary_divergence"].iloc[:0]
    text = replace(series_result, diagnostics=tables).summary()
    assert "Fluctuation scaling: Taylor's law" not in text
    assert "Stationary divergence: the" not in text
    assert "Regrouping invariance: volatility" in text
