"""dispersion_heterogeneity: likelihood ratio of taxon-specific against one common theta."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, special, stats

from driftscreen.neutral.fit import fitted_model
from driftscreen.neutral.model import NullFit
from driftscreen.statistics.dispersion_heterogeneity import (
    DispersionHeterogeneity,
    autocorrelation_factor,
    beta_curve_step,
    interpolant_at,
    pilot_theta,
    profile_grid,
    profile_point,
    refine_maximum,
    shape_sums,
    stirling_log_gamma,
    summarise_counts,
)
from test_statistics_synthetic import (
    composition,
    daily_design,
    fit_rows,
    fitted,
    heterogeneous_dispersion,
    neutral_batch,
    snapshot_design,
    varying_depths,
)

STAT = DispersionHeterogeneity()
P = composition(30, seed=1)


def _binomial_coefficients(counts, depths):
    return (special.gammaln(depths + 1.0)[None, :, None] - special.gammaln(counts + 1.0)
            - special.gammaln(depths[None, :, None] - counts + 1.0)).sum(axis=1)


def _awkward_counts():
    """Zeros, small reads (exact path), large reads (asymptotic path), a dominant taxon
    whose rest has fewer than 32 reads, and depths below 32."""
    rng = np.random.default_rng(8)
    depths = np.concatenate([[1, 5, 31, 32, 33], rng.integers(40, 200000, 55)]).astype(float)
    p = np.array([[0.9, 0.05, 0.03, 0.015, 0.005], [0.2, 0.2, 0.2, 0.2, 0.2]])
    theta = np.array([3.0, 400.0])
    fractions = rng.dirichlet(theta[0] * p[0], size=(2, depths.size))
    counts = rng.multinomial(depths.astype(np.int64)[None, :], fractions).astype(np.int64)
    counts[0, 10, :] = [int(depths[10]) - 3, 1, 1, 1, 0]
    return counts, depths, p, theta


def _betabinom_sum(counts, depths, p, theta):
    """sum_t scipy.stats.betabinom.logpmf for every table and taxon, ``(R, K)``."""
    a, b = theta[:, None] * p, theta[:, None] * (1 - p)
    return stats.betabinom.logpmf(counts, depths[None, :, None], a[:, None, :],
                                  b[:, None, :]).sum(axis=1)


def test_shape_sums_match_scipy_special_functions():
    # Source: scipy.special gammaln, digamma and polygamma(1, .) summed over samples. The
    # asymptotic series leave per cell at most 1/(360 x^3), 1/(120 x^4), 1/(30 x^5) at
    # x >= 32 (Abramowitz & Stegun 1964, 6.1.41, 6.3.18, 6.4.12): < 1e-5 over 60 samples.
    counts, depths, p, theta = _awkward_counts()
    summary = summarise_counts(counts, depths)
    for which, reads, shape in ((0, counts, theta[:, None] * p),
                                (1, depths[None, :, None] - counts, theta[:, None] * (1 - p))):
        mine = shape_sums(summary, which, shape)
        s = shape[:, None, :]
        np.testing.assert_allclose(
            mine.log_gamma, (special.gammaln(reads + s) - special.gammaln(s)).sum(axis=1),
            rtol=1e-10, atol=1e-5)
        np.testing.assert_allclose(
            mine.digamma, (special.digamma(reads + s) - special.digamma(s)).sum(axis=1),
            rtol=1e-10, atol=1e-5)
        np.testing.assert_allclose(
            mine.curvature,
            (special.polygamma(1, s) - special.polygamma(1, reads + s)).sum(axis=1),
            rtol=1e-10, atol=1e-5)


def test_loglik_matches_scipy_betabinom_logpmf():
    # Source: scipy.stats.betabinom.logpmf summed over samples (awkward counts as above).
    counts, depths, p, theta = _awkward_counts()
    point = profile_point(summarise_counts(counts, depths), p, theta)
    np.testing.assert_allclose(point.loglik + _binomial_coefficients(counts, depths),
                               _betabinom_sum(counts, depths, p, theta), rtol=0, atol=2e-5)


def test_score_information_and_drift_are_the_derivatives_in_p_and_log_theta():
    # Source: d lgamma(x)/dx = psi(x), d psi(x)/dx = psi'(x) (Abramowitz & Stegun 1964, 6.3.1,
    # 6.4.1), written with scipy.special.digamma / polygamma: with a = theta p, b = theta (1-p),
    # dl/dp = theta sum_t [psi(N + a) - psi(a) - psi(n - N + b) + psi(b)], and so on.
    counts, depths, p, theta = _awkward_counts()
    point = profile_point(summarise_counts(counts, depths), p, theta)
    a, b = (theta[:, None] * q for q in (p, 1 - p))
    reads, rest = counts, depths[None, :, None] - counts

    def summed(function, m, s):
        return (function(m + s[:, None, :]) - function(s[:, None, :])).sum(axis=1)

    def trigamma(x):
        return special.polygamma(1, x)

    score = theta[:, None] * (summed(special.digamma, reads, a)
                              - summed(special.digamma, rest, b))
    curvature_a, curvature_b = -summed(trigamma, reads, a), -summed(trigamma, rest, b)
    np.testing.assert_allclose(point.score, score, rtol=1e-7, atol=1e-5)
    np.testing.assert_allclose(point.information,
                               theta[:, None] ** 2 * (curvature_a + curvature_b),
                               rtol=1e-7, atol=1e-5)
    np.testing.assert_allclose(
        point.drift, score + theta[:, None] ** 2 * ((1 - p) * curvature_b - p * curvature_a),
        rtol=1e-7, atol=1e-5)


def test_derivatives_match_finite_differences_of_the_betabinom_loglik():
    # Central differences of the summed scipy.stats.betabinom.logpmf on shallow samples (the
    # log-likelihood stays small, so rounding ~eps |l| / h is negligible; truncation ~h^2;
    # common practice): relative tolerance 1e-5 for first and 1e-3 for second differences.
    rng = np.random.default_rng(3)
    depths = rng.integers(2, 60, 40).astype(float)
    p = np.array([[0.6, 0.3, 0.08, 0.02]])
    theta = np.array([4.0])
    counts = rng.multinomial(depths.astype(np.int64)[None, :],
                             rng.dirichlet(theta[0] * p[0], size=(1, depths.size)))
    point = profile_point(summarise_counts(counts, depths), p, theta)
    h = 1e-5 * p
    up, centre, down = (_betabinom_sum(counts, depths, p + d, theta) for d in (h, 0 * h, -h))
    np.testing.assert_allclose(point.score, (up - down) / (2 * h), rtol=1e-5)
    np.testing.assert_allclose(point.information, -(up - 2 * centre + down) / h**2, rtol=1e-3)
    g = 1e-5
    shifted = [_betabinom_sum(counts, depths, p + h, theta * np.exp(sign * g))
               - _betabinom_sum(counts, depths, p - h, theta * np.exp(sign * g))
               for sign in (1, -1)]
    np.testing.assert_allclose(point.drift, (shifted[0] - shifted[1]) / (4 * g * h), rtol=1e-3)


def test_beta_curve_step_is_exact_for_a_beta_kernel():
    # f(p) = alpha log p + gamma log(1 - p) peaks at alpha / (alpha + gamma) (the Beta mode
    # with shapes alpha + 1, gamma + 1); the step matches f's score and curvature, so it lands
    # there with the exact gain from any start.
    alpha, gamma = np.array([[2.0, 50.0, 0.3]]), np.array([[30.0, 50.0, 900.0]])
    start = np.array([[0.3, 0.02, 1e-5]])
    score = alpha / start - gamma / (1 - start)
    information = alpha / start**2 + gamma / (1 - start) ** 2
    peak, gain = beta_curve_step(start, score, information)
    np.testing.assert_allclose(peak, alpha / (alpha + gamma), rtol=1e-10)

    def f(x):
        return alpha * np.log(x) + gamma * np.log(1 - x)

    np.testing.assert_allclose(gain, f(peak) - f(start), rtol=1e-9)


def test_profile_matches_numerical_maximisation_over_p():
    # Reference: for each taxon and grid theta, max over p of the sum of
    # scipy.stats.betabinom.logpmf, by scipy.optimize on the log-odds of p. The one-step
    # profile was measured within 0.05 log-likelihood units (module docstring).
    design = snapshot_design(60, varying_depths(60, seed=2))
    for theta in (5.0, 300.0):
        counts, fit = neutral_batch(P, theta, None, design, 1, seed=5)
        depths = design.depths.astype(float)
        summary = summarise_counts(counts, design.depths)
        start = np.where(fit.p > 0, fit.p, 0.5)
        pilot = pilot_theta(counts, depths, fit.p)
        multipliers = 2.0 ** np.arange(-3, 4)
        mine = profile_grid(summary, start, pilot, multipliers) + _binomial_coefficients(
            counts, depths)[..., None]
        for i in np.flatnonzero(fit.p[0] > 0)[::3]:
            for g, c in enumerate(multipliers):
                def minus_loglik(eta, i=i, c=c):
                    a = c * pilot[0] * special.expit(eta)
                    return -stats.betabinom.logpmf(counts[0, :, i], depths, a,
                                                   c * pilot[0] - a).sum()
                best = optimize.minimize_scalar(minus_loglik, bracket=(
                    special.logit(start[0, i]) - 0.1, special.logit(start[0, i]) + 0.1))
                assert abs(mine[0, i, g] + best.fun) < 0.05, (theta, i, c)


def test_stirling_series_error_bound():
    # Source: Abramowitz & Stegun (1964) 6.1.41: the remainder after the 1/(12 x) term is
    # below 1/(360 x^3) in absolute value; reference scipy.special.gammaln.
    x = np.geomspace(32, 1e9, 200)
    error = np.abs(stirling_log_gamma(x) - special.gammaln(x))
    assert np.all(error <= 1.0 / (360.0 * x**3) + 1e-15 * np.abs(special.gammaln(x)))


def test_refinement_is_exact_for_the_precision_likelihood_shape():
    # f(c) = a log c - b c (a Gamma-shape log-likelihood) peaks at c = a / b with value
    # a log(a/b) - a; the refining curve family contains f, so both are recovered exactly.
    multipliers = 2.0 ** np.arange(-3, 4)
    a, b = np.array([[5.0], [40.0], [2.0]]), np.array([[4.0], [10.0], [0.05]])
    values = a * np.log(multipliers) - b * multipliers
    index = np.argmax(values, axis=-1)
    peak, top = refine_maximum(values, index, multipliers)
    np.testing.assert_allclose(peak[:2], (a / b)[:2, 0], rtol=1e-12)
    np.testing.assert_allclose(top[:2], (a * np.log(a / b) - a)[:2, 0], rtol=1e-12)
    # Maximum beyond the grid: the edge point itself.
    assert peak[2] == multipliers[-1] and top[2] == values[2, -1]
    np.testing.assert_allclose(interpolant_at(values, index, multipliers, peak), top)


def test_pilot_and_common_theta_estimate_theta_on_stationary_snapshots():
    # Source: design note section 2 (Var Y = pi (v + (1 - v)/n)) for the pilot; the composite
    # likelihood estimate is consistent for independent samples (Lindsay 1988). 50 tables:
    # SE from their spread; 5 SE, plus 3% for the refinement between grid points (module
    # docstring) on the common estimate.
    design = snapshot_design(400, 3000)
    counts, fit = neutral_batch(P, 40.0, None, design, 50, seed=5)
    pilot = pilot_theta(counts, design.depths.astype(float), fit.p)
    common = STAT.fit_dispersion(counts, design, fit).theta_common
    for estimate, allowance in ((pilot, 0.0), (common, 0.03 * 40.0)):
        se = estimate.std(ddof=1) / np.sqrt(estimate.size)
        assert abs(estimate.mean() - 40.0) < 5 * se + allowance


@pytest.mark.parametrize("theta", [10.0, 300.0])
def test_neutral_snapshot_statistic_is_near_one_at_any_theta(theta):
    # Source: Wilks (1938) Ann. Math. Stat. 9:60: with independent samples the LR of K' - 1
    # restrictions is asymptotically chi-square(K' - 1), so LR / (K' - 1) has mean 1 whatever
    # theta. With p_i fixed instead of profiled the mean was 3.5 at theta = 10 (module
    # docstring). 100 tables: SE of the mean from their spread; 5 SE plus 0.08 for the shares
    # of the rarest taxa, which sit near the boundary (measured 0.93-1.01).
    design = snapshot_design(60, varying_depths(60, seed=2))
    p = composition(40, seed=1)
    counts, fit = neutral_batch(p, theta, None, design, 100, seed=9)
    values = STAT.compute(counts, design, fit, None)
    se = values.std(ddof=1) / np.sqrt(values.size)
    assert abs(values.mean() - 1.0) < 5 * se + 0.08
    result = STAT.fit_dispersion(counts, design, fit)
    np.testing.assert_allclose(values, result.contribution.sum(axis=1)
                               / (result.used.sum(axis=1) - 1))


def test_autocorrelation_factor_is_the_variance_inflation_of_an_ar1_mean():
    # With every sample deep (f_t -> 1) and daily spacing, c = 1 + (2/T) sum_{k>=1} (T - k)
    # r^k, r = exp(-2 rate): the variance of the sum of T stationary AR(1) terms over T times
    # their variance (Box & Jenkins 1976, "Time Series Analysis", AR(1) autocorrelation r^k).
    n_samples, rate = 50, np.array([0.1, 0.7])
    design = daily_design(n_samples, 10**12)
    fit = NullFit(np.full((2, 3), 1 / 3), np.array([20.0, 20.0]), rate,
                  np.zeros(2, dtype=bool))
    lag = np.arange(1, n_samples)
    r = np.exp(-2 * rate)[:, None]
    expected = 1 + 2 * np.sum((n_samples - lag) * r**lag, axis=1) / n_samples
    np.testing.assert_allclose(autocorrelation_factor(design, fit), expected, rtol=1e-9)
    snapshot = NullFit(fit.p, fit.theta, None, fit.clipped)
    np.testing.assert_array_equal(autocorrelation_factor(snapshot_design(50), snapshot), 1.0)
    # Shallow samples carry mostly (independent) sampling noise: a smaller factor.
    shallow = daily_design(n_samples, 50)
    assert np.all(autocorrelation_factor(shallow, fit) < expected)


def test_autocorrelation_factor_dilutes_drift_by_the_technical_noise():
    # With Dirichlet-multinomial reads at precision C the read fraction of a taxon at share
    # x has variance x (1 - x)(g + (1 - g)/n), g = 1/(1 + C) (Mosimann 1962, Biometrika
    # 49:65; here from scipy.stats.dirichlet_multinomial), independent between samples, so
    # the drift share of sample t is f_t = v / (v + (1 - v) s_t) with s_t that variance over
    # x (1 - x). The factor is the double sum of the module docstring with those shares.
    theta, rate, precision, x = 60.0, 0.3, 150.0, 0.3
    depths = np.array([400, 3000, 800, 12000, 1500, 5000, 900, 2500])
    design = daily_design(depths.size, depths)
    noise = 1.0 / (1.0 + precision)
    fit = NullFit(np.full((1, 3), 1 / 3), np.array([theta]), np.array([rate]),
                  np.zeros(1, dtype=bool), np.array([noise]))
    reads = np.array([stats.dirichlet_multinomial([precision * x, precision * (1 - x)], n)
                      .var()[0] / n**2 for n in depths]) / (x * (1 - x))
    v = 1.0 / (1.0 + theta)
    weight = (v / (v + (1 - v) * reads)) ** 2
    lags = np.abs(np.subtract.outer(design.times, design.times))
    cross = np.sum(np.outer(weight, weight) * np.exp(-2 * rate * lags)) - np.sum(weight**2)
    np.testing.assert_allclose(autocorrelation_factor(design, fit),
                               1 + cross / weight.sum(), rtol=1e-9)
    noiseless = NullFit(fit.p, fit.theta, fit.rate, fit.clipped)
    assert autocorrelation_factor(design, fit)[0] < autocorrelation_factor(design, noiseless)[0]


@pytest.mark.slow
def test_autocorrelation_factor_removes_most_of_the_rate_dependence():
    # Neutral daily series (theta = 40, K = 40, T = 60): the raw composite LR more than
    # doubles from rate 1 to rate 0.25 per day (measured 58 -> 136) because dependent samples
    # are treated as independent; divided by c the means stay within 40% of each other
    # (measured 45 and 36). 100 tables each: SE of a mean ~2.5% (statistic) and ~3 (raw LR);
    # the bounds are more than 5 SE from the measured values.
    design = daily_design(60, varying_depths(60, seed=2))
    p = composition(40, seed=1)
    raw, adjusted = [], []
    for rate in (0.25, 1.0):
        counts, fit = neutral_batch(p, 40.0, rate, design, 100, seed=11)
        raw.append(STAT.fit_dispersion(counts, design, fit).contribution.sum(axis=1).mean())
        adjusted.append(STAT.compute(counts, design, fit, None).mean())
    assert raw[0] / raw[1] > 2.0
    assert 1.0 / 1.4 < adjusted[0] / adjusted[1] < 1.4


def test_shape_dtype_determinism_and_nonnegativity():
    design = daily_design(60, varying_depths(60, seed=2))
    counts, fit = neutral_batch(P, 40.0, 0.4, design, 12, seed=4)
    first = STAT.compute(counts, design, fit, np.random.default_rng(0))
    assert first.shape == (12,) and first.dtype == np.float64
    assert np.all(np.isfinite(first)) and np.all(first >= 0)
    np.testing.assert_array_equal(first, STAT.compute(counts, design, fit,
                                                      np.random.default_rng(5)))
    np.testing.assert_allclose(STAT.compute(counts[2:4], design, fit_rows(fit, slice(2, 4)),
                                            None), first[2:4], rtol=1e-9)


@pytest.mark.parametrize("design", [snapshot_design(80, 3000),
                                    daily_design(80, varying_depths(80, seed=2))],
                         ids=["snapshot", "series-100x-depths"])
def test_taxon_specific_dispersion_is_far_in_the_neutral_tail(design):
    # Niche: theta_i alternating 10 and 160 across taxa. All 40 niche values must exceed the
    # largest of 200 neutral values (theta 40, its geometric middle).
    counts, fit = neutral_batch(P, 40.0, 0.5, design, 200, seed=5)
    neutral = STAT.compute(counts, design, fit, None)
    thetas = np.where(np.arange(P.size) % 2 == 0, 10.0, 160.0)
    niche_counts, niche_fit = fitted(heterogeneous_dispersion(P, thetas, design, 40, seed=6),
                                     design)
    niche = STAT.compute(niche_counts, design, niche_fit, None)
    assert np.isfinite(neutral).all()
    assert niche.min() > neutral.max()


def test_absent_taxa_are_left_out_and_two_taxa_are_needed():
    design = daily_design(8, np.array([40, 400, 4000, 40000, 40, 400, 4000, 40000]))
    counts, fit = neutral_batch(composition(12, seed=3), 5.0, 0.5, design, 20, seed=1)
    counts[:4, :, -3:] = 0
    counts[:4, :, 0] = design.depths - counts[:4, :, 1:].sum(axis=2)
    _, fit = fitted(counts, design)
    result = STAT.fit_dispersion(counts, design, fit)
    assert np.all(result.contribution[:4, -3:] == 0)
    assert np.all(np.isnan(result.theta_taxon[:4, -3:]))
    values = STAT.compute(counts, design, fit, None)
    assert np.all(np.isfinite(values)) and np.all(values >= 0)
    lonely = np.zeros((2, 8, 3), dtype=np.int64)
    lonely[:, :, 1] = design.depths
    _, lonely_fit = fitted(lonely, design)
    assert np.all(np.isnan(STAT.compute(lonely, design, lonely_fit, None)))


@pytest.mark.parametrize("design", [snapshot_design(80, 3000),
                                    daily_design(80, varying_depths(80, seed=2))],
                         ids=["snapshot", "series"])
def test_diagnose_lists_taxon_thetas_and_contributions(design):
    thetas = np.where(np.arange(P.size) % 2 == 0, 10.0, 160.0)
    counts = heterogeneous_dispersion(P, thetas, design, 1, seed=6)
    _, fit = fitted(counts, design)
    table = STAT.diagnose(counts[0], design, fitted_model(fit, design), None)
    assert isinstance(table, pd.DataFrame)
    assert list(table.columns) == ["taxon", "p", "theta_taxon", "theta_common",
                                   "at_grid_edge", "lr_contribution"]
    assert np.all(np.diff(table["lr_contribution"].to_numpy()) <= 0)
    assert table["lr_contribution"].sum() == pytest.approx(
        STAT.compute(counts, design, fit, None)[0])
    # Planted theta_i = 10 (even taxa) and 160 (odd taxa) fall on either side of the common.
    even = table["taxon"] % 2 == 0
    common = table["theta_common"].iloc[0]
    assert table.loc[even, "theta_taxon"].median() < common
    assert table.loc[~even, "theta_taxon"].median() > common
