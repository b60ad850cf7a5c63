"""Combinations of p-values: the harmonic mean p-value (Wilson 2019, PNAS 116(4):1195-1200)
and the Cauchy combination test (Liu & Xie 2020, J. Am. Stat. Assoc. 115(529):393-402)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from driftscreen.calibrate import combination_statistic, combine
from driftscreen.statistics.combination import (
    cauchy_combination,
    cauchy_transform,
    harmonic_mean_pvalue,
)


def test_harmonic_mean_pvalue_is_the_weighted_harmonic_mean():
    # Source: Wilson (2019), eq. 2: HMP = sum w / sum (w_j / p_j); compared with the weighted
    # harmonic mean of scipy.stats.hmean (scipy >= 1.9 takes weights).
    rng = np.random.default_rng(3)
    pvalues = rng.random((20, 5)) ** 2
    weights = rng.random((20, 5))
    reference = [stats.hmean(p, weights=w) for p, w in zip(pvalues, weights)]
    np.testing.assert_allclose(harmonic_mean_pvalue(pvalues, weights), reference, rtol=1e-12)
    # hand computation: p = (0.01, 0.5), equal weights: 2 / (100 + 2) = 0.0196078...
    assert float(harmonic_mean_pvalue(np.array([0.01, 0.5]))) == pytest.approx(2 / 102)


def test_a_pvalue_of_one_cannot_annul_strong_evidence():
    # Regression: p = (0.035, 0.005, 0.005, 1) gave a Cauchy-combined p-value of 1 (the
    # transform of p = 1 is about -3e15). The harmonic mean is 4 / (1/0.035 + 400 + 1) = 0.0093.
    pvalues = np.array([0.035, 0.005, 0.005, 1.0])
    assert float(cauchy_combination(pvalues)[1]) > 0.99
    assert float(harmonic_mean_pvalue(pvalues)) == pytest.approx(4 / (1 / 0.035 + 401))
    # The calibrated combination: replicates' p-values uniform and independent, so the
    # observed -log10 HMP of 2.03 sits in the far tail (P(HMP <= 0.0093) ~ 0.05 by Wilson's
    # asymptotics), not at the bottom.
    rng = np.random.default_rng(9)
    replicate = rng.random((999, 4))
    result = combine(pvalues, replicate)
    assert result.statistic == pytest.approx(-np.log10(4 / (1 / 0.035 + 401)))
    assert result.pvalue < 0.1


def test_combination_statistic_skips_undefined_pvalues():
    # common practice: statistics without a p-value (NaN) take no part in the combination.
    rows = np.array([[0.02, np.nan, 0.5], [np.nan, np.nan, np.nan]])
    values = combination_statistic(rows)
    assert values[0] == pytest.approx(-np.log10(2 / (50 + 2)))
    assert np.isnan(values[1])


@pytest.mark.parametrize("p", [1e-300, 1e-16, 1e-9, 0.003, 0.2, 0.5, 0.77, 0.999999, 1.0])
def test_single_pvalue_is_returned_unchanged(p):
    # Source: Liu & Xie (2020): with one p-value, T = tan((1/2 - p) pi) and the combined p-value
    # 1/2 - arctan(T)/pi inverts the transform.
    _, combined = cauchy_combination(np.array([p]))
    assert combined == pytest.approx(p, rel=1e-9, abs=1e-15)


@pytest.mark.parametrize("p", [1e-40, 1e-6, 0.04, 0.5, 0.9])
def test_equal_pvalues_return_that_pvalue(p):
    # Source: Liu & Xie (2020): with equal p-values T / sum w = tan((1/2 - p) pi) whatever the
    # weights, so the combined p-value equals p.
    weights = np.array([0.1, 0.2, 0.3, 0.4])
    _, combined = cauchy_combination(np.full(4, p), weights)
    assert combined == pytest.approx(p, rel=1e-9)


def test_known_value_by_the_formula():
    # Source: Liu & Xie (2020), definition of T and its p-value, evaluated by hand with math:
    # p = (0.01, 0.5), equal weights 1/2: T = tan(0.49 pi)/2 = 15.9102579...
    statistic, combined = cauchy_combination(np.array([0.01, 0.5]))
    expected_t = 0.5 * math.tan(0.49 * math.pi)
    assert float(statistic) == pytest.approx(expected_t, rel=1e-12)
    assert float(combined) == pytest.approx(0.5 - math.atan(expected_t) / math.pi, rel=1e-12)
    # 1/2 - arctan(x)/pi = arctan(1/x)/pi = 0.0627.../pi (hand computation)
    assert float(combined) == pytest.approx(0.019980, abs=5e-6)


def test_pvalue_is_the_cauchy_survival_function():
    # Source: Liu & Xie (2020): p = P(C > T / sum w) for C standard Cauchy; compared with
    # scipy.stats.cauchy.sf.
    rng = np.random.default_rng(11)
    pvalues = rng.random((50, 6)) ** 3
    weights = rng.random((50, 6))
    statistic, combined = cauchy_combination(pvalues, weights)
    reference = stats.cauchy.sf(statistic / weights.sum(axis=1))
    np.testing.assert_allclose(combined, reference, rtol=1e-10, atol=1e-15)


def test_exact_uniform_under_independence():
    # Source: a weighted sum of independent standard Cauchy variables with weights summing to 1
    # is standard Cauchy (stable law; Feller 1971, vol. II, ch. VI.1), so under independence the
    # combined p-value is exactly uniform (Liu & Xie 2020). 40000 rows: binomial SE of the
    # empirical cdf at u is sqrt(u (1 - u) / 40000); 5 SE tolerance, fixed seed.
    rng = np.random.default_rng(2024)
    _, combined = cauchy_combination(rng.random((40000, 5)))
    for u in (0.001, 0.01, 0.05, 0.2, 0.5, 0.9):
        se = math.sqrt(u * (1 - u) / combined.size)
        assert abs(np.mean(combined <= u) - u) < 5 * se


def test_tiny_pvalues_combine_like_a_weighted_harmonic_mean():
    # Derived from the formula: tan((1/2 - p) pi) ~ 1/(p pi) and 1/2 - arctan(x)/pi ~ 1/(x pi)
    # for small p and large x, so p ~ sum w / sum (w_j / p_j) (Liu & Xie 2020 note the same tail).
    pvalues = np.array([1e-200, 4e-200, 2e-199])
    weights = np.array([0.5, 0.25, 0.25])
    _, combined = cauchy_combination(pvalues, weights)
    assert float(combined) == pytest.approx(1.0 / np.sum(weights / pvalues), rel=1e-9)
    # Below ~5.6e-309, 1/(p pi) exceeds the largest double: +inf, and the combination gives 0.
    assert cauchy_transform(np.array([1e-320]))[0] == np.inf
    assert float(cauchy_combination(np.array([1e-320, 0.5]))[1]) == 0.0


def test_extreme_pvalues_stay_defined():
    # common practice: p = 0 gives an infinite statistic and combined p 0; p = 1 is finite.
    statistic, combined = cauchy_combination(np.array([[0.0, 1.0], [1.0, 1.0], [0.0, 0.3]]))
    assert not np.isnan(statistic).any()
    np.testing.assert_allclose(combined, [0.0, 1.0, 0.0], atol=1e-15)


def test_vectorised_along_any_axis_with_zero_weights_skipping_entries():
    rng = np.random.default_rng(5)
    pvalues = rng.random((4, 3, 7))
    stat_last, p_last = cauchy_combination(pvalues, axis=-1)
    stat_first, p_first = cauchy_combination(np.moveaxis(pvalues, -1, 0), axis=0)
    np.testing.assert_allclose(stat_last, stat_first)
    np.testing.assert_allclose(p_last, p_first)
    weights = np.ones((4, 3, 7))
    weights[..., 0] = 0.0
    masked = pvalues.copy()
    masked[..., 0] = np.nan
    _, p_masked = cauchy_combination(np.where(weights > 0, masked, 0.5), weights)
    _, p_dropped = cauchy_combination(pvalues[..., 1:])
    np.testing.assert_allclose(p_masked, p_dropped)


def test_nan_propagates_and_bad_input_is_rejected():
    _, combined = cauchy_combination(np.array([0.1, np.nan]))
    assert np.isnan(combined)
    with pytest.raises(ValueError):
        cauchy_combination(np.array([0.1, 1.2]))
    with pytest.raises(ValueError):
        cauchy_combination(np.array([0.1, 0.2]), np.array([1.0, -1.0]))
