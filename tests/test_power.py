"""Power analysis: Wilson intervals, minimum detectable strength, power runs, CLI, --detectable."""

from __future__ import annotations

import functools
import json
import math
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from driftscreen import calibrate, commands, power
from driftscreen.calibrate import CalibrationSettings
from driftscreen.cli import main
from driftscreen.synthetic import neutral_collection, write_collection
from driftscreen.neutral.model import NullOptions
from driftscreen.niche import StochasticLogistic
from driftscreen.power import (NicheAlternative, PowerDesign, PowerTask,
                               minimum_detectable_strength, power_curve, simulated_dataset,
                               wilson_interval)
from driftscreen.report.format import WIDTH
from driftscreen.store import SETTINGS_FILE, STORE_FOLDER
from driftscreen.synthetic import DesignSpec, as_dataset

TINY_SERIES = PowerDesign.from_numbers(n_taxa=10, n_samples=20, interval=1.0, depth=2000)
TINY_SNAPSHOT = PowerDesign.from_numbers(n_taxa=10, n_samples=15, interval=None, depth=1000)


def assert_one_error_line(capsys, *words: str) -> None:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("driftscreen: error: "), err
    for word in words:
        assert word in err[0]


# ----------------------------------------------------------------------------- Wilson interval
@pytest.mark.parametrize("trials", [1, 7, 12, 50, 263])
def test_wilson_interval_matches_scipy_binomtest(trials):
    # Source: Wilson (1927) J. Am. Stat. Assoc. 22:209, score interval; scipy.stats.binomtest
    # proportion_ci(method="wilson") implements the same interval without continuity correction.
    successes = np.arange(trials + 1)
    low, high = wilson_interval(successes, trials)
    for k in successes:
        ci = stats.binomtest(int(k), trials).proportion_ci(confidence_level=0.95, method="wilson")
        assert low[k] == pytest.approx(ci.low, abs=1e-12)
        assert high[k] == pytest.approx(ci.high, abs=1e-12)


@pytest.mark.parametrize("successes, trials, low, high", [
    (81, 263, 0.2553, 0.3662), (15, 148, 0.0624, 0.1605), (0, 20, 0.0, 0.1611),
    (1, 29, 0.0061, 0.1718)])
def test_wilson_interval_worked_examples(successes, trials, low, high):
    # Source: Newcombe (1998) Stat. Med. 17:857, Table II, method 3 (Wilson score
    # interval without continuity correction); values to 4 decimals, from memory.
    got_low, got_high = wilson_interval(successes, trials)
    assert float(got_low) == pytest.approx(low, abs=6e-5)
    assert float(got_high) == pytest.approx(high, abs=6e-5)


def test_wilson_interval_other_confidence_levels():
    # Source: scipy.stats.binomtest(...).proportion_ci, Wilson method, at 90% and 99%.
    for level in (0.9, 0.99):
        low, high = wilson_interval(3, 17, confidence=level)
        ci = stats.binomtest(3, 17).proportion_ci(confidence_level=level, method="wilson")
        assert (float(low), float(high)) == pytest.approx((ci.low, ci.high), abs=1e-12)


# ----------------------------------------------------------------------------- minimum detectable
def test_mde_interpolates_linearly_in_log_strength():
    # Crossing between 0.2 (50%) and 0.4 (90%): 3/4 of the way in log strength.
    mde = minimum_detectable_strength([0.1, 0.2, 0.4, 0.8], [0.1, 0.5, 0.9, 1.0])
    assert mde == pytest.approx(0.2 * 2 ** 0.75, rel=1e-12)


def test_mde_interpolates_linearly_from_zero():
    assert minimum_detectable_strength([0.0, 1.0], [0.0, 1.0]) == pytest.approx(0.8)
    assert minimum_detectable_strength([0.0, 0.5, 1.0], [0.05, 0.65, 0.95]) == \
        pytest.approx(0.5 * 2 ** 0.5)


