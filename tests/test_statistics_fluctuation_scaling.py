"""fluctuation_scaling: Taylor's power-law exponent across taxa."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from driftscreen.neutral.fit import fitted_model
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.statistics.fluctuation_scaling import (
    FluctuationScaling,
    neutral_weights,
    slope_standard_error,
    taxon_moments,
    taylor_fit,
)
from test_statistics_synthetic import (
    composition,
    daily_design,
    fit_rows,
    fitted,
    lognormal_series,
    neutral_batch,
    snapshot_design,
    varying_depths,
)

STAT = FluctuationScaling()


@pytest.mark.parametrize("exponent", [1.0, 2.0, 1.37])
def test_taylor_fit_recovers_a_planted_exponent_on_noise_free_data(exponent):
    # Source: Taylor (1961) Nature 189:732: var = c mean^b, i.e. log var = log c + b log mean.
    mean = np.geomspace(1e-5, 0.2, 25)[None, :]
    variance = 0.3 * mean**exponent
    weights = np.random.default_rng(1).uniform(0.1, 1.0, mean.shape)
    intercept, slope = taylor_fit(mean, variance, np.ones_like(mean, dtype=bool), weights)
    assert slope[0] == pytest.approx(exponent, rel=1e-12)
    assert intercept[0] == pytest.approx(np.log(0.3), rel=1e-12)


def test_taylor_fit_ignores_unusable_taxa_and_needs_three():
    mean = np.array([[0.1, 0.01, 0.001, 0.5, 0.2], [0.1, 0.01, 0.3, 0.3, 0.3]])
    variance = np.array([[0.1, 0.01, 0.001, -1.0, 0.0], [1.0, 1.0, 1.0, 1.0, 1.0]])
    usable = np.array([[True, True, True, False, False], [True, True, False, False, False]])
    intercept, slope = taylor_fit(mean, variance, usable)
    assert slope[0] == pytest.approx(1.0) and intercept[0] == pytest.approx(0.0, abs=1e-12)
    assert np.isnan(slope[1]) and np.isnan(intercept[1])
    np.testing.assert_allclose(taylor_fit(mean, variance, usable, np.full((2, 5), 3.0))[1],
                               slope, rtol=1e-12)


def test_weighted_fit_and_its_standard_error_match_numpy_polyfit():
    # Source: numpy.polyfit with weights w minimises sum (w_i r_i)^2, so w = sqrt(weights)
    # gives the weighted least-squares line of log variance on log mean; with cov=True it
    # scales the covariance by the weighted residual sum of squares over n - 2, the
    # weighted least-squares standard error of the slope.
    rng = np.random.default_rng(4)
    mean = np.exp(rng.uniform(-9, -1, (3, 30)))
    variance = mean ** 1.3 * np.exp(rng.normal(0, 0.5, (3, 30)))
    weights = rng.uniform(0.01, 1.0, (3, 30))
    usable = rng.random((3, 30)) < 0.8
    intercept, slope = taylor_fit(mean, variance, usable, weights)
    se = slope_standard_error(mean, variance, usable, weights)
    for r in range(3):
        keep = usable[r]
        (b, c), cov = np.polyfit(np.log(mean[r, keep]), np.log(variance[r, keep]), 1,
                                 w=np.sqrt(weights[r, keep]), cov=True)
        assert slope[r] == pytest.approx(b, rel=1e-10)
        assert intercept[r] == pytest.approx(c, rel=1e-10)
        assert se[r] == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-10)


def test_slope_standard_error_matches_scipy_linregress_unweighted():
    # Source: scipy.stats.linregress, whose stderr is the ordinary least-squares standard
    # error of the slope, sqrt(sum r^2 / ((n - 2) Sxx)).
    rng = np.random.default_rng(8)
    mean = np.exp(rng.uniform(-9, -1, (2, 25)))
    variance = mean ** 1.2 * np.exp(rng.normal(0, 0.4, (2, 25)))
    se = slope_standard_error(mean, variance, np.ones_like(mean, dtype=bool))
    for r in range(2):
        fit = stats.linregress(np.log(mean[r]), np.log(variance[r]))
        assert se[r] == pytest.approx(fit.stderr, rel=1e-10)


def test_slope_standard_error_needs_one_residual_degree_of_freedom():
    mean = np.array([[0.1, 0.01, 0.001, 0.3]])
    variance = np.array([[0.02, 0.001, 0.0002, 0.05]])
    three = np.array([[True, True, True, False]])
    assert np.isfinite(slope_standard_error(mean, variance, three))[0]
    assert np.isnan(slope_standard_error(mean, variance, three & [[True, True, False, False]]))[0]


def test_standard_error_shrinks_with_more_samples_on_neutral_series():
    model = NeutralModel(composition(30, 3), 80.0, 0.5)
    rng = np.random.default_rng(12)
    errors = []
    for n_samples in (30, 240):
        design = daily_design(n_samples, 20_000)
        counts, fit = fitted(simulate(model, design, 40, rng), design)
        errors.append(np.median(STAT.standard_error(counts, design, fit, rng)))
    assert errors[1] < 0.75 * errors[0]  # residual misfit (the bend of p (1 - p)) stays


def test_weights_follow_the_relative_variance_of_the_corrected_variance():
    # 1/weight is the relative variance (times T) of the corrected variance predicted for a
    # neutral snapshot (module docstring: Var(s^2) ~ (kappa_4 + 2 sigma^4)/T, Beta excess
    # kurtosis ~6/(theta p)). Against 2000 simulated snapshots (the exact Dirichlet-
    # multinomial law) the ratio of the measured to the predicted value stays within a
    # factor 2 over shapes theta p = 0.06-45 (measured 0.69-1.35: the Gamma-limit kurtosis and
    # the omitted cross terms are approximations), and the rarest taxa are predicted noisier.
    design = snapshot_design(60, varying_depths(60, seed=2))
    p = composition(30, seed=1)
    for theta in (20.0, 300.0):
        counts = simulate(NeutralModel(p, theta), design, 2000, np.random.default_rng(3))
        corrected = taxon_moments(counts, design.depths).corrected
        measured = corrected.var(axis=0) / corrected.mean(axis=0) ** 2 * (design.n_samples - 1)
        predicted = 1.0 / neutral_weights(p[None], np.array([theta]), design.depths)[0]
        assert np.all((measured / predicted > 0.5) & (measured / predicted < 2.0)), theta
        assert predicted[-1] > 3 * predicted[0]
    assert np.all(neutral_weights(np.array([[0.5, 0.0, 0.5]]), np.array([10.0]),
                                  design.depths)[:, 1] == 0)


@pytest.mark.slow
def test_neutral_value_hardly_depends_on_theta():
    # Neutral snapshots of one community at theta = 10 and 500: unweighted, the slope fell
    # from 1.24 to 1.00 (rare taxa with theta p < 1 tilt it); weighted it moves by 0.015
    # (module docstring). 100 tables each: SE of the difference of the means ~0.007 from
    # their spread; bound 5 SE, far below the unweighted shift.
    design = snapshot_design(60, varying_depths(60, seed=2))
    p = composition(40, seed=1)
    means, ses, unweighted = [], [], []
    for theta in (10.0, 500.0):
        counts, fit = neutral_batch(p, theta, None, design, 100, seed=5)
        slope = STAT.compute(counts, design, fit, None)
        means.append(slope.mean())
        ses.append(slope.std(ddof=1) / np.sqrt(slope.size))
        moments = taxon_moments(counts, design.depths)
        usable = STAT.usable(moments)
        unweighted.append(taylor_fit(moments.mean, moments.corrected, usable)[1].mean())
    assert unweighted[0] - unweighted[1] > 0.15
    assert abs(means[0] - means[1]) < 5 * np.hypot(*ses)


def test_sampling_corrected_variance_estimates_the_drift_variance():
    # Source: design note section 2: in a stationary snapshot Var Y_i = pi_i (v + (1 - v)/n),
    # pi_i = p_i (1 - p_i), v = 1/(1 + theta), and E[Y (1 - Y)/(n - 1) | X] = X (1 - X)/n,
    # so the corrected variance has mean pi_i v. Pooled over taxa, ratio to sum pi_i v; 100
    # tables give its SE from their spread; 5 SE tolerance.
    p = composition(40, seed=1)
    theta = 20.0
    design = snapshot_design(400, 300)
    counts, _ = neutral_batch(p, theta, None, design, 100, seed=7)
    moments = taxon_moments(counts, design.depths)
    ratio = moments.corrected.sum(axis=1) / np.sum(p * (1 - p) / (1 + theta))
    se = ratio.std(ddof=1) / np.sqrt(ratio.size)
    assert abs(ratio.mean() - 1.0) < 5 * se


def test_taxon_moments_match_numpy():
    rng = np.random.default_rng(0)
    counts = rng.integers(0, 50, size=(3, 9, 5))
    depths = counts.sum(axis=2)[0]
    counts[1:] = counts[0]
    moments = taxon_moments(counts, depths)
    relative = counts[0] / depths[:, None]
    np.testing.assert_allclose(moments.mean[0], relative.mean(axis=0))
    np.testing.assert_allclose(moments.variance[0], relative.var(axis=0, ddof=1))
    sampling = np.mean(relative * (1 - relative) / (depths[:, None] - 1), axis=0)
    np.testing.assert_allclose(moments.corrected[0], relative.var(axis=0, ddof=1) - sampling)


def test_planted_exponents_one_and_two_from_counts():
    # Neutral with large shapes theta p_i (theta = 2000): var_i = pi_i v, so b is the
    # weighted slope of log p (1 - p) on log p over the taxa (design note section 2). Log-normal
    # multiplicative noise on rare taxa: var ~ (e^{s^2} - 1) mean^2, b = 2 (Taylor 1961;
    # Grilli 2020). 20 tables each: SE ~ 0.003 from their spread; the bounds allow 5 SE plus
    # the few-per-cent effect of normalising by the row sum (common practice).
    p = composition(300, seed=1, spread=0.7)
    design = snapshot_design(300, 10**7)
    counts, fit = neutral_batch(p, 2000.0, None, design, 20, seed=3)
    neutral = STAT.compute(counts, design, fit, np.random.default_rng(0))
    weights = neutral_weights(p[None], np.array([2000.0]), design.depths)[0]
    expected = np.polyfit(np.log(p), np.log(p * (1 - p)), 1, w=np.sqrt(weights))[0]
    assert abs(neutral.mean() - expected) < 0.02
    niche_counts, niche_fit = fitted(lognormal_series(p, 0.5, 0.0, design, 20, seed=8), design)
    niche = STAT.compute(niche_counts, design, niche_fit, np.random.default_rng(0))
    assert abs(niche.mean() - 2.0) < 0.05


def test_shape_dtype_determinism_and_snapshot_use():
    assert STAT.needs_time is False and STAT.alternative == "two-sided"
    p = composition(30, seed=2)
    for design in (daily_design(50, 3000), snapshot_design(50, 3000)):
        counts, fit = neutral_batch(p, 50.0, 0.5, design, 10, seed=1)
        first = STAT.compute(counts, design, fit, np.random.default_rng(0))
        assert first.shape == (10,) and first.dtype == np.float64
        assert np.all(np.isfinite(first))
        np.testing.assert_array_equal(first, STAT.compute(counts, design, fit,
                                                          np.random.default_rng(1)))
        np.testing.assert_array_equal(first[4:6], STAT.compute(counts[4:6], design,
                                                               fit_rows(fit, slice(4, 6)), None))


@pytest.mark.parametrize("depths", [3000, varying_depths(100, seed=3)], ids=["even", "100x"])
def test_multiplicative_noise_is_far_from_the_neutral_values(depths):
    # Two-sided: every niche value is further from the neutral median than any of 200
    # neutral values.
    p = composition(40, seed=1)
    design = daily_design(100, depths)
    counts, fit = neutral_batch(p, 30.0, 0.3, design, 200, seed=5)
    neutral = STAT.compute(counts, design, fit, np.random.default_rng(0))
    assert np.isfinite(neutral).all()
    niche_counts, niche_fit = fitted(lognormal_series(p, 0.5, 0.7, design, 40, seed=6), design)
    niche = STAT.compute(niche_counts, design, niche_fit, np.random.default_rng(0))
    centre = np.median(neutral)
    assert np.abs(niche - centre).min() > np.abs(neutral - centre).max()


def test_defined_on_short_sparse_neutral_series_and_nan_without_taxa():
    # Many zeros (theta = 3, depth 200), five samples, a few absent taxa.
    p = composition(25, seed=4)
    design = daily_design(5, np.array([200, 2000, 20000, 200, 900]))
    counts, fit = neutral_batch(p, 3.0, 0.2, design, 100, seed=2)
    values = STAT.compute(counts, design, fit, None)
    assert np.mean(np.isfinite(values)) > 0.95
    two_taxa = counts[:, :, :2].copy()
    two_taxa[:, :, 0] = design.depths - two_taxa[:, :, 1]
    _, two_fit = fitted(two_taxa, design)
    assert np.all(np.isnan(STAT.compute(two_taxa, design, two_fit, None)))


def test_diagnose_reports_the_fitted_line():
    p = composition(30, seed=2)
    design = daily_design(60, 4000)
    counts, fit = neutral_batch(p, 50.0, 0.5, design, 1, seed=1)
    model = fitted_model(fit, design)
    table = STAT.diagnose(counts[0], design, model, None)
    assert isinstance(table, pd.DataFrame)
    assert list(table.columns) == ["taxon", "mean", "variance", "raw_variance",
                                   "neutral_variance", "fitted_variance", "weight", "used",
                                   "intercept", "slope"]
    assert table["weight"].sum() == pytest.approx(1.0)
    assert np.all(table.loc[~table["used"], "weight"] == 0)
    slope = STAT.compute(counts, design, fit, None)[0]
    assert table["slope"].iloc[0] == pytest.approx(slope)
    np.testing.assert_allclose(table["neutral_variance"],
                               model.p * (1 - model.p) / (1 + model.theta))
    used = table[table["used"]]
    np.testing.assert_allclose(
        np.log(used["fitted_variance"]),
        used["intercept"] + used["slope"] * np.log(used["mean"]))
