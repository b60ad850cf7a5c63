"""Screen records: exact JSON round trips of results, analysability, progress lines."""

from __future__ import annotations

import io
import json
import math

import numpy as np
import pytest

from driftscreen.calibrate import neutrality_test, summarize_dataset
from driftscreen.synthetic import neutral_collection
from driftscreen.dataset import Design
from driftscreen.progress import Progress, duration_text
from driftscreen.screen import (DatasetOutcome, outcome_from_dict, outcome_to_dict,
                                unanalysable_reason)
from driftscreen.serialize import (float_from_json, float_to_json, result_from_dict,
                                   result_to_dict)
from driftscreen.synthetic import DesignSpec, as_dataset


@pytest.fixture(scope="module")
def result():
    spec = DesignSpec(n_samples=20, interval=1.0, depth=2000, depth_spread=0.3)
    dataset = neutral_collection(1, spec, 10, 30.0, 0.4, seed=6)[0]
    return neutrality_test(dataset, replicates=19, groupings=10, seed=2)


def test_result_round_trip_through_json_text_is_exact(result):
    text = json.dumps(result_to_dict(result), allow_nan=False)
    back = result_from_dict(json.loads(text))
    assert result_to_dict(back) == result_to_dict(result)
    for name, original in result.statistics.items():
        copy = back.statistics[name]
        # Bit-for-bit: repr of a float reads back to the same double (Python float repr).
        assert np.array_equal(copy.null_distribution, original.null_distribution)
        assert copy.null_distribution.tobytes() == original.null_distribution.tobytes()
        assert (copy.statistic == original.statistic
                or (math.isnan(copy.statistic) and math.isnan(original.statistic)))
        assert copy.effect_size == original.effect_size or math.isnan(original.effect_size)
    assert list(back.statistics) == list(result.statistics)
    assert back.parameters == result.parameters
    assert back.model.theta == result.model.theta and back.model.rate == result.model.rate
    np.testing.assert_allclose(back.model.p, result.model.p, rtol=1e-15)
    assert back.dataset == result.dataset


def test_outcome_round_trip_is_idempotent(result):
    outcome = DatasetOutcome(result.dataset, result)
    once = outcome_to_dict(outcome)
    twice = outcome_to_dict(outcome_from_dict(json.loads(json.dumps(once))))
    assert json.dumps(once) == json.dumps(twice)


def test_non_finite_floats_become_json_safe_values():
    for value, encoded in ((math.nan, None), (math.inf, "inf"), (-math.inf, "-inf"),
                           (0.1, 0.1), (-0.0, -0.0)):
        assert float_to_json(value) == encoded or (encoded is None
                                                   and float_to_json(value) is None)
        back = float_from_json(float_to_json(value))
        assert back == value or (math.isnan(value) and math.isnan(back))


def small_dataset(n_samples, n_taxa, time_series=True):
    counts = np.random.default_rng(1).integers(1, 50, size=(n_samples, n_taxa))
    times = np.arange(n_samples, dtype=float) if time_series else None
    return as_dataset("d", counts, Design(depths=counts.sum(axis=1), times=times))


@pytest.mark.parametrize(("n_samples", "n_taxa", "time_series", "analysable"), [
    (4, 2, True, True), (3, 5, True, False), (1, 5, True, False), (4, 1, True, False),
    (3, 2, False, True), (2, 5, False, False)])
def test_analysability_limits(n_samples, n_taxa, time_series, analysable):
    dataset = small_dataset(n_samples, n_taxa, time_series)
    reason = unanalysable_reason(dataset)
    assert (reason == "") == analysable
    if not analysable:
        assert reason.startswith("not analysed: ")
        outcome = DatasetOutcome(summarize_dataset(dataset), None, reason)
        assert outcome.statistic_names()[-1] == "combined"
        assert ("regrouping_invariance" in outcome.statistic_names()) == time_series


def test_progress_lines_count_datasets_and_estimate_time_left():
    stream = io.StringIO()
    progress = Progress(total=4, stream=stream, every=0.0)
    progress.counted(1)
    progress.planned(3, 2, work=30.0)
    progress.chunk_finished(10.0)
    progress.dataset_finished()
    progress.chunk_finished(20.0)
    progress.dataset_finished()
    progress.dataset_finished()
    lines = stream.getvalue().splitlines()
    assert lines[0].startswith("driftscreen: fitted 3 datasets in ")
    assert lines[0].endswith("running 2 chunks of neutral replicates")
    assert lines[1].startswith("driftscreen: 2/4 datasets done, ")
    assert "elapsed, about" in lines[1] and lines[1].endswith("left")
    assert lines[-1].startswith("driftscreen: 4/4 datasets done") and "left" not in lines[-1]


def test_progress_is_throttled_but_always_reports_the_end():
    stream = io.StringIO()
    progress = Progress(total=3, stream=stream, every=3600.0)
    progress.planned(3, 3, work=3.0)
    for _ in range(3):
        progress.chunk_finished(1.0)
        progress.dataset_finished()
    assert len(stream.getvalue().splitlines()) == 3  # the plan, the first and the last


def test_silent_progress_writes_nothing():
    progress = Progress(total=1, stream=None)
    progress.planned(1, 1, 1.0)
    progress.dataset_finished()


@pytest.mark.parametrize(("seconds", "text"), [(0, "0s"), (59.4, "59s"), (61, "1m01s"),
                                               (3723, "1h02m03s")])
def test_duration_text(seconds, text):
    assert duration_text(seconds) == text
