"""Bootstrap p-values: plain and studentised, for the data and for every replicate."""

from __future__ import annotations

import numpy as np
import pytest

from driftscreen.calibrate import bootstrap_pvalue, leave_one_out_pvalues
from driftscreen.statistics.base import is_studentised
from driftscreen.statistics.registry import STATISTIC_CLASSES


def test_plain_pvalue_is_one_plus_hits_over_b_plus_one():
    # Source: Davison & Hinkley (1997), Bootstrap Methods and their Application, ch. 4
    # (formula quoted from memory): p = (1 + #{t* >= t}) / (B + 1).
    null = np.arange(1.0, 100.0)                      # B = 99, median 50
    assert bootstrap_pvalue(95.0, null, "greater") == pytest.approx(6 / 100)
    # two-sided: 45 replicates at or below 45 and 45 at or above 55
    assert bootstrap_pvalue(45.0, null, "two-sided") == pytest.approx(91 / 100)


@pytest.mark.parametrize("alternative", ["greater", "two-sided"])
def test_equal_standard_errors_leave_the_pvalue_unchanged(alternative):
    rng = np.random.default_rng(3)
    null = rng.normal(size=199)
    scales = np.full(199, 0.7)
    for observed in (-2.1, 0.3, 1.9):
        assert bootstrap_pvalue(observed, null, alternative, 0.7, scales) == pytest.approx(
            bootstrap_pvalue(observed, null, alternative))
    np.testing.assert_array_equal(leave_one_out_pvalues(null, alternative, scales),
                                  leave_one_out_pvalues(null, alternative))


def test_studentised_distance_counts_in_each_tables_own_units():
    # Studentised bootstrap (Hall 1992, The Bootstrap and Edgeworth Expansion): a replicate
    # is as extreme as the data when |t* - m| / se* >= |t - m| / se.
    null = np.array([-1.0, 0.0, 0.0, 0.0, 6.0])          # median 0
    scales = np.array([1.0, 1.0, 1.0, 1.0, 3.0])          # the 6 is only 2 of its units out
    assert bootstrap_pvalue(3.0, null, "two-sided") == pytest.approx(2 / 6)
    assert bootstrap_pvalue(3.0, null, "two-sided", 1.0, scales) == pytest.approx(1 / 6)
    assert bootstrap_pvalue(3.0, null, "two-sided", 2.0, scales) == pytest.approx(2 / 6)


def test_replicates_without_a_standard_error_are_dropped():
    null = np.array([0.0, 1.0, 2.0, 3.0, 50.0])
    scales = np.array([1.0, 1.0, 1.0, 1.0, np.nan])
    assert bootstrap_pvalue(4.0, null, "two-sided", 1.0, scales) == pytest.approx(1 / 5)
    loo = leave_one_out_pvalues(null, "two-sided", scales)
    assert np.isnan(loo[4]) and np.all(np.isfinite(loo[:4]))
    assert np.isnan(bootstrap_pvalue(4.0, null, "two-sided", 0.0, scales))


def test_studentised_leave_one_out_pvalues_are_uniform_under_exchangeability():
    # Common practice: a replicate's leave-one-out p-value among B exchangeable replicates
    # takes the values 1/B, ..., B/B once each (without ties).
    rng = np.random.default_rng(5)
    null = rng.normal(size=200)
    scales = rng.uniform(0.5, 2.0, 200)
    loo = leave_one_out_pvalues(null, "two-sided", scales)
    np.testing.assert_allclose(np.sort(loo), np.arange(1, 201) / 200)


def test_every_statistic_says_whether_it_is_studentised():
    flags = {cls.name: is_studentised(cls) for cls in STATISTIC_CLASSES}
    assert flags["fluctuation_scaling"] is True
    assert all(isinstance(flag, bool) for flag in flags.values())
    assert all(hasattr(cls, "standard_error") for cls in STATISTIC_CLASSES if flags[cls.name])
    assert not is_studentised(object())
