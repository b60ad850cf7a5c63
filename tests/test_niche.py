"""Tests of the niche community simulators (driftscreen.niche).

Statistical checks use fixed seeds; KS tests require p > 1e-3 and are paired with a
check that the same sample rejects a nearby wrong law, so they can fail. Correlation
checks use tolerances of 4.5 Monte Carlo standard errors estimated from independent
batches.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.integrate import solve_ivp
from scipy.special import gammainc, gammaln

from driftscreen.dataset import Design
from driftscreen.niche import (LotkaVolterraParameters, NoisyLotkaVolterra, StochasticLogistic,
                               log_gamma, sequence_counts)


def log_gamma_cdf(shape: float, scale: float = 1.0):
    """CDF of log G for G ~ Gamma(shape, scale), accurate far into the lower tail.

    Below e^-30 the regularised incomplete gamma is x^a / Gamma(a + 1) (1 + O(x))
    (Abramowitz & Stegun 6.5.29).
    """
    def cdf(values: np.ndarray) -> np.ndarray:
        log_x = np.asarray(values) - np.log(scale)
        tail = np.exp(shape * np.minimum(log_x, 0.0) - gammaln(shape + 1.0))
        return np.where(log_x < -30.0, tail, gammainc(shape, np.exp(np.maximum(log_x, -30.0))))
    return cdf


def batch_correlation(a: np.ndarray, b: np.ndarray, n_batches: int = 20) -> tuple[float, float]:
    """Pearson correlation of paired samples and its SE from independent batches."""
    values = [np.corrcoef(x, y)[0, 1]
              for x, y in zip(np.array_split(a, n_batches), np.array_split(b, n_batches))]
    return float(np.corrcoef(a, b)[0, 1]), float(np.std(values, ddof=1) / np.sqrt(n_batches))


# ------------------------------------------------------------------ stochastic logistic


@pytest.mark.parametrize("sigma", [0.5, 1.5])
def test_logistic_relaxes_to_the_gamma_law(sigma: float) -> None:
    """Started at x = K, after 100 tau the abundance is Gamma(2/sigma - 1, scale sigma K / 2).

    (log x mixes slowly for sigma near 2: at sigma = 1.5, 30 tau is not yet enough.)

    Source: Grilli (2020) Nat. Commun. 11:4743, stationary solution of the stochastic
    logistic model (mean K (1 - sigma/2), shape 2/sigma - 1). KS vs scipy.stats.gamma.
    """
    rng = np.random.default_rng(int(10 * sigma))
    model = StochasticLogistic(n_taxa=50, strength=sigma, timescale=2.0, spread_decades=2.0)
    capacities = model.draw_capacities(100, rng)
    path = model.integrate_log(np.log(capacities), capacities, np.array([0.0, 200.0]), rng)
    scaled = np.exp(path[:, -1]).ravel() / capacities.ravel()
    shape = 2 / sigma - 1
    assert stats.kstest(scaled, stats.gamma(shape, scale=sigma / 2).cdf).pvalue > 1e-3
    # the same sample rejects the scale K sigma / (2 - sigma) (mean K instead of K(1 - sigma/2))
    assert stats.kstest(scaled, stats.gamma(shape, scale=sigma / (2 - sigma)).cdf).pvalue < 1e-6


def test_stationary_draws_are_gamma_even_for_tiny_shapes() -> None:
    """sigma = 1.95 gives shape 1/39: draws stay finite (log-space Gamma) and follow the law.

    Source: Grilli (2020), as above; log G(a) = log G(a + 1) + log(U)/a (Marsaglia & Tsang
    2000, ACM TOMS 26:363, small-shape boost).
    """
    rng = np.random.default_rng(2)
    model = StochasticLogistic(n_taxa=20, strength=1.95, spread_decades=0.0)
    log_x = model.stationary_log(np.ones((200, 20)), 5, rng)
    assert np.isfinite(log_x).all()
    shape = 2 / 1.95 - 1
    assert stats.kstest(log_x.ravel(), log_gamma_cdf(shape, 1.95 / 2)).pvalue > 1e-3
    assert stats.kstest(log_x.ravel(), log_gamma_cdf(shape, 1.95 / 0.05)).pvalue < 1e-6
    tiny = log_gamma(np.full(5000, 1e-4), rng)        # log G down to about -1e5
    assert stats.kstest(tiny, log_gamma_cdf(1e-4)).pvalue > 1e-3


def test_reciprocal_abundance_decays_at_the_exact_rate() -> None:
    """u = 1/x has linear drift: du = [-(1 - sigma) u + 1/K] dt/tau - sqrt(sigma/tau) u dW, so
    corr(u(0), u(s)) = exp(-(1 - sigma) s / tau) exactly (Ito's formula; a Pearson diffusion,
    Forman & Sorensen 2008, Scand. J. Stat. 35:438). Finite 4th moment needs sigma < 0.4.

    The linearised rate (1 - sigma/2)/tau would give a correlation 6 SE away at lag tau.
    """
    rng = np.random.default_rng(7)
    sigma, tau = 0.25, 0.5
    model = StochasticLogistic(n_taxa=10, strength=sigma, timescale=tau, spread_decades=0.0)
    lags = np.array([0.0, 0.5 * tau, tau])
    reciprocal = 1 / model.abundances(Design(np.full(3, 10), lags), 6000, rng)
    for k in (1, 2):
        corr, se = batch_correlation(reciprocal[:, 0].ravel(), reciprocal[:, k].ravel())
        assert abs(corr - np.exp(-(1 - sigma) * lags[k] / tau)) < 4.5 * se
    wrong = np.exp(-(1 - sigma / 2))
    assert abs(corr - wrong) > 4.5 * se


def test_small_noise_log_abundance_relaxes_at_the_linearised_rate() -> None:
    """At small sigma, log x is close to an Ornstein-Uhlenbeck process with rate
    (1 - sigma/2)/tau (linearise the drift (1 - sigma/2)/tau - x/(K tau) of log x at its zero;
    Gardiner, Handbook of Stochastic Methods, linear noise approximation # from memory).
    Tolerance: 4.5 SE plus 0.01 for the neglected O(sigma) terms (sigma = 0.02)."""
    rng = np.random.default_rng(8)
    sigma, tau = 0.02, 3.0
    model = StochasticLogistic(n_taxa=10, strength=sigma, timescale=tau, spread_decades=0.0)
    lags = np.array([0.0, 0.5 * tau, 1.5 * tau])
    log_x = np.log(model.abundances(Design(np.full(3, 10), lags), 4000, rng))
    for k in (1, 2):
        corr, se = batch_correlation(log_x[:, 0].ravel(), log_x[:, k].ravel())
        assert abs(corr - np.exp(-(1 - sigma / 2) * lags[k] / tau)) < 4.5 * se + 0.01


def test_logistic_without_noise_is_constant_at_capacity() -> None:
    """sigma = 0: a constant community (neutral with infinite theta plus sampling)."""
    rng = np.random.default_rng(9)
    model = StochasticLogistic(n_taxa=6, strength=0.0)
    x = model.abundances(Design(np.full(5, 100), np.arange(5.0)), 3, rng)
    np.testing.assert_allclose(x, np.broadcast_to(x[:, :1], x.shape), rtol=1e-12)


# ------------------------------------------------------------------ Lotka-Volterra


def test_lotka_volterra_without_noise_or_interactions_is_logistic_growth() -> None:
    """x(t) = K x0 e^{rt} / (K + x0 (e^{rt} - 1)).

    Source: Murray (2002) Mathematical Biology I, 3rd ed., section 1.1, logistic growth
    (Verhulst) # from memory for the section number.
    """
    growth = np.array([[0.5, 1.0, 2.0]])
    capacity = np.array([[1.0, 0.01, 0.3]])
    x0 = np.array([0.001, 0.02, 0.1])
    times = np.array([0.0, 0.3, 1.0, 2.5, 4.0, 9.0])
    params = LotkaVolterraParameters(growth, capacity, np.zeros((1, 3, 3)))
    model = NoisyLotkaVolterra(n_taxa=3, strength=0.0, noise=0.0, immigration=0.0)
    x = np.exp(model.integrate_log(np.log(x0)[None, None], params, times, np.random.default_rng(0)))
    rt = growth[0] * times[:, None]
    expected = capacity[0] * x0 * np.exp(rt) / (capacity[0] + x0 * np.expm1(rt))
    np.testing.assert_allclose(x[0, 0], expected, rtol=1e-10)


def test_lotka_volterra_matches_an_ode_solver_with_first_order_convergence() -> None:
    """Noise-free competitive gLV with immigration vs scipy's DOP853 (rtol 1e-11); the
    frozen-competition step converges at first order in the sub-step."""
    growth = np.array([[0.7, 1.5, 0.9, 1.9]])
    capacity = np.array([[1.0, 0.3, 0.05, 0.6]])
    competition = np.array([[[0, .8, .2, .5], [.3, 0, 1.2, .1], [.9, .4, 0, .7], [.2, 1.5, .3, 0]]])
    immigration, x0, times = 1e-2, np.array([0.2, 0.01, 0.04, 0.5]), np.linspace(0, 10, 11)

    def rhs(_: float, x: np.ndarray) -> np.ndarray:
        return (growth[0] * x * (1 - x / capacity[0] - competition[0] @ (x / capacity[0]))
                + immigration * growth[0] * capacity[0])

    reference = solve_ivp(rhs, (0, 10), x0, t_eval=times, rtol=1e-11, atol=1e-14,
                          method="DOP853").y.T
    params = LotkaVolterraParameters(growth, capacity, competition)
    errors = []
    for substeps in (100, 400):
        model = NoisyLotkaVolterra(n_taxa=4, noise=0.0, immigration=immigration, substeps=substeps)
        x = np.exp(model.integrate_log(np.log(x0)[None, None], params, times,
                                       np.random.default_rng(0)))[0, 0]
        errors.append(np.max(np.abs(x / reference - 1)))
    assert errors[0] < 3e-3
    assert 3.0 < errors[0] / errors[1] < 5.0


def test_lotka_volterra_without_interactions_has_the_logistic_gamma_law() -> None:
    """strength = 0: each taxon is a stochastic logistic with sigma = noise and tau = 1/r_i,
    so x_i / K_i ~ Gamma(2/noise - 1, scale noise/2) whatever r_i (Grilli 2020). Snapshot
    samples are independent runs after the burn-in."""
    rng = np.random.default_rng(11)
    noise = 0.6
    model = NoisyLotkaVolterra(n_taxa=10, strength=0.0, noise=noise, immigration=0.0)
    params_rng = np.random.default_rng(11)
    capacity = model.draw_parameters(60, params_rng).capacity
    x = model.abundances(Design(np.full(20, 10)), 60, rng)
    scaled = (x / capacity[:, None, :]).ravel()
    shape = 2 / noise - 1
    assert stats.kstest(scaled, stats.gamma(shape, scale=noise / 2).cdf).pvalue > 1e-3
    assert stats.kstest(scaled, stats.gamma(shape, scale=noise / (2 - noise)).cdf).pvalue < 1e-6


def test_competition_spreads_abundances() -> None:
    """Stronger competition lowers the typical filling x/K and spreads it (exclusion)."""
    design = Design(np.full(10, 10), None)
    fillings = []
    for strength in (0.02, 0.5):
        model = NoisyLotkaVolterra(n_taxa=20, strength=strength, noise=0.1)
        capacity = model.draw_parameters(20, np.random.default_rng(3)).capacity
        x = model.abundances(design, 20, np.random.default_rng(3))
        fillings.append(np.log10(x / capacity[:, None, :]))
    assert np.median(fillings[1]) < np.median(fillings[0]) - 0.5
    assert np.quantile(fillings[1], 0.05) < -2.0   # excluded taxa held up by immigration only


# ------------------------------------------------------------------ both models


MODELS = [StochasticLogistic(n_taxa=40), NoisyLotkaVolterra(n_taxa=40)]


@pytest.mark.parametrize("model", MODELS, ids=["logistic", "lotka-volterra"])
@pytest.mark.parametrize("times", [None, np.array([0.0, 0.5, 3.0, 3.2, 10.0])])
def test_counts_shape_dtype_depths_and_seed(model, times) -> None:
    depths = np.array([1_000, 20, 5_000, 1, 300])
    design = Design(depths, times)
    counts = model.simulate(design, 3, np.random.default_rng(4))
    assert counts.shape == (3, 5, 40) and counts.dtype == np.int64
    np.testing.assert_array_equal(counts.sum(axis=2), np.broadcast_to(depths, (3, 5)))
    np.testing.assert_array_equal(counts, model.simulate(design, 3, np.random.default_rng(4)))
    assert not np.array_equal(counts, model.simulate(design, 3, np.random.default_rng(5)))


@pytest.mark.parametrize("model", [StochasticLogistic(n_taxa=30, strength=1.98),
                                   NoisyLotkaVolterra(n_taxa=30, strength=3.0, noise=1.95)],
                         ids=["logistic", "lotka-volterra"])
def test_no_nan_for_strong_noise(model) -> None:
    design = Design(np.full(30, 10_000), np.cumsum(np.full(30, 2.0)))
    with np.errstate(invalid="raise", divide="raise", over="raise"):  # underflow to 0 is harmless
        x = model.abundances(design, 5, np.random.default_rng(6))
    assert np.isfinite(x).all() and (x >= 0).all() and (x.sum(axis=2) > 0).all()
    counts = model.simulate(design, 5, np.random.default_rng(6))
    assert (counts.sum(axis=2) == 10_000).all()


@pytest.mark.slow
@pytest.mark.parametrize("model", MODELS, ids=["logistic", "lotka-volterra"])
def test_defaults_give_mostly_present_some_rare_taxa(model) -> None:
    """40 taxa, 100 daily samples, depth 1e4: most taxa present in most samples, some rare."""
    counts = model.simulate(Design(np.full(100, 10_000), np.arange(100.0)), 8,
                            np.random.default_rng(12))
    presence = (counts > 0).mean(axis=1)              # (replicate, taxon)
    assert (presence >= 0.9).mean() > 0.6
    mean_share = counts.mean(axis=1) / 10_000
    assert (mean_share < 1e-3).mean() > 0.05


def test_sequence_counts_from_extreme_log_abundances() -> None:
    """Renormalisation from log space: no NaN, rows sum to depth, tiny taxa get no reads."""
    log_x = np.array([[[-800.0, -801.0, -2000.0], [0.0, -50.0, 3.0]]])
    counts = sequence_counts(log_x, np.array([100, 1000]), np.random.default_rng(1))
    np.testing.assert_array_equal(counts.sum(axis=2), [[100, 1000]])
    assert counts[0, 0, 2] == 0 and counts[0, 1, 1] == 0


def test_invalid_parameters_are_rejected() -> None:
    with pytest.raises(ValueError):
        StochasticLogistic(n_taxa=5, strength=2.0)
    with pytest.raises(ValueError):
        NoisyLotkaVolterra(n_taxa=5, noise=-0.1)
    with pytest.raises(ValueError):
        NoisyLotkaVolterra(n_taxa=0)


# --- environmental tracking: the per-taxon scan's planted truth -------------------------

def test_tracking_departures_are_the_strengths_of_the_simulated_community() -> None:
    from driftscreen.niche import EnvironmentalTracking

    model = EnvironmentalTracking(30, theta=80.0, rate=0.5, timescale=3.0)
    design = Design(depths=np.full(400, 20_000), times=np.arange(400.0))
    rng = np.random.default_rng(8)
    departures = model.departures(1, np.random.default_rng(8))[0]
    p, strengths = model.draw_community(1, np.random.default_rng(8))
    np.testing.assert_array_equal(departures, strengths[0])
    assert sorted(departures[departures > 0]) == sorted(model.strengths)
    # Responders lie in the more abundant half of the metacommunity.
    assert np.all(np.argsort(np.argsort(-p[0]))[departures > 0] < 15)
    counts = model.simulate(design, 1, rng)[0]
    log_share = np.log((counts + 0.5) / counts.sum(axis=1, keepdims=True))
    spread = log_share.std(axis=0)
    # The strongest responder varies more than any neutral taxon of similar abundance would:
    # its log-share sd exceeds its environmental log-sd alone (1.1), which drift at theta 80
    # adds to (common practice: independent variances add).
    strongest = int(np.argmax(departures))
    assert spread[strongest] > 1.0
    # The environment is an Ornstein-Uhlenbeck process with correlation time 3 days: the
    # lag-1 autocorrelation of a unit-variance path is exp(-1/3) (Uhlenbeck & Ornstein 1930).
    path = model.environment(design, 200, np.random.default_rng(9))
    lag1 = np.mean(path[:, 1:] * path[:, :-1])
    assert abs(lag1 - np.exp(-1 / 3)) < 0.01 and abs(np.mean(path**2) - 1) < 0.01


def test_tracking_snapshot_and_invalid_parameters() -> None:
    from driftscreen.niche import EnvironmentalTracking

    counts = EnvironmentalTracking(20).simulate(Design(depths=np.full(30, 5000)), 2,
                                                np.random.default_rng(1))
    assert counts.shape == (2, 30, 20) and np.all(counts.sum(axis=2) == 5000)
    with pytest.raises(ValueError):
        EnvironmentalTracking(8)
    with pytest.raises(ValueError):
        EnvironmentalTracking(20, strengths=(-0.1,))
