"""Cauchy combination test (Liu & Xie 2020, J. Am. Stat. Assoc. 115(529):393-402)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from driftscreen.statistics.combination import cauchy_combination, cauchy_transform


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