def test_mde_takes_the_first_crossing_of_a_noisy_curve():
    mde = minimum_detectable_strength([0.1, 0.2, 0.3, 0.4], [0.2, 0.85, 0.7, 0.9])
    assert 0.1 < mde < 0.2
    assert mde == pytest.approx(np.exp(np.log(0.1) + (0.6 / 0.65) * np.log(2.0)))


def test_mde_at_the_edges_of_the_grid():
    assert minimum_detectable_strength([0.01, 0.1], [0.85, 1.0]) == 0.01
    assert minimum_detectable_strength([0.01, 0.1], [0.8, 1.0]) == 0.01
    assert math.isinf(minimum_detectable_strength([0.01, 0.1], [0.1, 0.79]))


def test_mde_refuses_a_grid_that_is_not_increasing():
    with pytest.raises(ValueError):
        minimum_detectable_strength([0.2, 0.1], [0.5, 0.9])
    with pytest.raises(ValueError):
        minimum_detectable_strength([0.1, 0.2], [0.5])


def test_bisection_finds_the_same_crossing_as_the_full_curve(monkeypatch):
    """Bisection over the grid gives the full curve's answer with ~log2(S) evaluations."""
    grid = (1e-4, 3e-4, 1e-3, 3e-3, 0.01, 0.03, 0.1, 0.3, 1.0)
    calls = []

    def curve(strength: float) -> float:
        return float(np.clip(0.5 + 0.4 * np.log10(strength / 2e-3), 0.0, 1.0))

    class FakeRun:
        def __init__(self, strength):
            self.strength = strength

        def combined_power(self):
            return np.array([curve(self.strength)])

    def fake_power_with(design, alternative, strengths, *args, **kwargs):
        calls.append(strengths[0])
        return FakeRun(strengths[0])

    monkeypatch.setattr(power, "power_with", fake_power_with)
    settings = CalibrationSettings(replicates=19, groupings=10)
    found = power.bisect_detectable(TINY_SERIES, NicheAlternative(), grid, 4, settings, 1, 0.05)
    expected = minimum_detectable_strength(grid, [curve(s) for s in grid])
    assert found == pytest.approx(expected, rel=1e-12)
    assert len(calls) <= math.ceil(math.log2(len(grid) + 1))


# ----------------------------------------------------------------------------- designs
def test_design_from_a_dataset_keeps_its_times_depths_and_profile():
    dataset = neutral_collection(1, DesignSpec(n_samples=12, interval=2.0, irregular=True,
                                               depth=800, depth_spread=0.5),
                                 8, 30.0, 0.3, seed=4)[0]
    design = PowerDesign.from_dataset(dataset)
    expected_profile = dataset.counts.sum(axis=0) / dataset.counts.sum()
    np.testing.assert_allclose(design.profile, expected_profile)
    task = PowerTask(design, NicheAlternative(), 0.2, 3, CalibrationSettings(19, 10, 1),
                     power.statistic_names(design, 10))
    simulated = simulated_dataset(task)
    np.testing.assert_array_equal(simulated.design.times, dataset.design.times)
    np.testing.assert_array_equal(simulated.design.depths, dataset.design.depths)


@pytest.mark.parametrize("name", ["logistic", "lotka-volterra"])
def test_profile_sets_the_abundances_at_the_neutral_limit(name):
    """At the neutral limit the community stands still at its carrying capacities.

    (Lotka-Volterra: the small immigration flux moves every taxon to the same multiple of
    its capacity; the sub-step splitting leaves ~1e-5 relative differences.)
    """
    profile = np.array([0.5, 0.3, 0.15, 0.05])
    model = NicheAlternative(name).model(4, 0.0, profile)
    design = DesignSpec(n_samples=5, interval=1.0).draw(np.random.default_rng(0))
    x = model.abundances(design, 3, np.random.default_rng(1))
    relative = x / x.sum(axis=2, keepdims=True)
    np.testing.assert_allclose(relative, np.broadcast_to(profile, relative.shape), rtol=1e-4)


