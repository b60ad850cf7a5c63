"""Dirichlet rows with per-row shapes, including tiny shapes.

External references: the gamma law (scipy.special.gammainc is its cdf), scipy.stats.beta
for Dirichlet marginals (aggregation property; Kotz, Balakrishnan & Johnson 2000,
Continuous Multivariate Distributions vol. 1, ch. 49, from memory), and the
competing-exponentials limit for vanishing shapes.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import gammainc, gammaln

from driftscreen.neutral.dirichlet import dirichlet_rows, log_standard_gamma


def log_gamma_cdf(y: np.ndarray, shape: float) -> np.ndarray:
    """Exact cdf of log G, G ~ Gamma(shape): P(G <= e^y) = P(shape, e^y).

    Source: regularised lower incomplete gamma (Abramowitz & Stegun 1964, 6.5.1; equation
    numbers from memory). Below y = -50 it is x^a / Gamma(a + 1) (1 - a x / (a + 1) + ...),
    x = e^y (its power series, A&S 6.5.29), so it is computed in logs without underflow.
    """
    y = np.asarray(y, dtype=np.float64)
    small = y < -50.0
    out = np.empty_like(y)
    out[~small] = gammainc(shape, np.exp(y[~small]))
    out[small] = np.exp(shape * y[small] - gammaln(shape + 1.0))
    return out


@pytest.mark.parametrize("shape", [1e-2, 1e-3, 1e-4, 1e-5, 1e-6])
def test_log_space_gamma_follows_the_exact_law(shape):
    draws = log_standard_gamma(np.full(20_000, shape), np.random.default_rng(2000))
    assert np.all(np.isfinite(draws))
    # fixed seed; p > 1e-3 fails one time in 1000 for a correct sampler
    assert stats.kstest(draws, log_gamma_cdf, args=(shape,)).pvalue > 1e-3
    # the naive route underflows: numpy returns exact zeros for a large share of draws
    if shape <= 1e-3:
        zeros = np.mean(np.random.default_rng(1).standard_gamma(np.full(20_000, shape)) == 0)
        assert zeros > 0.4  # design note section 4: 0.49 at a = 1e-3, 0.93 at 1e-4


def test_log_space_check_can_fail():
    # the same KS check rejects draws of the wrong shape (1.2e-4 tested as 1e-4)
    draws = log_standard_gamma(np.full(20_000, 1.2e-4), np.random.default_rng(3))
    assert stats.kstest(draws, log_gamma_cdf, args=(1e-4,)).pvalue < 1e-6


def test_all_tiny_rows_are_valid_and_pick_a_vertex_by_shape():
    # As all shapes -> 0, log G_i ~ -E_i / a_i (E_i exponential), so the row's mass goes to
    # one vertex, chosen with probability a_i / sum a (competing exponentials; e.g. Ross,
    # Introduction to Probability Models, ch. 5; from memory).
    shapes = 1e-4 * np.array([0.5, 0.3, 0.2])
    rows = dirichlet_rows(np.tile(shapes, (100_000, 1)), np.random.default_rng(4))
    assert not np.isnan(rows).any()
    np.testing.assert_allclose(rows.sum(axis=1), 1.0, atol=1e-12)
    assert np.mean(rows.max(axis=1) > 0.999) > 0.999
    winners = np.bincount(rows.argmax(axis=1), minlength=3) / rows.shape[0]
    limit = shapes / shapes.sum()
    standard_error = np.sqrt(limit * (1 - limit) / rows.shape[0])
    assert np.all(np.abs(winners - limit) < 4.5 * standard_error)  # 4.5 binomial SE


def test_zero_shapes_give_exact_zeros_on_both_routes():
    alpha = np.array([[0.0, 2.0, 3.0],      # plain gamma route (total >= 1)
                      [0.0, 1e-3, 0.4],     # log-space route (total < 1)
                      [5.0, 0.0, 0.0]])
    rows = dirichlet_rows(np.repeat(alpha, 1000, axis=0), np.random.default_rng(5))
    assert np.all(rows[:2000, 0] == 0.0)
    assert np.all(rows[2000:, 1:] == 0.0) and np.all(rows[2000:, 0] == 1.0)
    assert np.all(rows[:2000, 1:].sum(axis=1) > 0)


@pytest.mark.parametrize("alpha", [(2.0, 3.0, 5.0), (0.3, 0.2, 0.1), (0.05, 0.9, 0.02)])
def test_marginals_are_beta(alpha):
    # Source: Dirichlet(alpha) has X_1 ~ Beta(alpha_1, sum alpha - alpha_1) (aggregation).
    # Each component is tested through whichever of X_i and 1 - X_i (= the sum of the
    # others) is small, since float64 cannot resolve values within 1e-16 of 1.
    alpha = np.array(alpha)
    rows = dirichlet_rows(np.tile(alpha, (20_000, 1)), np.random.default_rng(6))
    for i in range(3):
        rest = alpha.sum() - alpha[i]
        if alpha[i] <= rest:
            values, law = rows[:, i], stats.beta(alpha[i], rest)
        else:
            values, law = np.delete(rows, i, axis=1).sum(axis=1), stats.beta(rest, alpha[i])
        assert stats.kstest(values, law.cdf).pvalue > 1e-3  # fixed seed


def test_mixed_rows_each_follow_their_own_law():
    # small-total and large-total rows interleaved in one call
    alpha = np.array([[0.2, 0.1, 0.1], [4.0, 1.0, 5.0]])
    rows = dirichlet_rows(np.tile(alpha, (10_000, 1)), np.random.default_rng(7))
    for r in range(2):
        law = stats.beta(alpha[r, 0], alpha[r].sum() - alpha[r, 0])
        assert stats.kstest(rows[r::2, 0], law.cdf).pvalue > 1e-3  # fixed seed


def test_extreme_shapes_never_give_nan_or_empty_rows():
    rng = np.random.default_rng(8)
    alpha = np.concatenate([np.full((500, 50), 1e-200), np.full((500, 50), 1e-8),
                            10.0 ** rng.uniform(-12, 3, size=(500, 50))])
    rows = dirichlet_rows(alpha, rng)
    assert np.all(np.isfinite(rows))
    assert np.all(rows.max(axis=1) > 0)
    np.testing.assert_allclose(rows.sum(axis=1), 1.0, atol=1e-12)


def test_bad_shapes_are_rejected():
    rng = np.random.default_rng(9)
    with pytest.raises(ValueError):
        dirichlet_rows(np.array([1.0, 2.0]), rng)
    with pytest.raises(ValueError):
        dirichlet_rows(np.array([[1.0, -0.1]]), rng)
    with pytest.raises(ValueError):
        dirichlet_rows(np.array([[0.0, 0.0], [1.0, 1.0]]), rng)
    with pytest.raises(ValueError):
        dirichlet_rows(np.array([[np.nan, 1.0]]), rng)
