"""The discrete Wright-Fisher reference, and the exact simulator checked against it.

External references: the haploid Wright-Fisher model with immigration and its
diffusion limit theta = 2 N m, tau = generations / N (Ewens 2004, Mathematical
Population Genetics I, from memory), multinomial sampling moments, the
Dirichlet-multinomial moments (Mosimann 1962, Biometrika 49:65, and
scipy.stats.dirichlet_multinomial), and scipy.stats two-sample Kolmogorov-Smirnov.
Monte Carlo comparisons use fixed seeds and two-sample z-scores bounded by 4.5
(standard errors from the samples themselves).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from driftscreen.dataset import Design
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.neutral.wright_fisher import (
    dirichlet_multinomial_reads,
    simulate_wright_fisher,
    wright_fisher_compositions,
    wright_fisher_for,
)

Z_BOUND = 4.5
P3 = np.array([0.5, 0.3, 0.2])
TIMES = np.array([0.0, 0.5, 1.3, 2.0, 2.4, 3.9, 5.0, 6.1])
DEPTHS = np.array([800, 1200, 1000, 900, 1500, 1000, 700, 1100])
POPULATION = 2000


def mean_and_se(values: np.ndarray) -> tuple[float, float]:
    return float(values.mean()), float(values.std(ddof=1) / np.sqrt(values.size))


def variance_and_se(values: np.ndarray) -> tuple[float, float]:
    centred = values - values.mean()
    variance = np.mean(centred ** 2)
    return float(values.var(ddof=1)), float(np.sqrt((np.mean(centred ** 4) - variance ** 2)
                                                    / values.size))


def covariance_and_se(a: np.ndarray, b: np.ndarray) -> tuple[float, float]:
    products = (a - a.mean()) * (b - b.mean())
    return float(products.sum() / (a.size - 1)), float(products.std(ddof=1) / np.sqrt(a.size))


def two_sample_z(first: tuple[float, float], second: tuple[float, float]) -> float:
    return (first[0] - second[0]) / np.hypot(first[1], second[1])


def comparison_z_scores(exact: np.ndarray, discrete: np.ndarray) -> list[float]:
    """Two-sample z of means, variances and lag-1 / lag-5 autocovariances of proportions.

    Autocovariances (with the variances) carry the lag-1 / lag-5 autocorrelations and have
    simple standard errors (sd of the centred products / sqrt(R)).
    """
    ye, yd = exact / DEPTHS[None, :, None], discrete / DEPTHS[None, :, None]
    scores = []
    for t, i in itertools.product(range(TIMES.size), range(P3.size)):
        scores.append(two_sample_z(mean_and_se(ye[:, t, i]), mean_and_se(yd[:, t, i])))
        scores.append(two_sample_z(variance_and_se(ye[:, t, i]), variance_and_se(yd[:, t, i])))
    for lag in (1, 5):
        for t, i in itertools.product(range(TIMES.size - lag), range(P3.size)):
            scores.append(two_sample_z(covariance_and_se(ye[:, t, i], ye[:, t + lag, i]),
                                       covariance_and_se(yd[:, t, i], yd[:, t + lag, i])))
    return scores


@pytest.fixture(scope="module")
def model_and_design():
    return NeutralModel(P3, 10.0, 0.5), Design(depths=DEPTHS, times=TIMES)


@pytest.fixture(scope="module")
def discrete_counts(model_and_design):
    model, design = model_and_design
    settings = wright_fisher_for(model, design, POPULATION)
    return simulate_wright_fisher(**settings, n_replicates=10_000,
                                  rng=np.random.default_rng(31))


def test_settings_match_the_diffusion_scaling(model_and_design):
    # Source: theta = 2 N m and tau = generations / N for the haploid Wright-Fisher model.
    model, design = model_and_design
    settings = wright_fisher_for(model, design, POPULATION)
    assert settings["immigration"] == pytest.approx(model.theta / (2 * POPULATION))
    np.testing.assert_array_equal(settings["generations_at"],
                                  np.rint(model.kappa * TIMES * POPULATION).astype(int))
    np.testing.assert_array_equal(settings["depths"], DEPTHS)
    with pytest.raises(ValueError):
        wright_fisher_for(model, design, 4)  # m = theta / 2N > 1
    with pytest.raises(ValueError):
        wright_fisher_for(model, design, 5)  # two samples in one generation
    with pytest.raises(ValueError):
        wright_fisher_for(NeutralModel(P3, 10.0), Design(depths=DEPTHS), POPULATION)


def test_one_generation_has_wright_fisher_moments():
    # Source: one Wright-Fisher generation is Multinomial(N, q), q = (1-m) x + m p, and a
    # sample of depth n from it has mean q_i and variance q_i(1-q_i)[1/N + (1-1/N)/n]
    # (law of total variance over two multinomial stages; Ewens 2004 for the first).
    x = np.array([0.9, 0.1, 0.0])
    population, immigration, depth = 50, 0.2, 40
    counts = simulate_wright_fisher(P3, population, immigration, np.array([1]),
                                    np.array([depth]), 200_000, np.random.default_rng(32),
                                    start=x)[:, 0] / depth
    q = (1 - immigration) * x + immigration * P3
    for i in range(3):
        expected_var = q[i] * (1 - q[i]) * (1 / population + (1 - 1 / population) / depth)
        mean, se = mean_and_se(counts[:, i])
        assert abs(mean - q[i]) < Z_BOUND * se
        var, se = variance_and_se(counts[:, i])
        assert abs(var - expected_var) < Z_BOUND * se


def test_stationary_variance_of_the_discrete_chain():
    # Source: the recursion Var' = (1-m)^2 Var (1 - 1/N) + q-part gives the exact
    # stationary variance p(1-p) / (N [1 - (1-m)^2 (1-1/N)]) of the discrete chain
    # (Ewens 2004, from memory); sampled at depth n, add E[x(1-x)]/n.
    population, immigration, depth = 200, 0.05, 50
    generations = np.array([0, 300])
    counts = simulate_wright_fisher(P3, population, immigration, generations,
                                    np.array([depth, depth]), 20_000,
                                    np.random.default_rng(33))[:, 1] / depth
    chain_var = P3 * (1 - P3) / (population * (1 - (1 - immigration) ** 2
                                               * (1 - 1 / population)))
    expected = chain_var + (P3 * (1 - P3) - chain_var) / depth
    for i in range(3):
        var, se = variance_and_se(counts[:, i])
        assert abs(var - expected[i]) < Z_BOUND * se


@pytest.mark.slow
def test_exact_simulator_agrees_with_discrete_wright_fisher(model_and_design, discrete_counts):
    model, design = model_and_design
    exact = simulate(model, design, 40_000, 34)
    scores = comparison_z_scores(exact, discrete_counts)
    assert max(abs(z) for z in scores) < Z_BOUND
    # one taxon at one time: two-sample KS on counts (conservative with ties)
    for t, i in ((3, 2), (7, 0)):
        assert stats.ks_2samp(exact[:, t, i], discrete_counts[:, t, i]).pvalue > 1e-3


@pytest.mark.slow
def test_wright_fisher_comparison_can_fail(model_and_design, discrete_counts):
    # the same comparison notices a 30% error in the relaxation rate
    model, design = model_and_design
    wrong = simulate(NeutralModel(model.p, model.theta, 1.3 * model.rate), design, 40_000, 35)
    assert max(abs(z) for z in comparison_z_scores(wrong, discrete_counts)) > Z_BOUND


def test_start_composition_and_shapes():
    counts = simulate_wright_fisher(P3, 100, 0.1, np.array([0, 0, 5]), np.array([10, 20, 30]),
                                    7, np.random.default_rng(36), start=np.array([0, 1.0, 0]))
    assert counts.shape == (7, 3, 3) and counts.dtype == np.int64
    np.testing.assert_array_equal(counts.sum(axis=2), np.tile([10, 20, 30], (7, 1)))
    assert np.all(counts[:, :2, 1] == [10, 20])
    with pytest.raises(ValueError):
        simulate_wright_fisher(P3, 100, 0.1, np.array([3, 1]), np.array([10, 10]), 2,
                               np.random.default_rng(0))


def dirichlet_multinomial_z_scores(counts: np.ndarray, depth: int, x: np.ndarray,
                                   precision: float) -> list[float]:
    """z of counts' means, variances and the (0, 1) covariance against DM(depth, C x).

    Source: Mosimann 1962 (Biometrika 49:65): E N_i = n x_i, Var N_i = n x_i (1 - x_i)
    (n + C) / (1 + C), Cov(N_i, N_j) = -n x_i x_j (n + C) / (1 + C); the same values come
    from scipy.stats.dirichlet_multinomial (checked in the test below).
    """
    inflation = 1.0 if np.isinf(precision) else (depth + precision) / (1.0 + precision)
    scores = []
    for i in range(x.size):
        mean = mean_and_se(counts[:, i])
        scores.append((mean[0] - depth * x[i]) / mean[1])
        var = variance_and_se(counts[:, i])
        scores.append((var[0] - depth * x[i] * (1 - x[i]) * inflation) / var[1])
    cov = covariance_and_se(counts[:, 0], counts[:, 1])
    scores.append((cov[0] + depth * x[0] * x[1] * inflation) / cov[1])
    return scores


def test_dirichlet_multinomial_reads_have_mosimann_moments():
    depth, precision = 200, 50.0
    counts = simulate_wright_fisher(P3, 1000, 0.1, np.array([0]), np.array([depth]), 100_000,
                                    np.random.default_rng(37), start=P3,
                                    read_precision=precision)[:, 0]
    inflation = (depth + precision) / (1 + precision)  # the formulas above agree with scipy's
    np.testing.assert_allclose(stats.dirichlet_multinomial.var(precision * P3, depth),
                               depth * P3 * (1 - P3) * inflation)
    np.testing.assert_allclose(stats.dirichlet_multinomial.cov(precision * P3, depth)[0, 1],
                               -depth * P3[0] * P3[1] * inflation)
    assert max(abs(z) for z in dirichlet_multinomial_z_scores(counts, depth, P3,
                                                              precision)) < Z_BOUND
    # the check can fail: the same reads are far from multinomial or from C = 100
    for wrong in (np.inf, 100.0):
        scores = dirichlet_multinomial_z_scores(counts, depth, P3, wrong)
        assert max(abs(z) for z in scores) > Z_BOUND


def test_dirichlet_multinomial_reads_broadcast_depths_and_keep_zeros():
    composition = np.array([[0.5, 0.5, 0.0], [0.0, 0.2, 0.8]])
    counts = dirichlet_multinomial_reads(np.broadcast_to(composition, (4, 2, 3)),
                                         np.array([10, 30]), 20.0, np.random.default_rng(38))
    assert counts.shape == (4, 2, 3) and counts.dtype == np.int64
    np.testing.assert_array_equal(counts.sum(axis=2), np.tile([10, 30], (4, 1)))
    assert np.all(counts[:, 0, 2] == 0) and np.all(counts[:, 1, 0] == 0)
    with pytest.raises(ValueError):
        dirichlet_multinomial_reads(composition, 10, 0.0, np.random.default_rng(0))


def test_disturbance_acts_just_before_the_first_sample():
    # Source: one generation maps E[x] to (1 - m) E[x] + m p (the mean of the multinomial
    # offspring law), so g generations after x0 the mean is p + (1 - m)^g (x0 - p).
    population, immigration = 200, 0.2
    seen = []

    def to_fixed(composition: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        seen.append(composition.copy())
        return np.broadcast_to([0.1, 0.1, 0.8], composition.shape)

    start, disturbed = np.array([1.0, 0.0, 0.0]), np.array([0.1, 0.1, 0.8])
    compositions = wright_fisher_compositions(P3, population, immigration,
                                              np.array([5, 6, 10]), 20_000,
                                              np.random.default_rng(39), start=start,
                                              disturb=to_fixed)
    assert compositions.shape == (20_000, 3, 3) and len(seen) == 1
    np.testing.assert_array_equal(compositions[:, 0], np.broadcast_to(disturbed, (20_000, 3)))
    for generations, before, values in ((5, start, seen[0]), (1, disturbed, compositions[:, 1]),
                                        (5, disturbed, compositions[:, 2])):
        expected = P3 + (1 - immigration) ** generations * (before - P3)
        for i in range(3):
            mean, se = mean_and_se(values[:, i])
            assert abs(mean - expected[i]) < Z_BOUND * se
    np.testing.assert_allclose(compositions * population, np.rint(compositions * population),
                               atol=1e-9)  # whole individuals


def test_disturbance_output_is_checked():
    def negative(composition: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        return composition - 1.0

    def wrong_shape(composition: np.ndarray, rng: np.random.Generator) -> np.ndarray:
        return composition[:, :2]

    for disturb in (negative, wrong_shape):
        with pytest.raises(ValueError):
            simulate_wright_fisher(P3, 100, 0.1, np.array([0, 3]), np.array([10, 10]), 2,
                                   np.random.default_rng(0), disturb=disturb)
    with pytest.raises(ValueError):
        simulate_wright_fisher(P3, 100, 0.1, np.array([0, 3]), np.array([10, 10]), 2,
                               np.random.default_rng(0), read_precision=-1.0)