def test_profiled_logistic_keeps_the_model_law():
    """Fixed capacities change nothing else: same draws as the model given those capacities."""
    profile = np.array([0.6, 0.3, 0.1])
    model = NicheAlternative().model(3, 0.4, profile)
    plain = StochasticLogistic(3, strength=0.4)
    rng_a, rng_b = np.random.default_rng(5), np.random.default_rng(5)
    capacities = np.tile(profile, (2, 1))
    np.testing.assert_array_equal(model.stationary_log(model.draw_capacities(2, rng_a), 4, rng_a),
                                  plain.stationary_log(capacities, 4, rng_b))


def test_profiled_logistic_stationary_law_and_the_reported_cv():
    """Stationary abundances follow Gamma(2/sigma - 1, scale sigma K / 2), whose squared
    CV sigma / (2 - sigma) is what the report quotes."""
    # Source: Grilli (2020) Nat. Commun. 11:4743, stationary Gamma law of the stochastic
    # logistic model; compared with scipy.stats.gamma by a KS test (fixed seed; a false
    # failure needs p < 1e-3).
    sigma, profile = 0.5, np.array([0.7, 0.2, 0.1])
    model = NicheAlternative().model(3, sigma, profile)
    rng = np.random.default_rng(11)
    x = np.exp(model.stationary_log(model.draw_capacities(1, rng), 20_000, rng))[0]
    law = stats.gamma(2.0 / sigma - 1.0, scale=sigma / 2.0)
    for i, capacity in enumerate(profile / profile.sum()):
        assert stats.kstest(x[:, i] / capacity, law.cdf).pvalue > 1e-3
    assert law.std() / law.mean() == pytest.approx(np.sqrt(sigma / (2.0 - sigma)))
    assert "CV of 58%" in NicheAlternative().strength_meaning(sigma)


def test_strength_checks():
    logistic = NicheAlternative("logistic")
    assert logistic.strength_problem(2.0) and logistic.strength_problem(-0.1)
    assert not logistic.strength_problem(0.0)
    assert not NicheAlternative("lotka-volterra").strength_problem(3.0)
    assert power.parse_strengths(" 0.2, 0,0.2 ,0.1", logistic) == (0.0, 0.1, 0.2)
    with pytest.raises(ValueError):
        NicheAlternative("logistic", noise=0.1)
    assert NicheAlternative("lotka-volterra").is_neutral_limit(0.0)
    assert not NicheAlternative("lotka-volterra", noise=0.2).is_neutral_limit(0.0)


# ----------------------------------------------------------------------------- power runs
@pytest.fixture(scope="module")
def neutral_limit_run():
    """200 constant (sigma = 0) snapshot communities, tested with B = 19."""
    return power_curve(TINY_SNAPSHOT, "logistic", [0.0], n_datasets=200, replicates=19,
                       groupings=10, seed=3)


@pytest.mark.slow
def test_power_at_the_neutral_limit_is_at_most_alpha(neutral_limit_run):
    """At sigma = 0 the community is neutral (theta = inf): no statistic rejects more often
    than alpha allows.

    With B = 19, p <= 0.05 means the data beat all 19 replicates, a 1/20 event under the
    null. Bound: the upper 0.05% point of Binomial(200, 0.05) (21 of 200), a false failure
    rate of 5e-4 per statistic; the seed is fixed, so the test is deterministic. Only the
    upper side is checked: theta = inf lies on the boundary of the parameter space (the fit
    clips it), where a parametric bootstrap is conservative rather than exact (Andrews 2000,
    Econometrica 68:399, from memory); measured with seeds 3-6: combined rejects 2-4 of 200,
    dispersion_heterogeneity 0-2.
    """
    # Source: exactness of Monte Carlo tests, Davison & Hinkley (1997) Bootstrap Methods and
    # their Application, sec. 4.2.5; binomial quantile from scipy.stats.binom.
    high = stats.binom.isf(0.0005, 200, 0.05)
    assert not neutral_limit_run.failures
    for name, k in zip(neutral_limit_run.statistics, neutral_limit_run.rejections[0]):
        assert k <= high, (name, k, high)
    report = neutral_limit_run.summary()
    assert "false-positive rate" in report


