"""Registry of the neutrality statistics: names, order, options."""

from __future__ import annotations

import pytest

from driftscreen.errors import InputError
from driftscreen.statistics.base import Statistic
from driftscreen.statistics.registry import (
    STATISTIC_NAMES,
    default_statistics,
    get_statistic,
)


def test_names_in_fixed_order_with_combined_last():
    assert STATISTIC_NAMES == ("stationary_divergence", "regrouping_invariance",
                               "fluctuation_scaling", "dispersion_heterogeneity", "combined")


def test_default_statistics_for_time_series_and_snapshots():
    series = default_statistics(time_series=True, n_groupings=17)
    assert [s.name for s in series] == list(STATISTIC_NAMES[:-1])
    assert series[1].n_groupings == 17
    snapshot = default_statistics(time_series=False)
    assert [s.name for s in snapshot] == ["stationary_divergence", "fluctuation_scaling",
                                          "dispersion_heterogeneity"]
    for statistic in series:
        assert isinstance(statistic, Statistic)
        assert statistic.alternative in ("greater", "two-sided")
        assert hasattr(statistic, "diagnose")


def test_get_statistic_with_options_and_unknown_names():
    assert get_statistic("regrouping_invariance", n_groupings=5).n_groupings == 5
    assert get_statistic("dispersion_heterogeneity").name == "dispersion_heterogeneity"
    for name in ("combined", "no_such_statistic"):
        with pytest.raises(InputError, match="use one of: stationary_divergence"):
            get_statistic(name)
    with pytest.raises(TypeError):
        get_statistic("fluctuation_scaling", n_groupings=3)
