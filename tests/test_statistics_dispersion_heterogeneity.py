"""dispersion_heterogeneity: likelihood ratio of taxon-specific against one common theta."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import special, stats

from driftscreen.statistics.dispersion_heterogeneity import (
    DispersionHeterogeneity,
    pilot_theta,
    refine_maximum,
    interpolant_at,
    stirling_log_gamma,
    summarise_counts,
    theta_dependent_loglik,
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


def test_loglik_matches_scipy_betabinom_logpmf():
    # Source: scipy.stats.betabinom.logpmf summed over samples. Counts cover zeros, small
    # values (exact histogram path), large values (Stirling path), reads of the rest below
    # 32 (a dominant taxon) and depths below 32. Stirling's error is < 1/(360 x^3) per cell
    # at x >= 32 (Abramowitz & Stegun 6.1.41): < 2e-5 over these 60 samples.
    rng = np.random.default_rng(8)
    depths = np.concatenate([[1, 5, 31, 32, 33], rng.integers(40, 200000, 55)]).astype(float)
    p = np.array([[0.9, 0.05, 0.03, 0.015, 0.005], [0.2, 0.2, 0.2, 0.2, 0.2]])
    theta = np.array([3.0, 400.0])
    fractions = rng.dirichlet(theta[0] * p[0], size=(2, depths.size))
    counts = rng.multinomial(depths.astype(np.int64)[None, :], fractions).astype(np.int64)
    counts[0, 10, :] = [int(depths[10]) - 3, 1, 1, 1, 0]
    shape_a, shape_b = theta[:, None] * p, theta[:, None] * (1 - p)
    mine = theta_dependent_loglik(summarise_counts(counts, depths), shape_a, shape_b)
    reference = stats.betabinom.logpmf(counts, depths[None, :, None], shape_a[:, None, :],
                                       shape_b[:, None, :]).sum(axis=1)
    np.testing.assert_allclose(mine + _binomial_coefficients(counts, depths), reference,
                               rtol=0, atol=2e-5)


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


def test_diagnose_lists_taxon_thetas_and_contributions():
    design = snapshot_design(80, 3000)
    thetas = np.where(np.arange(P.size) % 2 == 0, 10.0, 160.0)
    counts = heterogeneous_dispersion(P, thetas, design, 1, seed=6)
    _, fit = fitted(counts, design)
    table = STAT.diagnose(counts[0], design, fit.model(0), None)
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