@pytest.fixture(scope="module")
def separated_run():
    # 39 replicates: with 19 the calibrated combination's p-values move in steps of 0.05,
    # the level itself, and its power at sigma = 0.3 fell from 0.83 to 0.63 when
    # stationary_divergence changed its null law (0.88 with 39).
    return power_curve(TINY_SERIES, "logistic", [0.001, 0.3], n_datasets=24, replicates=39,
                       groupings=20, seed=2)


def test_power_increases_with_strength(separated_run):
    """sigma = 0.3 is detected nearly always, sigma = 0.001 hardly ever: the Wilson
    intervals of the combined power do not overlap."""
    low, high = separated_run.interval()
    combined = separated_run.statistics.index("combined")
    assert high[0, combined] < low[1, combined]
    assert separated_run.power[1, combined] >= 0.75  # 18 of 24: the intervals carry the test
    mde = separated_run.minimum_detectable()[0]
    assert 0.001 < mde < 0.3


def test_power_result_outputs(separated_run, tmp_path):
    frame = separated_run.to_frame()
    assert list(frame.columns) == ["alternative", "strength", "statistic", "datasets",
                                   "rejected", "undefined", "power", "power_low",
                                   "power_high", "alpha"]
    assert len(frame) == 2 * len(separated_run.statistics)
    path = tmp_path / "power.tsv"
    path.write_text(separated_run.to_tsv(), encoding="utf-8")
    back = pd.read_csv(path, sep="\t")
    np.testing.assert_allclose(back["power"], frame["power"], rtol=1e-5)
    report = separated_run.summary()
    assert max(len(line) for line in report.splitlines()) <= WIDTH
    assert "Minimum detectable strength" in report and "(sigma; each taxon" in report
    assert "24 datasets per strength" in report


def test_results_do_not_depend_on_jobs_or_on_the_grid():
    one = power_curve(TINY_SERIES, "logistic", [0.01, 0.05], n_datasets=3, replicates=19,
                      groupings=10, seed=7, jobs=1)
    two = power_curve(TINY_SERIES, "logistic", [0.01, 0.05], n_datasets=3, replicates=19,
                      groupings=10, seed=7, jobs=2)
    alone = power_curve(TINY_SERIES, "logistic", [0.05], n_datasets=3, replicates=19,
                        groupings=10, seed=7, jobs=1)
    np.testing.assert_array_equal(one.pvalues, two.pvalues)
    np.testing.assert_array_equal(one.pvalues[1:], alone.pvalues)
    assert one.summary() == two.summary()


def test_lotka_volterra_run_reports_its_strength():
    run = power_curve(TINY_SNAPSHOT, NicheAlternative("lotka-volterra", noise=0.1), [0.0, 0.3],
                      n_datasets=2, replicates=19, groupings=10, seed=1)
    report = run.summary()
    assert "competition" in report and "noise 0.1" in report
    assert "neutral limit" not in report.split("Power (%)")[1]


# ----------------------------------------------------------------------------- command line
def test_cli_power_from_numbers(tmp_path, capsys):
    table, output = tmp_path / "power.tsv", tmp_path / "power.txt"
    code = main(["power", "--taxa", "10", "--samples", "15", "--snapshot", "--depth", "1000",
                 "--strengths", "0.5,0", "--datasets", "3", "--replicates", "19",
                 "--groupings", "10", "--table", str(table), "--output", str(output),
                 "--quiet"])
    assert code == 0
    captured = capsys.readouterr()
    assert captured.err == ""
    assert captured.out == output.read_text(encoding="utf-8")
    assert "snapshot, 15 replicate communities" in captured.out
    rows = pd.read_csv(table, sep="\t")
    assert sorted(set(rows["strength"])) == [0.0, 0.5]


