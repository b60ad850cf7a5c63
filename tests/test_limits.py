"""Limits written once: the same rule for test, screen and power; parser ranges = library's."""

from __future__ import annotations

import numpy as np
import pytest

from driftscreen.calibrate import CalibrationSettings, neutrality_test
from driftscreen.cli import build_parser
from driftscreen.cli import power_design
from driftscreen.dataset import Dataset, Design
from driftscreen.errors import InputError
from driftscreen.limits import MAX_READS, NOT_ANALYSED, unanalysable_reason
from driftscreen.neutral.model import NullOptions
from driftscreen.screen import screen
from driftscreen.synthetic import DesignSpec


def small_dataset(n_samples: int, time_series: bool) -> Dataset:
    counts = np.array([[10, 30, 5], [12, 25, 7], [9, 33, 4], [14, 28, 6]])[:n_samples]
    times = np.arange(n_samples, dtype=float) if time_series else None
    return Dataset(name="pond", counts=counts, taxa=("a", "b", "c"),
                   samples=tuple(f"s{k}" for k in range(n_samples)),
                   design=Design(depths=counts.sum(axis=1), times=times), source=("pond.tsv",))


@pytest.mark.parametrize("n_samples, time_series", [(3, True), (2, False)])
def test_test_screen_and_power_refuse_a_small_design_alike(n_samples, time_series):
    dataset = small_dataset(n_samples, time_series)
    reason = unanalysable_reason(dataset).removeprefix(NOT_ANALYSED)
    kind = "a time series needs at least 4" if time_series else "a snapshot design needs at least 3"
    assert reason == f"{kind} samples, this dataset has {n_samples}"
    with pytest.raises(InputError) as caught:
        neutrality_test(dataset, replicates=9, groupings=2)
    assert caught.value.one_line().startswith(f"pond.tsv: dataset 'pond': {reason}; ")
    run = screen([dataset], CalibrationSettings(replicates=9, groupings=2), influence=False)
    assert run.outcomes[0].note == NOT_ANALYSED + reason
    with pytest.raises(InputError, match=f"dataset 'pond': {reason}; choose another"):
        power_design(dataset, n_taxa=None, n_samples=None, interval=None, irregular=False,
                     snapshot=False, depth=None, depth_spread=None)


def parser_accepts(option: str, value: int) -> bool:
    try:
        build_parser().parse_args(["test", "counts.tsv", option, str(value)])
    except SystemExit:
        return False
    return True


def library_accepts(name: str, value: int) -> bool:
    try:
        if name == "jobs":
            neutrality_test(small_dataset(4, True), replicates=1, groupings=2, jobs=value)
        else:
            CalibrationSettings(**{name: value})
    except ValueError:
        return False
    return True


@pytest.mark.parametrize("name", ["replicates", "groupings", "seed", "jobs"])
@pytest.mark.parametrize("value", [-2, -1, 0, 1, 2, 3])
def test_parser_accepts_what_the_library_accepts(name, value, capsys):
    assert parser_accepts(f"--{name}", value) == library_accepts(name, value)
    capsys.readouterr()


@pytest.mark.parametrize("depths", [[1e19], [2.0**63], [float(MAX_READS) + 2], [np.inf]])
def test_designs_refuse_reads_a_cast_would_wrap(depths):
    with pytest.raises(ValueError, match="at most 10\\^15"):
        Design(depths=np.array(depths))


def test_counts_a_cast_would_wrap_are_refused():
    with pytest.raises(ValueError, match="counts must be finite and at most"):
        Dataset(name="x", counts=np.array([[9.3e18, 1.0]]), taxa=("a", "b"), samples=("s",),
                design=Design(depths=[5]))


def simulate_parser_accepts(option: str, value: float) -> bool:
    try:
        build_parser().parse_args(["simulate", "--out", "x", option, repr(value)])
    except SystemExit:
        return False
    return True


NUMBERS = [-1.0, 0.0, 1e-300, 1e-7, 1e-6, 0.5, 5.0, 6.0, 1e5, 1e300, np.inf, np.nan]


@pytest.mark.parametrize("value", NUMBERS)
def test_design_options_accept_what_the_design_accepts(value, capsys):
    for option, field in (("--interval", "interval"), ("--depth-spread", "depth_spread")):
        try:
            DesignSpec(n_samples=2, **{field: value})
            library = True
        except ValueError:
            library = False
        assert simulate_parser_accepts(option, value) == library, (option, value)
    capsys.readouterr()


@pytest.mark.parametrize("value", NUMBERS)
def test_read_precision_option_accepts_what_the_calibration_accepts(value, capsys):
    try:
        CalibrationSettings(null=NullOptions(noise=value))
        library = True
    except ValueError:
        library = False
    try:
        build_parser().parse_args(["test", "counts.tsv", "--read-noise", repr(value)])
        parser = True
    except SystemExit:
        parser = False
    assert parser == library
    capsys.readouterr()
