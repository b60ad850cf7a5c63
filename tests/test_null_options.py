"""The null's options in the calibration: technical noise and conditioning on the first sample.

External references: the neutral mean relaxation E[X(t)] = p + (x_0 - p) exp(-rate t)
(Ewens 2004, Mathematical Population Genetics I, ch. 5) and Dirichlet-multinomial reads
(Mosimann 1962, Biometrika 49:65), used to build the data; the checks are on what the
calibration does with them.
"""

from __future__ import annotations

import numpy as np
import pytest

from driftscreen.calibrate import (
    CalibrationSettings,
    neutrality_test,
    plan_calibration,
    run_chunk,
)
from driftscreen.dataset import Design
from driftscreen.neutral.model import NeutralModel, NullOptions
from driftscreen.neutral.simulate import simulate
from driftscreen.synthetic import as_dataset, metacommunity


def series_dataset(name: str, *, noise: float = 0.0, disturbed: bool = False,
                   n_samples: int = 40, rate: float = 0.3, seed: int = 1):
    rng = np.random.default_rng(seed)
    design = Design(np.full(n_samples, 8_000), np.arange(float(n_samples)))
    model = NeutralModel(metacommunity(25, rng), 80.0, rate, noise)
    start = "stationary"
    if disturbed:
        start = model.p.copy()
        start[:3] /= 10.0
    counts = simulate(model, design, 1, rng, start=start)[0]
    return as_dataset(name, counts, design)


def test_replicates_are_conditioned_on_the_observed_first_sample():
    dataset = series_dataset("conditioned", disturbed=True)
    plan = plan_calibration(dataset, CalibrationSettings(replicates=8, groupings=10, seed=3))
    task = plan.tasks[0]
    np.testing.assert_array_equal(task.first_counts, dataset.counts[0])
    counts_seen = []

    def keep(stat_counts, *args):
        counts_seen.append(stat_counts)
        return np.zeros(stat_counts.shape[0])

    probe = type("Probe", (), {"name": "probe", "needs_time": False, "alternative": "greater",
                               "marginal": False, "in_combination": True,
                               "compute": staticmethod(keep)})()
    run_chunk(type(task)(task.model, task.design, task.n_replicates, task.simulation_stream,
                         task.statistics_stream, (probe,), task.options, task.first_counts))
    assert np.all(counts_seen[0][:, 0] == dataset.counts[0])
    assert not np.all(counts_seen[0][:, 1] == dataset.counts[1])


def test_stationary_start_is_not_conditioned():
    dataset = series_dataset("stationary")
    settings = CalibrationSettings(replicates=8, groupings=10, seed=3,
                                   null=NullOptions(start="stationary"))
    assert plan_calibration(dataset, settings).tasks[0].first_counts is None


def test_estimated_fixed_and_absent_read_precision_in_the_parameters():
    dataset = series_dataset("noisy", noise=1 / 201)
    estimated = neutrality_test(dataset, replicates=19, groupings=10, seed=2)
    precision = estimated.parameters["precision"]
    assert 60 < precision.estimate < 600 and precision.low < precision.estimate < precision.high
    assert estimated.model.noise > 0
    fixed = neutrality_test(dataset, replicates=19, groupings=10, seed=2, noise=200.0)
    assert fixed.parameters["precision"].estimate == pytest.approx(200.0)
    assert fixed.model.precision == pytest.approx(200.0)
    off = neutrality_test(dataset, replicates=19, groupings=10, seed=2, noise="off")
    assert "precision" not in off.parameters and off.model.noise == 0.0


def test_snapshot_says_noise_cannot_be_separated():
    rng = np.random.default_rng(4)
    design = Design(np.full(30, 5_000))
    counts = simulate(NeutralModel(metacommunity(20, rng), 50.0), design, 1, rng)[0]
    result = neutrality_test(as_dataset("snap", counts, design), replicates=9, groupings=10)
    assert any("cannot separate technical noise" in note for note in result.notes)
    assert "precision" not in result.parameters


def test_fit_flags_reach_the_result():
    # A slow, short series: rate x span well below 5 is flagged by the fit, and the flag must
    # reach the result's notes (it used to be lost between the fit and the model).
    dataset = series_dataset("slow", n_samples=12, rate=0.05, seed=6)
    result = neutrality_test(dataset, replicates=9, groupings=10, seed=1)
    assert any("weakly identified" in note for note in result.notes)


def test_invalid_options_are_rejected():
    with pytest.raises(ValueError):
        NullOptions(noise="sometimes")
    with pytest.raises(ValueError):
        NullOptions(noise=-3.0)
    with pytest.raises(ValueError):
        NullOptions(start="middle")