@pytest.fixture(scope="module")
def neutral_tables(tmp_path_factory):
    datasets = neutral_collection(2, DesignSpec(n_samples=20, interval=1.0, depth=2000), 12,
                                  40.0, 0.3, seed=8, prefix="pond")
    return write_collection(datasets, tmp_path_factory.mktemp("tables"))


def test_cli_power_from_a_table(neutral_tables, capsys):
    counts, metadata = neutral_tables
    code = main(["power", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
                 "--time-by", "day", "--dataset", "pond_2", "--strengths", "0.3",
                 "--datasets", "2", "--replicates", "19", "--groupings", "10"])
    assert code == 0
    captured = capsys.readouterr()
    assert "as in dataset 'pond_2'" in captured.out
    assert "pooled relative abundances of the dataset" in captured.out
    assert "datasets tested" in captured.err


@pytest.mark.parametrize("arguments, words", [
    (["--taxa", "10", "--samples", "15", "--interval", "1", "--depth", "900",
      "--strengths", "0.1,abc"], ["--strengths", "'abc'"]),
    (["--taxa", "10", "--samples", "15", "--interval", "1", "--depth", "900",
      "--strengths", "0.1,2.5"], ["--strengths", "2.5"]),
    (["--taxa", "10", "--samples", "15", "--interval", "1", "--depth", "900",
      "--strengths", ","], ["--strengths"]),
    (["--taxa", "10", "--samples", "15"], ["no design given", "--depth", "--interval"]),
    ([], ["no design given", "--taxa"]),
    (["--taxa", "10", "--samples", "15", "--snapshot", "--interval", "1", "--depth", "900"],
     ["--interval", "snapshot"]),
    (["--taxa", "10", "--samples", "2", "--interval", "1", "--depth", "900"], ["--samples"]),
    (["--taxa", "10", "--samples", "15", "--interval", "1", "--depth", "900", "--alpha", "1.5"],
     ["--alpha"]),
    (["--taxa", "10", "--samples", "15", "--interval", "1", "--depth", "900", "--noise", "0.1"],
     ["--noise"]),
    (["--dataset", "pond_1", "--taxa", "10"], ["--dataset", "counts table"]),
])
def test_cli_power_input_errors(arguments, words, capsys):
    assert main(["power", *arguments]) == 2
    assert_one_error_line(capsys, *words)


def test_cli_power_refuses_a_table_with_design_options(neutral_tables, capsys):
    counts, metadata = neutral_tables
    assert main(["power", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
                 "--dataset", "pond_1", "--taxa", "10"]) == 2
    assert_one_error_line(capsys, "--taxa", "counts table")


# ----------------------------------------------------------------------------- --detectable
def test_detectable_line_describes_the_design_and_the_quick_run():
    dataset = neutral_collection(1, DesignSpec(n_samples=20, interval=1.0, depth=2000), 12,
                                 40.0, 0.3, seed=8, prefix="lake")[0]
    line = power.detectable_line(dataset, CalibrationSettings(groupings=10, seed=0))
    assert line.startswith("With this design (12 taxa, 20 samples, median depth 2,000 reads)")
    assert "logistic niche alternative" in line
    assert "12 simulated datasets per strength, B = 99" in line


