"""regrouping_invariance: every grouping of taxa drifts alike under neutrality."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from driftscreen.neutral.fit import fitted_model
from driftscreen.neutral.model import NeutralModel, NullFit
from driftscreen.neutral.simulate import simulate
from driftscreen.statistics.regrouping_invariance import (
    RegroupingInvariance,
    angular_transform,
    angular_variance_factor,
    draw_groupings,
    expected_innovation_variance,
    expected_read_weight,
    innovation_volatility,
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

STAT = RegroupingInvariance()
P = composition(30, seed=1)


@pytest.mark.parametrize("n, x", [(20, 0.5), (50, 0.15), (100, 0.3), (1000, 0.01), (5000, 0.5)])
def test_anscombe_angular_variance_under_binomial_sampling(n, x):
    # Source: Anscombe (1948) Biometrika 35:246: for N ~ Bin(n, x),
    # Var arcsin sqrt((N + 3/8)/(n + 3/4)) ~ 1/(4 n + 2); exact sums over scipy.stats.binom.pmf.
    # The design note (section 6) measured (4n + 2) Var = 1.000-1.003 for n x (1 - x) >= 5.
    k = np.arange(n + 1)
    weights = stats.binom.pmf(k, n, x)
    y = angular_transform(k[:, None].astype(float), np.full(n + 1, float(n)))[:, 0]
    mean = np.sum(weights * y)
    variance = np.sum(weights * (y - mean) ** 2)
    assert abs((4 * n + 2) * variance - 1.0) < 0.005


def _angular_factor_by_quadrature(theta, share):
    law = stats.beta(theta * share, theta * (1 - share))
    first = integrate.quad(lambda u: np.arcsin(np.sqrt(u)) * law.pdf(u), 0, 1, limit=200)[0]
    second = integrate.quad(lambda u: np.arcsin(np.sqrt(u)) ** 2 * law.pdf(u), 0, 1,
                            limit=200)[0]
    return 4 * (theta + 1) * (second - first**2)


@pytest.mark.parametrize("theta, share", [(40.0, 0.0005), (40.0, 0.005), (40.0, 0.02),
                                          (200.0, 0.005), (2000.0, 0.0005), (200.0, 0.5),
                                          (40.0, 0.3), (40.0, 0.995)])
def test_angular_variance_factor_against_numerical_integration(theta, share):
    # Source: 4 (theta + 1) Var[arcsin sqrt(Beta(theta P, theta (1 - P)))] by scipy quad;
    # design note section 6 quotes 1.00 +/- 0.05 once theta P (1 - P) >~ 4 and 0.08, 0.32,
    # 0.72 at theta P = 0.02, 0.1, 0.4. The Gamma approximation (capped at 1) is within 1%
    # for rare groups at theta >= 40 and misses the O(1/theta) excess above 1 at P ~ 1/2.
    exact = _angular_factor_by_quadrature(theta, share)
    approx = angular_variance_factor(np.array([theta]), np.array([[share]]))[0, 0]
    assert approx == pytest.approx(exact, rel=0.01 + 1.0 / theta)


@pytest.mark.parametrize("theta, share, depth", [(10.0, 0.01, 2000.0), (10.0, 0.3, 2000.0),
                                                 (300.0, 0.001, 20000.0), (40.0, 0.7, 500.0),
                                                 (30.0, 0.002, 10.0)])
def test_expected_read_weight_against_beta_expectation(theta, share, depth):
    # Source: E[min(1, c X (1 - X))] for X ~ Beta(theta P, theta (1 - P)) by numerical
    # integration against scipy.stats.beta.pdf; c = depth / 5 (Anscombe's transform holds its
    # variance from n x (1 - x) >= 5 reads, design note section 6). depth 10 is the branch
    # with c <= 4, where the expectation is c E[X (1 - X)] = c P (1 - P) theta / (theta + 1).
    law = stats.beta(theta * share, theta * (1.0 - share))
    scale = depth / 5.0
    exact = law.expect(lambda x: min(1.0, scale * x * (1.0 - x)), points=[0.5],
                       epsabs=1e-10, epsrel=1e-8)
    weight = expected_read_weight(np.array([theta]), np.array([[share]]), scale)[0, 0]
    assert weight == pytest.approx(exact, rel=1e-6, abs=1e-9)


def test_expected_read_weight_limits():
    # Concentrated law (theta P (1 - P) >> 1): the weight at the mean, min(1, c P (1 - P));
    # a group mostly absent (theta P << 1) weighs less than at its mean; 0 at P = 0 or 1.
    theta = np.array([1e7, 10.0])
    group_p = np.array([[0.001, 0.3, 0.0], [0.002, 0.3, 1.0]])
    weight = expected_read_weight(theta, group_p, 400.0)
    assert weight[0, 0] == pytest.approx(400.0 * 0.001 * 0.999, rel=1e-4)
    assert weight[0, 1] == pytest.approx(1.0, abs=1e-9)
    assert weight[1, 0] < 0.3 < min(1.0, 400.0 * 0.002 * 0.998)
    assert weight[0, 2] == weight[1, 2] == 0.0


def test_expected_innovation_variance_formula():
    # Source: Ornstein-Uhlenbeck conditional variance s (1 - exp(-2 rate dt)) for a process of
    # stationary variance s (Gardiner 2009, Stochastic Methods, sec. 3.8.4; common practice),
    # here s = f / (4 (theta + 1)) (design note section 6), plus Anscombe's 1/(4 n + 2) of the
    # later sample and exp(-2 rate dt) times that of the earlier one; long intervals give the
    # stationary variance plus the later sample's sampling part.
    depths = np.array([100.0, 1000.0, 10.0])
    intervals = np.array([0.5, 1e6])
    factor = np.array([[1.0, 0.25]])
    e = expected_innovation_variance(depths, intervals, np.array([9.0]), np.array([0.2]),
                                     factor)
    assert e.shape == (1, 2, 2)
    phi = np.exp(-0.1)
    assert e[0, 0, 0] == pytest.approx((1 - phi**2) / 40 + 1 / 4002 + phi**2 / 402)
    assert e[0, 1, 0] == pytest.approx(1 / 40 + 1 / 42)
    assert e[0, 1, 1] == pytest.approx(0.25 / 40 + 1 / 42)


def test_innovations_take_out_the_relaxation_of_the_mean():
    # Source: the neutral mean relaxes as E[x(t) | x0] = p + (x0 - p) exp(-rate t) (design
    # note section 2; Ornstein-Uhlenbeck conditional mean, Gardiner 2009 sec. 3.8.4). A
    # noiseless group on exactly that path has zero innovations, whatever its start; its
    # squared increments are not zero.
    times = np.arange(30.0)
    rate, mu = 0.2, 0.6
    y = mu + (0.1 - mu) * np.exp(-rate * times)
    depths = np.full(times.size, 1e6)
    reads = ((np.sin(y) ** 2) * (depths + 0.75) - 0.375)[None, :, None]
    volatility = innovation_volatility(reads, depths, np.diff(times), np.array([40.0]),
                                       np.array([rate]), np.array([[1.0]]))
    assert volatility[0, 0] == pytest.approx(0.0, abs=1e-9)
    assert np.all(np.isnan(innovation_volatility(reads[:, :2], depths[:2], np.diff(times[:2]),
                                                 np.array([40.0]), np.array([rate]),
                                                 np.array([[1.0]]))))


def test_a_relaxing_neutral_community_has_unit_volatility():
    # The same check as below, for replicates started far from the metacommunity (a
    # disturbed start): the innovations follow the relaxation, so v_G stays ~1.
    theta, rate = 40.0, 0.3
    design = daily_design(60, 5000)
    start = np.roll(P, 7)
    counts = simulate(NeutralModel(P, theta, rate), design, 200, np.random.default_rng(6),
                      start=np.broadcast_to(start, (200, P.size)))
    truth = NullFit(np.broadcast_to(P, (200, P.size)), np.full(200, theta), np.full(200, rate),
                    np.zeros(200, dtype=bool))
    groups = STAT.group_volatility(counts, design, truth, np.random.default_rng(1))
    share = groups.abundance[0]
    common = theta * share * (1 - share) > 5
    per_table = groups.volatility[:, common].mean(axis=1)
    se = per_table.std(ddof=1) / np.sqrt(per_table.size)
    assert common.sum() >= 10
    assert abs(per_table.mean() - 1.0) < 5 * se + 0.06


def test_groups_have_unit_volatility_under_the_true_neutral_model():
    # Source: design note sections 6 and 9: Var(eta) = e_t for every group (Anscombe's
    # sampling parts plus the OU conditional variance with the group's stationary angular
    # variance). The OU form is
    # an approximation between short and long intervals (the note measured 0.86-0.98 of the
    # classic formula at theta P (1 - P) ~ 1), and the cap at 1 misses the O(1/theta) excess
    # at P ~ 1/2 (2.5% at theta = 40): 6% allowance plus 5 SE (200 replicates, SE from their
    # spread). Without the factor f_G rare groups would sit near 0.5.
    theta, rate = 40.0, 0.3
    design = daily_design(150, varying_depths(150, seed=4, low=2000))
    counts = simulate(NeutralModel(P, theta, rate), design, 200, np.random.default_rng(5))
    truth = NullFit(np.broadcast_to(P, (200, P.size)), np.full(200, theta), np.full(200, rate),
                    np.zeros(200, dtype=bool))
    groups = STAT.group_volatility(counts, design, truth, np.random.default_rng(1))
    share = groups.abundance[0]
    spread = theta * share * (1 - share)
    for members in (spread < 2, spread > 5):
        per_table = groups.volatility[:, members].mean(axis=1)
        se = per_table.std(ddof=1) / np.sqrt(per_table.size)
        assert members.sum() >= 10
        assert abs(per_table.mean() - 1.0) < 5 * se + 0.06


def test_groupings_are_random_subsets_of_allowed_sizes_and_reproducible():
    members = draw_groupings(12, 500, np.random.default_rng(3))
    sizes = members.sum(axis=0)
    assert members.shape == (12, 500)
    assert sizes.min() >= 1 and sizes.max() <= 11
    assert set(np.unique(sizes)) == set(range(1, 12))
    np.testing.assert_array_equal(members, draw_groupings(12, 500, np.random.default_rng(3)))
    # A taxon is in a group of size s with probability s/K, so in half the groupings on
    # average (sizes uniform on 1..K-1, mean K/2); binomial SE sqrt(500 / 4) ~ 11; 5 SE.
    assert np.all(np.abs(members.sum(axis=1) - 250) < 5 * np.sqrt(500 / 4))
    assert draw_groupings(1, 10, np.random.default_rng(0)).shape == (1, 0)


def test_shape_dtype_and_same_groupings_for_the_same_seed():
    design = daily_design(60, varying_depths(60, seed=2))
    counts, fit = neutral_batch(P, 40.0, 0.3, design, 10, seed=4)
    first = STAT.compute(counts, design, fit, np.random.default_rng(7))
    assert first.shape == (10,) and first.dtype == np.float64
    assert np.all(np.isfinite(first)) and np.all(first > 0)
    np.testing.assert_array_equal(first, STAT.compute(counts, design, fit,
                                                      np.random.default_rng(7)))
    # A table's value does not depend on the batch it is in (same seed, same groupings).
    np.testing.assert_allclose(STAT.compute(counts[3:4], design, fit_rows(fit, slice(3, 4)),
                                            np.random.default_rng(7)), first[3:4], rtol=1e-12)
    assert not np.array_equal(first, STAT.compute(counts, design, fit, np.random.default_rng(8)))


@pytest.mark.parametrize("depths", [5000, varying_depths(100, seed=2)], ids=["even", "100x"])
def test_taxon_specific_volatility_is_far_in_the_neutral_tail(depths):
    # Niche: log-normal AR(1) noise with log-sd 0.15 for half the taxa and 0.6 for the other
    # half. All 40 niche values must exceed the largest of 200 neutral values.
    design = daily_design(100, depths)
    counts, fit = neutral_batch(P, 40.0, 0.3, design, 200, seed=5)
    neutral = STAT.compute(counts, design, fit, np.random.default_rng(1))
    log_sd = np.where(np.arange(P.size) % 2 == 0, 0.15, 0.6)
    niche_counts, niche_fit = fitted(lognormal_series(P, log_sd, 0.7, design, 40, seed=6),
                                     design)
    niche = STAT.compute(niche_counts, design, niche_fit, np.random.default_rng(1))
    assert np.isfinite(neutral).all()
    assert niche.min() > neutral.max()


def test_edge_cases_short_series_absent_taxa_and_undefined_designs():
    # Three samples (two innovations, one spent on each group's mean) with absent taxa and
    # a 100-fold depth range are enough; two samples leave no degree of freedom.
    design = daily_design(3, np.array([500, 50000, 5000]))
    counts, fit = neutral_batch(P, 40.0, 0.3, design, 5, seed=3)
    counts[:, :, -4:] = 0
    counts[:, :, 0] = design.depths - counts[:, :, 1:].sum(axis=2)
    _, fit = fitted(counts, design)
    values = STAT.compute(counts, design, fit, np.random.default_rng(0))
    assert np.all(np.isfinite(values))
    pair = daily_design(2, np.array([500, 50000]))
    assert np.all(np.isnan(STAT.compute(counts[:, :2], pair, fit, np.random.default_rng(0))))
    # Very shallow samples (30 reads): groups are down-weighted, never all dropped.
    shallow = daily_design(40, 30)
    counts, fit = neutral_batch(P, 40.0, 0.3, shallow, 20, seed=3)
    assert np.all(np.isfinite(STAT.compute(counts, shallow, fit, np.random.default_rng(0))))
    one = daily_design(1, 1000)
    single = np.zeros((2, 1, 3), dtype=np.int64)
    single[:, 0] = [500, 300, 200]
    single_fit = NullFit(np.full((2, 3), 1 / 3), np.full(2, 5.0), np.full(2, 1.0),
                         np.zeros(2, dtype=bool))
    assert np.all(np.isnan(STAT.compute(single, one, single_fit, np.random.default_rng(0))))
    lone = np.full((2, 4, 1), 1000, dtype=np.int64)
    lone_fit = NullFit(np.ones((2, 1)), np.full(2, 5.0), np.full(2, 1.0), np.zeros(2, dtype=bool))
    assert np.all(np.isnan(STAT.compute(lone, daily_design(4, 1000), lone_fit,
                                        np.random.default_rng(0))))
    snapshot = snapshot_design(4, 1000)
    with pytest.raises(ValueError):
        STAT.compute(lone, snapshot, NullFit(lone_fit.p, lone_fit.theta, None, lone_fit.clipped),
                     np.random.default_rng(0))


def test_diagnose_lists_groupings():
    design = daily_design(60, 4000)
    counts, fit = neutral_batch(P, 40.0, 0.3, design, 1, seed=2)
    table = RegroupingInvariance(n_groupings=25).diagnose(counts[0], design, fitted_model(fit, design),
                                                         np.random.default_rng(3))
    assert isinstance(table, pd.DataFrame)
    assert list(table.columns) == ["grouping", "size", "members", "mean_abundance",
                                   "volatility", "weight"]
    assert len(table) == 25
    assert all(len(m) == s for m, s in zip(table["members"], table["size"]))
    value = RegroupingInvariance(n_groupings=25).compute(counts, design, fit,
                                                         np.random.default_rng(3))[0]
    log_volatility = np.log(table["volatility"])
    centre = np.average(log_volatility, weights=table["weight"])
    assert value == pytest.approx(np.average((log_volatility - centre) ** 2,
                                             weights=table["weight"]))
    assert table["weight"].between(0, 1).all() and (table["weight"] == 1).any()
