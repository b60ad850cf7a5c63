"""The exact neutral simulator: transitions, stationary laws, sequencing, reproducibility.

External references (each check names its own): the transition moments of the
Wright-Fisher diffusion with immigration (moment equations of the generator; Ewens 2004,
Mathematical Population Genetics I), its Dirichlet(theta p) stationary law with Beta
marginals (Wright 1931; Ewens 2004), the beta-binomial and Dirichlet-multinomial laws of
scipy.stats, and the sampling-corrected moments of section 2 of the design note.
Monte Carlo checks use fixed seeds and a 4.5 standard-error bound (one false alarm in
~150 000 per comparison for a correct simulator).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from chi_square import pooled_chi_square_pvalue
from driftscreen.dataset import Design
from driftscreen.neutral.model import NeutralModel
from driftscreen.synthetic import metacommunity
from driftscreen.neutral.simulate import (
    MIN_START_CONCENTRATION,
    iter_simulate,
    replicates_per_block,
    sequence,
    simulate,
    simulate_abundances,
    simulate_conditioned,
    start_concentration,
    transition,
)

Z_BOUND = 4.5


def z_mean(values: np.ndarray, expected: float) -> float:
    return float((values.mean() - expected) / (values.std(ddof=1) / np.sqrt(values.size)))


def z_variance(values: np.ndarray, expected: float) -> float:
    """Sample variance against its expectation; SE from the fourth central moment."""
    centred = values - values.mean()
    variance = np.mean(centred ** 2)
    standard_error = np.sqrt((np.mean(centred ** 4) - variance ** 2) / values.size)
    return float((values.var(ddof=1) - expected) / standard_error)


def z_covariance(a: np.ndarray, b: np.ndarray, expected: float) -> float:
    products = (a - a.mean()) * (b - b.mean())
    return float((products.sum() / (a.size - 1) - expected)
                 / (products.std(ddof=1) / np.sqrt(a.size)))


def transition_moments(theta, p, x, tau):
    """Mean, variances and covariance matrix of X(tau) | x.

    Source: moment ODEs of the generator (Ewens 2004, ch. 4-5, from memory), solved in
    closed form in section 2 of the design note.
    """
    rho1, rho2 = np.exp(-theta * tau / 2), np.exp(-(1 + theta) * tau)
    d = x - p
    mean = p + d * rho1
    cov = (-np.outer(p, p) * (1 - rho2) / (1 + theta)
           - 2 * (np.outer(d, p) + np.outer(p, d)) * (rho1 - rho2) / (2 + theta)
           - np.outer(d, d) * (rho1 ** 2 - rho2))
    variance = (p * (1 - p) * (1 - rho2) / (1 + theta)
                + 2 * (1 - 2 * p) * d * (rho1 - rho2) / (2 + theta) - d ** 2 * (rho1 ** 2 - rho2))
    cov[np.diag_indices_from(cov)] = variance
    return mean, cov


P4 = np.array([0.4, 0.3, 0.2, 0.1])


@pytest.mark.parametrize("theta,tau,x", [
    (2.0, 0.3, [1.0, 0.0, 0.0, 0.0]),       # series regime, start at a vertex
    (100.0, 0.05, [0.0, 0.0, 0.5, 0.5]),    # series regime, large theta, boundary
    (10.0, 0.01, [0.0, 0.3, 0.7, 0.0]),     # corrected normal, on the boundary
    (0.5, 0.05, [0.1, 0.2, 0.3, 0.4]),      # corrected normal, small theta, interior
    (1000.0, 5e-4, [0.0, 0.0, 0.0, 1.0]),   # corrected normal, large theta, vertex
])
def test_transition_moments_match_closed_forms(theta, tau, x):
    x = np.array(x)
    rows = transition(np.tile(x, (200_000, 1)), (theta, P4), tau, np.random.default_rng(11))
    assert np.all(np.isfinite(rows))
    np.testing.assert_allclose(rows.sum(axis=1), 1.0, atol=1e-12)
    mean, cov = transition_moments(theta, P4, x, tau)
    for i in range(4):
        assert abs(z_mean(rows[:, i], mean[i])) < Z_BOUND
        assert abs(z_variance(rows[:, i], cov[i, i])) < Z_BOUND
    for i, j in itertools.combinations(range(4), 2):
        assert abs(z_covariance(rows[:, i], rows[:, j], cov[i, j])) < Z_BOUND


def test_transition_check_can_fail():
    # the same check notices a 10% error in the interval length
    x = np.array([1.0, 0.0, 0.0, 0.0])
    rows = transition(np.tile(x, (200_000, 1)), (2.0, P4), 0.33, np.random.default_rng(11))
    mean, _ = transition_moments(2.0, P4, x, 0.3)
    assert abs(z_mean(rows[:, 0], mean[0])) > 2 * Z_BOUND


def test_transition_accepts_a_model_and_one_tau_per_row():
    model = NeutralModel(P4, 10.0, 1.0)
    taus = np.repeat([0.02, 0.5], 100_000)
    x = np.array([0.0, 0.0, 1.0, 0.0])
    rows = transition(np.tile(x, (taus.size, 1)), model, taus, np.random.default_rng(12))
    for tau, part in ((0.02, rows[:100_000]), (0.5, rows[100_000:])):
        mean, cov = transition_moments(10.0, P4, x, tau)
        assert abs(z_mean(part[:, 2], mean[2])) < Z_BOUND
        assert abs(z_variance(part[:, 2], cov[2, 2])) < Z_BOUND


def sorted_chi_square_pvalue(observed: np.ndarray, expected: np.ndarray) -> float:
    """Chi-square p-value after pooling cells, sorted by expectation, to expected >= 5."""
    order = np.argsort(expected)
    return pooled_chi_square_pvalue(observed[order], expected[order])


def test_snapshot_taxon_counts_are_beta_binomial():
    # Source: stationary X ~ Dirichlet(theta p), so N_i ~ BetaBinomial(n, theta p_i,
    # theta (1 - p_i)) (scipy.stats.betabinom).
    theta, depth = 5.0, 30
    model = NeutralModel(np.array([0.5, 0.3, 0.15, 0.05]), theta)
    counts = simulate(model, Design(depths=np.full(8, depth)), 2500, 13).reshape(-1, 4)
    for i in (0, 3):
        law = stats.betabinom(depth, theta * model.p[i], theta * (1 - model.p[i]))
        observed = np.bincount(counts[:, i], minlength=depth + 1)
        expected = counts.shape[0] * law.pmf(np.arange(depth + 1))
        assert sorted_chi_square_pvalue(observed, expected) > 1e-3  # fixed seed


def test_snapshot_count_vectors_are_dirichlet_multinomial():
    # Source: scipy.stats.dirichlet_multinomial (Mosimann 1962) for the whole vector.
    theta, depth = 4.0, 6
    model = NeutralModel(np.array([0.5, 0.3, 0.2]), theta)
    counts = simulate(model, Design(depths=np.full(10, depth)), 3000, 14).reshape(-1, 3)
    vectors = [v for v in itertools.product(range(depth + 1), repeat=3) if sum(v) == depth]
    law = stats.dirichlet_multinomial(theta * model.p, depth)
    expected = counts.shape[0] * np.array([law.pmf(v) for v in vectors])
    assert expected.sum() == pytest.approx(counts.shape[0])
    index = {v: k for k, v in enumerate(vectors)}
    observed = np.bincount([index[tuple(row)] for row in counts], minlength=len(vectors))
    assert sorted_chi_square_pvalue(observed, expected) > 1e-3  # fixed seed


def test_snapshot_samples_are_independent_and_time_series_samples_are_not():
    model = NeutralModel(np.array([0.5, 0.3, 0.2]), 5.0, 0.2)
    depths = np.full(3, 200)
    snapshot = simulate(model, Design(depths=depths), 40_000, 15)
    assert abs(z_covariance(snapshot[:, 0, 0], snapshot[:, 1, 0], 0.0)) < Z_BOUND
    series = simulate(model, Design(depths=depths, times=np.array([0.0, 1.0, 2.0])), 40_000, 15)
    assert z_covariance(series[:, 0, 0], series[:, 1, 0], 0.0) > 10 * Z_BOUND


def irregular_times(n_steps: int, total: float, rng: np.random.Generator) -> np.ndarray:
    """Times with log-uniform gaps over three decades, rescaled to span ``total``."""
    gaps = np.exp(rng.uniform(np.log(1e-3), 0.0, n_steps))
    return np.concatenate([[0.0], np.cumsum(gaps / gaps.sum() * total)])


@pytest.mark.parametrize("theta,n_taxa", [(0.5, 4), (20.0, 10)])
def test_series_from_a_vertex_converges_to_beta_marginals(theta, n_taxa):
    # Source: the stationary law Dirichlet(theta p) has Beta(theta p_i, theta (1-p_i))
    # marginals (Wright 1931; Ewens 2004); after rate * span = 25 the start is forgotten.
    rng = np.random.default_rng(16)
    p = rng.dirichlet(np.full(n_taxa, 2.0))
    rate = 0.5
    model = NeutralModel(p, theta, rate)
    times = irregular_times(60, 25.0 / rate, rng)
    start = np.eye(n_taxa)[0]
    final = simulate_abundances(model, times, 10_000, rng, start=start)[:, -1]
    for i in range(n_taxa):
        law = stats.beta(theta * model.p[i], theta * (1 - model.p[i]))
        assert stats.kstest(final[:, i], law.cdf).pvalue > 1e-3  # fixed seed


def test_mean_relaxes_exponentially_from_a_fixed_start():
    # Source: E[X(t) | x] = p + (x - p) exp(-rate t) (design note section 2).
    model = NeutralModel(P4, 10.0, 0.4)
    rng = np.random.default_rng(17)
    times = np.array([0.0, 0.1, 0.35, 1.2, 1.25, 3.0, 7.5])
    start = np.array([0.05, 0.05, 0.1, 0.8])
    paths = simulate_abundances(model, times, 20_000, rng, start=start)
    for t, time in enumerate(times):
        expected = P4 + (start - P4) * np.exp(-model.rate * time)
        for i in range(4):
            if t == 0:
                assert np.all(paths[:, 0, i] == start[i])
            else:
                assert abs(z_mean(paths[:, t, i], expected[i])) < Z_BOUND


def test_conditional_mean_reversion_at_stationarity():
    # Source: E[X(t+s) | X(t)] - p = (X(t) - p) exp(-rate s) (design note section 2): the
    # regression slope of X(t+s) on X(t) is exp(-rate s); sandwich standard error.
    model = NeutralModel(P4, 10.0, 0.4)
    times = np.array([0.0, 0.7, 2.2])
    paths = simulate_abundances(model, times, 40_000, np.random.default_rng(18))
    for t in (1, 2):
        for i in range(4):
            x = paths[:, 0, i] - paths[:, 0, i].mean()
            y = paths[:, t, i]
            slope = np.dot(x, y) / np.dot(x, x)
            residual = y - y.mean() - slope * x
            standard_error = np.sqrt(np.sum(x ** 2 * residual ** 2)) / np.dot(x, x)
            assert abs(slope - np.exp(-model.rate * times[t])) < Z_BOUND * standard_error


def test_sequenced_moments_at_stationarity():
    # Source: design note section 2: Var Y_it = pi_i [v + (1-v)/n_t],
    # Cov(Y_is, Y_it) = pi_i v exp(-rate |s - t|), Cov(Y_is, Y_jt) = -p_i p_j v exp(...)
    # for s != t, with v = 1/(1+theta) (Ewens 2004 moments plus multinomial sampling).
    theta, rate = 10.0, 0.5
    model = NeutralModel(P4, theta, rate)
    times = np.array([0.0, 0.3, 0.5, 1.7, 2.0, 4.5])
    depths = np.array([50, 500, 5000, 50, 500, 5000])
    counts = simulate(model, Design(depths=depths, times=times), 40_000, 19)
    y = counts / depths[None, :, None]
    v = 1.0 / (1.0 + theta)
    pi = P4 * (1 - P4)
    for t, i in itertools.product(range(6), range(4)):
        assert abs(z_mean(y[:, t, i], P4[i])) < Z_BOUND
        assert abs(z_variance(y[:, t, i], pi[i] * (v + (1 - v) / depths[t]))) < Z_BOUND
    for s, t in itertools.combinations(range(6), 2):
        decay = np.exp(-rate * (times[t] - times[s]))
        for i in range(4):
            assert abs(z_covariance(y[:, s, i], y[:, t, i], pi[i] * v * decay)) < Z_BOUND
        assert abs(z_covariance(y[:, s, 0], y[:, t, 1], -P4[0] * P4[1] * v * decay)) < Z_BOUND


@pytest.mark.slow
def test_rare_taxa_keep_their_stationary_law_through_many_steps():
    # Tiny shapes theta p_i + L_i: transitions from the stationary law must keep it.
    # Pooled: E sum_i (X_i - p_i)^2 = (1 - sum p^2)/(theta + 1); tails of rare taxa:
    # P(X_i > q) from scipy.stats.beta (design note section 3c, where per-taxon variance
    # checks are unreliable for shapes << 1).
    rng = np.random.default_rng(20)
    theta, n_taxa = 50.0, 100
    p = rng.lognormal(0.0, 2.5, n_taxa)
    p /= p.sum()
    model = NeutralModel(p, theta, 0.3)
    times = irregular_times(30, 10.0, rng)
    final = simulate_abundances(model, times, 4000, rng)[:, -1]
    assert np.all(np.isfinite(final)) and np.all(final >= 0)
    np.testing.assert_allclose(final.sum(axis=1), 1.0, atol=1e-12)
    pooled = np.sum((final - p) ** 2, axis=1) / ((1 - np.sum(p ** 2)) / (theta + 1))
    assert abs(z_mean(pooled, 1.0)) < Z_BOUND
    rare = theta * p < 0.05
    assert rare.sum() >= 10
    for q in (1e-12, 1e-6, 1e-3):
        tails = stats.beta(theta * p[rare], theta * (1 - p[rare])).sf(q)
        expected = final.shape[0] * tails.sum()
        observed = np.sum(final[:, rare] > q)
        # Poisson-binomial SE; taxa within a replicate are nearly independent when rare
        standard_error = np.sqrt(final.shape[0] * np.sum(tails * (1 - tails)))
        assert abs(observed - expected) < Z_BOUND * standard_error


def test_counts_shapes_dtypes_and_depths():
    model = NeutralModel(P4, 3.0, 1.0)
    depths = np.array([10, 1, 1000])
    for times in (None, np.array([0.0, 0.5, 4.0])):
        counts = simulate(model, Design(depths=depths, times=times), 7, 21)
        assert counts.shape == (7, 3, 4) and counts.dtype == np.int64
        assert np.all(counts >= 0)
        np.testing.assert_array_equal(counts.sum(axis=2), np.tile(depths, (7, 1)))


def test_tiny_theta_long_gaps_give_valid_counts():
    # theta < 1 and long gaps: A = 0 is common, rows of tiny shapes use the log-space route
    model = NeutralModel(np.array([0.9, 0.0999, 1e-4, 1e-8]), 0.01, 2.0)
    design = Design(depths=np.full(20, 100), times=np.arange(20) * 5.0)
    counts = simulate(model, design, 500, 22)
    np.testing.assert_array_equal(counts.sum(axis=2), 100)
    paths = simulate_abundances(model, design.times, 500, 22)
    assert np.all(np.isfinite(paths))
    np.testing.assert_allclose(paths.sum(axis=2), 1.0, atol=1e-12)


def small_case():
    model = NeutralModel(np.linspace(1.0, 2.0, 100), 30.0, 0.5)
    design = Design(depths=np.arange(5) * 100 + 50, times=np.array([0.0, 1.0, 1.5, 4.0, 4.1]))
    return model, design


def test_same_seed_same_output_and_chunking_does_not_matter():
    model, design = small_case()
    block = replicates_per_block(model.n_taxa, design.n_samples)
    n_replicates = 2 * block + 17
    reference = simulate(model, design, n_replicates, 23)
    np.testing.assert_array_equal(reference, simulate(model, design, n_replicates,
                                                      np.random.default_rng(23)))
    assert not np.array_equal(reference, simulate(model, design, n_replicates, 24))
    for chunk_size in (1, 7, block - 1, block, block + 1, n_replicates, n_replicates + 5):
        chunks = list(iter_simulate(model, design, n_replicates, 23, chunk_size=chunk_size))
        assert all(c.shape[0] == min(chunk_size, n_replicates) for c in chunks[:-1])
        np.testing.assert_array_equal(np.concatenate(chunks), reference)
    # a full block does not depend on how many replicates follow it
    np.testing.assert_array_equal(simulate(model, design, block, 23), reference[:block])


def test_random_sources_are_accepted_and_consumed():
    model, design = small_case()
    from_sequence = simulate(model, design, 3, np.random.SeedSequence(5))
    np.testing.assert_array_equal(from_sequence, simulate(model, design, 3,
                                                          np.random.SeedSequence(5)))
    rng = np.random.default_rng(6)
    first, second = simulate(model, design, 3, rng), simulate(model, design, 3, rng)
    assert not np.array_equal(first, second)


def test_given_start_is_the_first_composition():
    model = NeutralModel(P4, 10.0, 1.0)
    design = Design(depths=np.array([100, 100]), times=np.array([0.0, 1.0]))
    counts = simulate(model, design, 50, 25, start=np.array([0.0, 0.0, 1.0, 0.0]))
    assert np.all(counts[:, 0, 2] == 100)
    starts = np.tile(np.eye(4), (5, 1))
    counts = simulate(model, design, 20, 25, start=starts)
    np.testing.assert_array_equal(counts[:, 0].argmax(axis=1), np.tile(np.arange(4), 5))
    assert np.all(counts[:, 0].max(axis=1) == 100)


def test_invalid_requests_are_rejected():
    model = NeutralModel(P4, 10.0, 1.0)
    snapshot = Design(depths=np.array([10, 10]))
    series = Design(depths=np.array([10, 10]), times=np.array([0.0, 1.0]))
    with pytest.raises(ValueError):
        simulate(NeutralModel(P4, 10.0), series, 3, 1)
    with pytest.raises(ValueError):
        simulate(model, snapshot, 3, 1, start=P4)
    with pytest.raises(ValueError):
        simulate(model, series, 3, 1, start=np.ones(3))
    with pytest.raises(ValueError):
        simulate(model, series, 3, 1, start=np.ones((2, 4)))
    with pytest.raises(ValueError):
        simulate(model, series, 0, 1)
    with pytest.raises(ValueError):
        list(iter_simulate(model, series, 3, 1, chunk_size=0))


def test_noisy_reads_have_the_dirichlet_multinomial_moments():
    # Source: Mosimann (1962), Biometrika 49:65, Dirichlet-multinomial moments
    # Var N_i = n p_i (1 - p_i)(n + C)/(1 + C), Cov N_i N_j = -n p_i p_j (n + C)/(1 + C);
    # the values are taken from scipy.stats.dirichlet_multinomial with alpha = C x.
    x = np.array([0.5, 0.3, 0.15, 0.05])
    precision, depth = 300.0, 2000
    counts = sequence(depth, np.broadcast_to(x, (60_000, 4)), precision,
                      np.random.default_rng(17))
    reference = stats.dirichlet_multinomial(precision * x, depth)
    for i in range(4):
        assert abs(z_mean(counts[:, i], reference.mean()[i])) < Z_BOUND
        assert abs(z_variance(counts[:, i], reference.var()[i])) < Z_BOUND
    covariance = np.cov(counts[:, 0], counts[:, 1])[0, 1]
    assert covariance == pytest.approx(reference.cov()[0, 1], rel=0.05)
    assert np.array_equal(counts.sum(axis=1), np.full(60_000, depth))


def test_technical_noise_adds_the_same_nugget_to_every_pair():
    # Source: for two independent reads of one community x, Var(Y_1 - Y_2) = Var Y_1 + Var Y_2
    # (independence; textbook), with Var Y = x (1 - x)(g + (1 - g)/n) (Mosimann 1962,
    # g = 1/(1 + C)); after the multinomial correction Y (1 - Y)/(n - 1), unbiased for
    # x (1 - x)(1 - g)/n, the expected squared difference is 2 g x (1 - x) whatever the depths.
    x = np.array([0.6, 0.25, 0.1, 0.05])
    precision = 200.0
    g = 1.0 / (1.0 + precision)
    rng = np.random.default_rng(4)
    rows = np.broadcast_to(x, (100_000, 4))
    first, second = (sequence(n, rows, precision, rng) / n for n in (500, 5000))
    corrected = ((first - second) ** 2 - first * (1 - first) / 499
                 - second * (1 - second) / 4999).sum(axis=1)
    assert abs(z_mean(corrected, 2 * g * np.sum(x * (1 - x)))) < Z_BOUND


def test_mean_relaxes_from_the_start_at_the_shared_rate():
    # Source: the first moment of the Wright-Fisher diffusion with immigration,
    # E[X_i(t) | x_0] = p_i + (x_0i - p_i) exp(-rate t) (generator moment equation; Ewens
    # 2004, Mathematical Population Genetics I, ch. 5; design note section 2).
    p = np.array([0.4, 0.3, 0.2, 0.1])
    start = np.array([0.04, 0.03, 0.53, 0.40])          # the two most abundant cut to a tenth
    model = NeutralModel(p, 50.0, 0.3)
    times = np.array([0.0, 1.0, 3.0, 8.0])
    paths = simulate_abundances(model, times, 40_000, np.random.default_rng(12), start=start)
    for t, time in enumerate(times[1:], start=1):
        expected = p + (start - p) * np.exp(-0.3 * time)
        for i in range(4):
            assert abs(z_mean(paths[:, t, i], expected[i])) < Z_BOUND


def test_conditioned_replicates_keep_the_first_sample_and_relax_from_it():
    # The posterior of the first community given its reads is Dirichlet(theta p + N_0)
    # (Dirichlet-multinomial conjugacy, e.g. Gelman et al. 2013, Bayesian Data Analysis,
    # sec. 3.4), so replicates start near the observed composition and their mean relaxes as
    # p + (x_0 - p) exp(-rate t) (Ewens 2004).
    p = np.array([0.4, 0.3, 0.2, 0.1])
    design = Design(np.full(6, 20_000), np.array([0.0, 0.5, 1.0, 2.0, 4.0, 8.0]))
    first = np.array([800, 600, 10_600, 8_000])
    model = NeutralModel(p, 50.0, 0.3)
    counts = simulate_conditioned(model, design, 4000, first, np.random.default_rng(2))
    assert np.all(counts[:, 0] == first)
    start = first / first.sum()
    for t in range(1, 6):
        observed = counts[:, t] / design.depths[t]
        expected = p + (start - p) * np.exp(-0.3 * design.times[t])
        # the posterior mean is (theta p + N_0)/(theta + n): 0.25% from the observed start
        np.testing.assert_allclose(observed.mean(axis=0), expected, atol=0.01)


def test_start_concentration_recovers_the_spread_of_a_disturbed_start():
    # Dirichlet-multinomial moments (Mosimann 1962, Biometrika 49:65): reads of depth n from
    # Dirichlet(kappa p) have Var(Y_i) = p_i (1 - p_i) (n + kappa) / (n (kappa + 1)), so the
    # method-of-moments kappa of single first samples centres on the true one.
    rng = np.random.default_rng(5)
    p = metacommunity(60, rng)
    model = NeutralModel(p, 500.0, 0.2)
    estimates = []
    for _ in range(400):
        start = rng.dirichlet(20.0 * p)
        estimates.append(start_concentration(model, rng.multinomial(5_000, start)))
    assert 17.0 < np.median(estimates) < 23.5


def test_start_concentration_is_theta_for_a_stationary_start_and_bounded():
    rng = np.random.default_rng(6)
    p = metacommunity(40, rng)
    model = NeutralModel(p, 200.0, 0.2)
    estimates = np.array([start_concentration(model, rng.multinomial(2_000, rng.dirichlet(200.0 * p)))
                          for _ in range(400)])
    assert np.all((estimates >= MIN_START_CONCENTRATION) & (estimates <= 200.0))
    assert np.mean(estimates == 200.0) > 0.9
    far = np.zeros(40, dtype=np.int64)
    far[0] = 2_000
    assert start_concentration(model, far) == MIN_START_CONCENTRATION


def test_conditioning_needs_a_time_series_and_a_matching_first_sample():
    model = NeutralModel(np.array([0.5, 0.5]), 10.0, 0.5)
    with pytest.raises(ValueError):
        simulate_conditioned(model, Design(np.full(3, 10)), 2, np.array([5, 5]), 1)
    with pytest.raises(ValueError):
        simulate_conditioned(model, Design(np.full(3, 10), np.arange(3.0)), 2,
                             np.array([5, 4]), 1)
