"""Tests of the neutral-null estimators (driftscreen.neutral.fit).

Tolerances of statistical checks are multiples of the Monte Carlo standard error (SE)
estimated from the replicate spread; all seeds are fixed, so the checks are
deterministic, and each can fail if the estimator loses a correction term (sampling
noise, autocorrelation) or mixes up units.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq

from driftscreen.dataset import Design
from driftscreen.errors import InputError
from driftscreen.neutral import fit as fitmod
from driftscreen.neutral.fit import (correlation_weight, fit, fit_batch, pooled_fractions,
                                     rate_bounds, variogram)
from driftscreen.neutral.model import NeutralModel, NullOptions
from driftscreen.neutral.simulate import simulate

#: The design note's estimator: multinomial reads, p the pooled read fraction.
MULTINOMIAL = NullOptions(noise="off", start="stationary")


def lognormal_composition(n_taxa: int, rng: np.random.Generator, spread: float = 1.5) -> np.ndarray:
    """An invented metacommunity with log-normal abundances."""
    p = np.exp(spread * rng.standard_normal(n_taxa))
    return p / p.sum()


def irregular_design(n_samples: int, median_depth: float, rng: np.random.Generator) -> Design:
    """Gaps ~ Gamma(2) with mean 1 day, log-normal depths (as in the design note, section 5)."""
    times = np.concatenate([[0.0], np.cumsum(rng.gamma(2.0, 0.5, n_samples - 1))])
    depths = np.maximum(2, np.round(median_depth * np.exp(0.5 * rng.standard_normal(n_samples))))
    return Design(depths.astype(np.int64), times)


def dirichlet_multinomial(p: np.ndarray, theta: float, depths: np.ndarray, n_replicates: int,
                          rng: np.random.Generator) -> np.ndarray:
    """Independent stationary samples: X ~ Dirichlet(theta p), N ~ Multinomial(n, X).

    Source: stationary law of the neutral model with immigration is Dirichlet(theta p)
    (Ewens 2004, Mathematical Population Genetics I, section 5.10 # from memory for the section).
    """
    x = rng.dirichlet(theta * p, size=(n_replicates, depths.size))
    x /= x.sum(axis=2, keepdims=True)
    return rng.multinomial(depths[None, :], x)


def mean_and_se(values: np.ndarray) -> tuple[float, float]:
    return float(values.mean()), float(values.std(ddof=1) / np.sqrt(values.size))


# ------------------------------------------------------------------ snapshot theta


@pytest.mark.parametrize("theta", [5.0, 50.0, 500.0])
@pytest.mark.parametrize("depth", [1_000, 10_000])
def test_snapshot_theta_recovered(theta: float, depth: int) -> None:
    """v-hat is unbiased; theta-hat = 1/v-hat - 1 carries only the delta-method bias.

    Source for the expectations: Dirichlet-multinomial variance
    Var N_i = n p_i (1 - p_i)(n + theta)/(1 + theta) (Mosimann 1962, Biometrika 49:65),
    from which E[Q] and E[H] in the design note (section 5) follow.
    """
    rng = np.random.default_rng(1000 + int(theta) + depth)
    n_datasets, n_samples = 1000, 40
    p = lognormal_composition(30, rng)
    depths = rng.integers(depth // 2, 3 * depth // 2, n_samples)
    result = fit_batch(dirichlet_multinomial(p, theta, depths, n_datasets, rng), Design(depths))
    assert result.rate is None
    assert not result.clipped.any()
    v_true = 1.0 / (1.0 + theta)
    v_hat = 1.0 / (1.0 + result.theta)
    v_mean, v_se = mean_and_se(v_hat)
    assert abs(v_mean - v_true) < 3.0 * v_se          # unbiased: within 3 SE
    # Second-order (delta method) bias of 1/v - 1: Var(v-hat)/v^3  # common practice
    expected_bias = v_hat.var() / v_true**3
    theta_mean, theta_se = mean_and_se(result.theta)
    assert abs(theta_mean - theta - expected_bias) < 3.0 * theta_se
    assert abs(theta_mean / theta - 1.0) < 0.04        # stated bound: 4% with 40 samples
    spread = result.theta.std() / theta
    assert 0.02 < spread < 0.3                         # informative, yet not degenerate


def test_snapshot_without_sampling_correction_would_fail() -> None:
    """At theta = 500 and depth 1000 multinomial noise is half the drift variance: the
    naive ratio (no sampling term) is more than 20% off, the corrected one within 5%."""
    rng = np.random.default_rng(5)
    theta, depths = 500.0, np.full(40, 1_000)
    p = lognormal_composition(30, rng)
    counts = dirichlet_multinomial(p, theta, depths, 300, rng)
    y = counts / depths[None, :, None]
    p_hat = pooled_fractions(counts, Design(depths))
    naive_v = ((y - p_hat[:, None]) ** 2).sum(axis=2).mean(axis=1) / (1 - (p_hat**2).sum(axis=1))
    assert np.mean(1 / naive_v - 1) < 0.8 * theta
    assert abs(np.mean(fit_batch(counts, Design(depths)).theta) / theta - 1) < 0.05


# ------------------------------------------------------------------ time series


@pytest.mark.slow
@pytest.mark.parametrize(
    ("theta", "median_depth", "n_samples", "lag1_corr", "theta_tol", "rate_tol"),
    [
        # Stated tolerances on the mean bias (design note, section 5 table: |bias| <= 1.2%
        # for theta and <= 2.4% for the rate in these rows), plus 3 Monte Carlo SE.
        (50.0, 2e4, 200, 0.5, 0.03, 0.04),
        (500.0, 3e3, 200, 0.9, 0.03, 0.05),
        (50.0, 2e4, 50, 0.5, 0.03, 0.06),
        # Small theta, strong autocorrelation: the R_w term of Pi-hat moves theta by ~9%
        # here; measured bias +1.5% (theta) and +7% (rate, rate x span ~ 10).
        (2.0, 1e4, 100, 0.9, 0.04, 0.12),
    ],
)
def test_series_theta_and_rate_recovered(theta: float, median_depth: float, n_samples: int,
                                         lag1_corr: float, theta_tol: float,
                                         rate_tol: float) -> None:
    """Exact simulator, irregular intervals, varying depths."""
    rng = np.random.default_rng(int(theta + n_samples + 100 * lag1_corr))
    design = irregular_design(n_samples, median_depth, rng)
    rate = -np.log(lag1_corr)  # mean gap is 1 day
    model = NeutralModel(lognormal_composition(60, rng, spread=1.9), theta, rate)
    result = fit_batch(simulate(model, design, 300, rng), design, MULTINOMIAL)
    assert not result.clipped.any()
    theta_mean, theta_se = mean_and_se(result.theta)
    rate_mean, rate_se = mean_and_se(result.rate)
    assert abs(theta_mean - theta) < theta_tol * theta + 3.0 * theta_se
    assert abs(rate_mean - rate) < rate_tol * rate + 3.0 * rate_se
    assert result.theta.std() / theta < 0.6          # informative (theta = 2: 26%, 43% for rate)
    assert result.rate.std() / rate < 0.6


def test_p_hat_unbiased_with_the_variance_of_the_note() -> None:
    """E[p-hat_i] = p_i and Var(p-hat_i) = pi_i [v R_w + (1 - v)/W] (design note, section 5).

    Source: stationary covariances Cov(X_i(s), X_i(t)) = v pi_i exp(-rate |s - t|) of the
    Wright-Fisher diffusion with immigration (Ewens 2004, ch. 5, mean of the transition
    density) plus multinomial sampling.
    """
    rng = np.random.default_rng(21)
    design = irregular_design(30, 500, rng)
    theta, rate = 20.0, 0.3
    p = lognormal_composition(12, rng, spread=1.0)
    counts = simulate(NeutralModel(p, theta, rate), design, 6000, rng)
    p_hat = pooled_fractions(counts, design)
    mean = p_hat.mean(axis=0)
    se = p_hat.std(axis=0, ddof=1) / np.sqrt(p_hat.shape[0])
    assert np.all(np.abs(mean - p) < 4.5 * se)          # 4.5 SE per taxon, 12 taxa
    v = 1.0 / (1.0 + theta)
    expected = p * (1 - p) * (v * correlation_weight(np.array(rate), design)
                              + (1 - v) / design.depths.sum())
    centred = (p_hat - p) ** 2
    variance_se = centred.std(axis=0, ddof=1) / np.sqrt(p_hat.shape[0])
    well_sampled = theta * p >= 1.0                      # heavy tails below (design note, 3c)
    assert well_sampled.sum() >= 6
    assert np.all(np.abs(centred.mean(axis=0) - expected)[well_sampled]
                  < 4.5 * variance_se[well_sampled])


def test_expected_heterozygosity_of_p_hat() -> None:
    """E[H] = Pi [1 - v R_w - (1 - v)/W], H = 1 - sum_i p-hat_i^2 (design note, section 5).

    Source: as above, Var(p-hat_i) from the stationary lag covariances (Ewens 2004, ch. 5).
    Strong autocorrelation and small theta make the R_w term 40 SE large here.
    """
    rng = np.random.default_rng(31)
    design = irregular_design(40, 2_000, rng)
    theta, rate = 2.0, 0.1
    p = lognormal_composition(10, rng, spread=1.0)
    counts = simulate(NeutralModel(p, theta, rate), design, 8000, rng)
    hetero = 1 - np.sum(pooled_fractions(counts, design) ** 2, axis=1)
    v, pi_total, total = 1 / (1 + theta), np.sum(p * (1 - p)), design.depths.sum()
    r_w = float(correlation_weight(np.array(rate), design))
    expected = pi_total * (1 - v * r_w - (1 - v) / total)
    mean, se = mean_and_se(hetero)
    assert abs(mean - expected) < 4.5 * se
    independent = pi_total * (1 - v * np.sum((design.depths / total) ** 2) - (1 - v) / total)
    assert abs(mean - independent) > 20 * se


@pytest.mark.parametrize("precision", [np.inf, 300.0])
def test_theta_rate_and_noise_solve_the_moment_equations(precision: float) -> None:
    """At the fitted (v, rate, g) the pooled spread equation and the increment equations at
    lags 1 and 2 hold, recomputed here directly: section 5 of the design note with the
    sampling variance 1/n_t replaced by s_t = g + (1 - g)/n_t, and the nugget
    2 g (1 - v) Pi that independent Dirichlet-multinomial read noise adds at every lag."""
    rng = np.random.default_rng(32)
    design = irregular_design(60, 3_000, rng)
    truth = NeutralModel(lognormal_composition(20, rng), 30.0, 0.2,
                         0.0 if np.isinf(precision) else 1 / (1 + precision))
    counts = simulate(truth, design, 1, rng)[0]
    model = fit(counts, design, NullOptions(start="stationary"))
    g, v = model.noise, 1 / (1 + model.theta)
    depths = design.depths.astype(float)
    w = depths / depths.sum()
    y = counts / depths[:, None]
    hetero = np.sum(model.p * (1 - model.p))
    spread = np.sum(w[:, None] * (y - model.p) ** 2)
    binomial = y * (1 - y) / (depths[:, None] - 1)
    r_w = float(correlation_weight(np.array(model.rate), design))
    s_t = g + (1 - g) / depths
    s1, s2 = np.sum(w * s_t), np.sum(w**2 * s_t)
    denominator = 1 - v * r_w - (1 - v) * s2
    # v is interpolated between the grid rates: the spread equation holds to 1e-3
    assert spread / hetero == pytest.approx((v * (1 - r_w) + (1 - v) * (s1 - s2)) / denominator,
                                            rel=1e-3)
    for lag in (1, 2):
        increments = np.sum((y[lag:] - y[:-lag]) ** 2 - binomial[lag:] - binomial[:-lag])
        shape = np.sum(-np.expm1(-model.rate * (design.times[lag:] - design.times[:-lag])))
        predicted = 2 * (v * shape + g * (1 - v) * (design.n_samples - lag)) / denominator
        # rate and noise are interpolated on grids: the equations hold to a few per cent
        assert increments / hetero == pytest.approx(predicted, rel=0.03)


def test_variogram_expectation_matches_section_2_covariances() -> None:
    """E[D_st] = 2 A (1 - exp(-rate |t_s - t_t|)), A = v Pi.

    Source: stationary variances and lag covariances of the Wright-Fisher diffusion with
    immigration (Ewens 2004, ch. 5) and multinomial sampling, as listed in section 2 of the
    design note, summed term by term; compared with the mean of D_st over exact neutral
    replicates (tolerance 4.5 SE per pair).
    """
    rng = np.random.default_rng(3)
    design = Design(np.array([40, 300, 75, 1000, 120, 55]),
                    np.array([0.0, 0.4, 1.5, 1.7, 3.0, 6.5]))
    theta, rate = 15.0, 0.6
    p = lognormal_composition(8, rng, spread=1.0)
    counts = simulate(NeutralModel(p, theta, rate), design, 40_000, rng)
    first, second, d = variogram(counts, design)
    v, pi = 1.0 / (1.0 + theta), p * (1 - p)
    n_s, n_t = design.depths[first][:, None], design.depths[second][:, None]
    rho = np.exp(-rate * (design.times[second] - design.times[first]))[:, None]
    var_s, var_t = pi * (v + (1 - v) / n_s), pi * (v + (1 - v) / n_t)
    cov = pi * v * rho
    mean_y_one_minus_y_s = p - (var_s + p**2)
    mean_y_one_minus_y_t = p - (var_t + p**2)
    direct = np.sum(var_s + var_t - 2 * cov - mean_y_one_minus_y_s / (n_s - 1)
                    - mean_y_one_minus_y_t / (n_t - 1), axis=1)
    closed_form = 2 * v * pi.sum() * (1 - rho[:, 0])
    np.testing.assert_allclose(direct, closed_form, rtol=1e-12)
    se = d.std(axis=0, ddof=1) / np.sqrt(d.shape[0])
    assert np.all(np.abs(d.mean(axis=0) - closed_form) < 4.5 * se)
    # Without the sampling correction the mean would be off by many SE at these depths.
    raw_bias = np.sum(mean_y_one_minus_y_s / (n_s - 1) + mean_y_one_minus_y_t / (n_t - 1), axis=1)
    assert np.all(raw_bias > 10 * se)


def test_rate_matches_a_root_finder() -> None:
    """Grid + interpolation agrees with scipy's brentq root of the same increment equation
    (v eliminated through the spread equation) to 1% in rate."""
    rng = np.random.default_rng(8)
    design = irregular_design(40, 5_000, rng)
    model = NeutralModel(lognormal_composition(50, rng), 100.0, 0.4)
    counts = simulate(model, design, 20, rng)
    result = fit_batch(counts, design, MULTINOMIAL)
    depths = design.depths.astype(float)
    w = depths / depths.sum()
    s1, s2 = np.sum(w / depths), np.sum(w**2 / depths)
    low, high = rate_bounds(design)
    for replicate in range(counts.shape[0]):
        y = counts[replicate] / depths[:, None]
        p = result.p[replicate]
        hetero = np.sum(p * (1 - p))
        ratio_q = np.sum(w[:, None] * (y - p) ** 2) / hetero
        noise = y * (1 - y) / (depths[:, None] - 1)
        ratio_d = np.sum(np.diff(y, axis=0) ** 2 - noise[1:] - noise[:-1]) / hetero

        def gap(log_rate: float, ratio_q: float = ratio_q, ratio_d: float = ratio_d) -> float:
            rate = np.exp(log_rate)
            r_w = float(correlation_weight(np.array(rate), design))
            v = (ratio_q * (1 - s2) - (s1 - s2)) / (1 - r_w + ratio_q * r_w - ratio_q * s2
                                                    - (s1 - s2))
            adjacent = np.sum(-np.expm1(-rate * np.diff(design.times)))
            return 2 * v * adjacent / (1 - v * r_w - (1 - v) * s2) - ratio_d

        root = brentq(gap, np.log(low), np.log(high), xtol=1e-10)
        assert abs(np.log(result.rate[replicate]) - root) < 0.01


def test_correlation_weight_matches_double_sum() -> None:
    rng = np.random.default_rng(2)
    design = irregular_design(25, 1_000, rng)
    w = design.depths / design.depths.sum()
    rates = np.array([0.01, 0.7, 30.0])
    lags = np.abs(design.times[:, None] - design.times[None, :])
    direct = [w @ np.exp(-rate * lags) @ w for rate in rates]
    np.testing.assert_allclose(correlation_weight(rates, design), direct, rtol=1e-12)


# ------------------------------------------------------------------ batch, edge cases


def test_fit_batch_equals_fit_on_each_table_and_sub_batches(
        monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(4)
    design = irregular_design(30, 2_000, rng)
    counts = simulate(NeutralModel(lognormal_composition(20, rng), 40.0, 0.5), design, 7, rng)
    whole = fit_batch(counts, design)
    for replicate in range(counts.shape[0]):
        single = fit(counts[replicate], design)
        np.testing.assert_allclose(single.p, whole.p[replicate], rtol=1e-13)
        assert single.theta == pytest.approx(whole.theta[replicate], rel=1e-10)
        assert single.rate == pytest.approx(whole.rate[replicate], rel=1e-10)
    monkeypatch.setattr(fitmod, "SUB_BATCH_BYTES", 1)  # one replicate per sub-batch
    pieces = fit_batch(counts, design)
    np.testing.assert_allclose(pieces.theta, whole.theta, rtol=1e-10)
    np.testing.assert_allclose(pieces.rate, whole.rate, rtol=1e-10)


def test_regular_design_grouping_by_lag_is_exact() -> None:
    """Daily sampling collapses pairs to T - 1 distinct lags; the fit equals the one on a
    design whose times are jittered by 1e-9 days (all lags distinct)."""
    rng = np.random.default_rng(6)
    depths = np.full(40, 3_000)
    regular = Design(depths, np.arange(40.0))
    jittered = Design(depths, np.arange(40.0) + 1e-9 * rng.random(40))
    counts = simulate(NeutralModel(lognormal_composition(30, rng), 60.0, 0.3), regular, 5, rng)
    a, b = fit_batch(counts, regular), fit_batch(counts, jittered)
    np.testing.assert_allclose(a.theta, b.theta, rtol=1e-6)
    np.testing.assert_allclose(a.rate, b.rate, rtol=1e-6)


@pytest.mark.parametrize("times", [None, np.arange(25.0)])
def test_absent_taxa_get_zero_and_change_nothing(times: np.ndarray | None) -> None:
    rng = np.random.default_rng(9)
    design = Design(np.full(25, 2_000), times)
    p = lognormal_composition(15, rng)
    model = NeutralModel(p, 30.0, None if times is None else 0.4)
    counts = simulate(model, design, 4, rng)
    padded = np.concatenate([counts[:, :, :5], np.zeros((4, 25, 2), np.int64), counts[:, :, 5:]],
                            axis=2)
    plain, with_zeros = fit_batch(counts, design), fit_batch(padded, design)
    assert np.all(with_zeros.p[:, 5:7] == 0)
    np.testing.assert_allclose(np.delete(with_zeros.p, [5, 6], axis=1), plain.p)
    np.testing.assert_allclose(with_zeros.theta, plain.theta, rtol=1e-12)
    if times is not None:
        np.testing.assert_allclose(with_zeros.rate, plain.rate, rtol=1e-12)
    one = fit(padded[0], design)
    assert np.isfinite(one.theta) and one.p[5] == 0


@pytest.mark.parametrize("times", [None, np.arange(20.0)])
def test_constant_composition_is_clipped_and_flagged(times: np.ndarray | None) -> None:
    """Identical proportions in every sample: less variation than sampling alone, v < 0."""
    depths = np.full(20, 1_000)
    counts = np.tile(np.array([500, 300, 150, 50]), (20, 1))
    result = fit(counts, Design(depths, times))
    assert result.theta == pytest.approx(1 / fitmod.V_MIN - 1)
    assert any("clipped" in flag for flag in result.flags)
    assert fit_batch(counts[None], Design(depths, times)).clipped[0]


def test_trend_hits_the_lower_rate_bound_and_is_flagged() -> None:
    """A steady replacement of one taxon by another: the variogram never levels off (for the
    stationary null; conditioned on the first sample it reads as a slow relaxation)."""
    times = np.arange(30.0)
    share = np.linspace(0.05, 0.95, 30)
    counts = np.round(np.stack([share, 1 - share], axis=1) * 10_000).astype(np.int64)
    design = Design(counts.sum(axis=1), times)
    result = fit(counts, design, MULTINOMIAL)
    assert result.rate == pytest.approx(rate_bounds(design)[0])
    assert any("lower bound" in flag for flag in result.flags)
    assert any("weakly identified" in flag for flag in result.flags)


def test_short_series_and_single_read_samples() -> None:
    counts = np.array([[600, 400], [550, 450]])
    short = fit(counts, Design(np.array([1000, 1000]), np.array([0.0, 2.0])))
    assert short.rate == pytest.approx(fitmod.RATE_MAX_LAG / 2.0)
    assert any("too short" in flag for flag in short.flags)
    rng = np.random.default_rng(12)
    depths = np.full(15, 800)
    depths[4] = 1
    design = Design(depths, np.arange(15.0))
    counts = simulate(NeutralModel(lognormal_composition(6, rng), 30.0, 0.5), design, 1, rng)[0]
    model = fit(counts, design)
    assert np.isfinite(model.theta) and np.isfinite(model.rate)
    assert any("single read" in flag for flag in model.flags)
    first, second, _ = variogram(counts[None], design)
    assert 4 not in first and 4 not in second


def test_one_sample_is_an_input_error() -> None:
    with pytest.raises(InputError, match="at least two samples"):
        fit(np.array([[3, 4]]), Design(np.array([7])))


def test_wrong_shape_is_a_programming_error() -> None:
    with pytest.raises(ValueError):
        fit_batch(np.ones((3, 4)), Design(np.full(3, 4)))


@pytest.mark.parametrize(("theta", "rate", "precision"), [(100.0, 0.2, 300.0),
                                                          (30.0, 0.5, 1000.0),
                                                          (100.0, 0.2, np.inf)])
def test_technical_noise_is_recovered_from_the_nugget(theta, rate, precision):
    """The median of g-hat = 1/(1 + C-hat) is within 35% of the truth (0 stays near 0), and
    theta and the rate keep their accuracy, on daily series with Dirichlet-multinomial reads
    (Mosimann 1962). Measured medians: g 0.0033 for 0.0033, 0.0013 for 0.0010 (where the
    noise is a thirtieth of the drift variance)."""
    rng = np.random.default_rng(int(theta + 10 * rate))
    design = Design(np.full(100, 5_000), np.arange(100.0))
    g = 0.0 if np.isinf(precision) else 1 / (1 + precision)
    model = NeutralModel(lognormal_composition(40, rng), theta, rate, g)
    result = fit_batch(simulate(model, design, 200, rng), design)
    if g == 0:
        assert np.median(result.noise) < 1e-4
    else:
        assert abs(np.median(result.noise) / g - 1) < 0.35
    assert abs(np.median(result.theta) / theta - 1) < 0.1
    assert abs(np.median(result.rate) / rate - 1) < 0.15


def test_relaxation_composition_recovers_p_after_a_disturbance():
    """A neutral community whose three most abundant taxa were cut to a tenth at the first
    sample relaxes towards p as p + (x_0 - p) exp(-rate t) (design note, section 2): the
    relaxation estimate of p is unbiased for those taxa, the time mean is far below."""
    rng = np.random.default_rng(21)
    p = lognormal_composition(30, rng)
    start = p.copy()
    top = np.argsort(-p)[:3]
    start[top] /= 10
    design = Design(np.full(30, 10_000), np.arange(30.0))
    model = NeutralModel(p, 200.0, 0.1)
    counts = simulate(model, design, 300, rng, start=start / start.sum())
    relaxed = fit_batch(counts, design).p[:, top].mean(axis=0)
    pooled = pooled_fractions(counts, design)[:, top].mean(axis=0)
    np.testing.assert_allclose(relaxed / p[top], 1.0, atol=0.08)
    assert np.all(pooled / p[top] < 0.85)