def test_test_command_adds_the_line_only_when_not_rejected(monkeypatch):
    """The note is added after the test, before the report is rendered."""
    real_test = calibrate.run_calibration

    def with_combined_pvalue(pvalue):
        def run(*args, **kwargs):
            result = real_test(*args, **kwargs)
            combined = replace(result.statistics["combined"], pvalue=pvalue)
            return replace(result, statistics={**result.statistics, "combined": combined})
        return run

    monkeypatch.setattr(power, "detectable_line",
                        lambda dataset, settings, jobs: "With this design (stub), a line.")
    dataset = neutral_collection(1, DesignSpec(n_samples=15, interval=None, depth=900), 8,
                                 40.0, 0.3, seed=8, prefix="lake")[0]
    monkeypatch.setattr(calibrate, "run_calibration", with_combined_pvalue(0.5))
    report = commands.test_command(dataset, replicates=19, groupings=10, seed=0, jobs=1,
                                   detectable=True)
    assert "With this design (stub), a line." in report.split("Notes")[1]
    monkeypatch.setattr(calibrate, "run_calibration", with_combined_pvalue(0.05))
    report = commands.test_command(dataset, replicates=19, groupings=10, seed=0, jobs=1,
                                   detectable=True)
    assert power.DETECTABLE_PREFIX not in report


def test_no_detectable_line_when_rejected():
    rng = np.random.default_rng(3)
    design = DesignSpec(n_samples=20, interval=1.0, depth=2000).draw(rng)
    counts = StochasticLogistic(12, strength=0.5).simulate(design, 1, rng)[0]
    report = commands.test_command(as_dataset("niche", counts, design), replicates=19, groupings=10,
                          seed=0, jobs=1, detectable=True)
    assert "Neutrality rejected" in report
    assert power.DETECTABLE_PREFIX not in report


def test_screen_detectable_lines_are_stored_and_fingerprinted(neutral_tables, tmp_path,
                                                               monkeypatch, capsys):
    """Lines are saved with the records, reused on resume, and the flag is in the fingerprint."""
    calls = []
    quick = functools.partial(power.detectable_line, n_datasets=3, replicates=19)

    def counted(dataset, *args, **kwargs):
        calls.append(dataset.name)
        return quick(dataset, *args, **kwargs)

    monkeypatch.setattr(power, "detectable_line", counted)
    counts, metadata = neutral_tables
    out = tmp_path / "screen"
    args = ["screen", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
            "--time-by", "day", "--replicates", "19", "--groupings", "10", "--out", str(out),
            "--quiet"]
    assert main(args + ["--detectable"]) == 0
    first = (out / "report.txt").read_text(encoding="utf-8")
    assert sorted(calls) == ["pond_1", "pond_2"]
    assert first.count(power.DETECTABLE_PREFIX) == 2
    stored = json.loads((out / STORE_FOLDER / SETTINGS_FILE).read_text(encoding="utf-8"))
    assert "alternative" in stored["detectable"]
    assert main(args + ["--detectable"]) == 0
    assert sorted(calls) == ["pond_1", "pond_2"]  # reused from the store, not recomputed
    second = (out / "report.txt").read_text(encoding="utf-8")
    assert second.split("Run time")[1].split("\n", 1)[1] == first.split("Run time")[1].split(
        "\n", 1)[1]
    capsys.readouterr()
    assert main(args) == 2
    assert_one_error_line(capsys, "detectable")


def test_the_detectable_line_keeps_the_null_options(monkeypatch):
    """The quick power run calibrates with the dataset's settings, its null's options included."""
    seen = []

    def record(dataset, settings, **kwargs):
        seen.append(settings)
        raise RuntimeError("recorded")  # the task fails and counts as not rejected

    monkeypatch.setattr(power, "run_calibration", record)
    dataset = neutral_collection(1, DesignSpec(n_samples=12, interval=1.0, depth=900), 6,
                                 40.0, 0.3, seed=5, prefix="lake")[0]
    settings = CalibrationSettings(groupings=10, seed=4,
                                   null=NullOptions(noise="off", start="stationary"))
    line = power.detectable_line(dataset, settings, n_datasets=1, replicates=9)
    assert "is not detected" in line
    assert seen and all(used == replace(settings, replicates=9) for used in seen)
