"""Benjamini-Hochberg q-values: published example, scipy, NaN handling."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from driftscreen.fdr import benjamini_hochberg, qvalues_by_statistic

# Source: Benjamini & Hochberg (1995) J. R. Stat. Soc. B 57:289-300, section 4 (the 15
# p-values of their worked example). Values from memory.
BH_EXAMPLE = np.array([0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344,
                       0.0459, 0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000])


def test_published_example_rejects_the_four_smallest_at_005():
    # Source: Benjamini & Hochberg (1995), section 4: at q* = 0.05 the step-up procedure
    # rejects the hypotheses of the 4 smallest p-values (from memory).
    q = benjamini_hochberg(BH_EXAMPLE)
    assert np.flatnonzero(q <= 0.05).tolist() == [0, 1, 2, 3]


def test_published_example_qvalues_by_hand():
    # Source: Benjamini & Hochberg (1995) step-up rule, q_(i) = min_{j>=i} m p_(j) / j,
    # evaluated by hand for m = 15 (e.g. q_(4) = 0.0095 * 15 / 4 = 0.035625, and
    # q_(6) = q_(7) = 0.0298 * 15 / 7 because p_(7) / 7 < p_(6) / 6).
    expected = [0.0015, 0.003, 0.0095, 0.035625, 0.0603, 0.0298 * 15 / 7, 0.0298 * 15 / 7,
                0.0645, 0.0765, 0.486, 0.4262 * 15 / 11, 0.714875, 0.6528 * 15 / 13,
                0.759 * 15 / 14, 1.0]
    np.testing.assert_allclose(benjamini_hochberg(BH_EXAMPLE), expected, rtol=1e-12)


def test_published_example_matches_scipy():
    # Source: scipy.stats.false_discovery_control (method "bh") implements the same
    # Benjamini & Hochberg (1995) adjustment.
    np.testing.assert_allclose(benjamini_hochberg(BH_EXAMPLE),
                               stats.false_discovery_control(BH_EXAMPLE, method="bh"),
                               rtol=1e-12)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(min_value=0.0, max_value=1.0), min_size=1, max_size=40))
def test_random_pvalues_match_scipy(pvalues):
    # Source: scipy.stats.false_discovery_control(method="bh").
    p = np.array(pvalues)
    np.testing.assert_allclose(benjamini_hochberg(p),
                               stats.false_discovery_control(p, method="bh"),
                               rtol=1e-12, atol=1e-15)


def test_order_of_input_is_kept_and_ties_share_q():
    p = np.array([0.04, 0.01, 0.04, 0.03])
    q = benjamini_hochberg(p)
    # common practice: equal p-values get equal q-values; q >= p; q is monotone in p.
    assert q[0] == q[2]
    assert np.all(q >= p)
    order = np.argsort(p)
    assert np.all(np.diff(q[order]) >= 0)
    np.testing.assert_allclose(q, stats.false_discovery_control(p, method="bh"))


def test_nan_pvalues_are_not_tests():
    rng = np.random.default_rng(11)
    p = rng.uniform(size=12) ** 3
    with_nan = np.insert(p, [0, 5, 12], np.nan)
    q = benjamini_hochberg(with_nan)
    assert np.isnan(q[[0, 6, 14]]).all()
    # The defined q-values are BH over the 12 defined p-values only (m = 12, not 15).
    np.testing.assert_allclose(q[~np.isnan(with_nan)],
                               stats.false_discovery_control(p, method="bh"), rtol=1e-12)


def test_all_nan_and_empty():
    assert np.isnan(benjamini_hochberg([np.nan, np.nan])).all()
    assert benjamini_hochberg([]).shape == (0,)


def test_rejects_invalid_input():
    with pytest.raises(ValueError):
        benjamini_hochberg([0.5, 1.5])
    with pytest.raises(ValueError):
        benjamini_hochberg([[0.1, 0.2]])


def test_families_are_adjusted_separately():
    families = {"a": [0.01, 0.02, np.nan], "b": [0.5, 0.001, 0.2]}
    q = qvalues_by_statistic(families)
    np.testing.assert_allclose(q["a"][:2], stats.false_discovery_control([0.01, 0.02]))
    assert np.isnan(q["a"][2])
    np.testing.assert_allclose(q["b"], stats.false_discovery_control([0.5, 0.001, 0.2]))
