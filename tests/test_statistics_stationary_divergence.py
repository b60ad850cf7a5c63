"""stationary_divergence: KL divergence from the neutral stationary abundance law."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import special, stats

from driftscreen.dataset import Design
from driftscreen.neutral.fit import fitted_model
from driftscreen.neutral.model import NeutralModel, NullFit
from driftscreen.neutral.simulate import simulate
from driftscreen.statistics.composition import (path_composition,
                                                precision_weighted_composition,
                                                relaxation_weights)
from driftscreen.statistics.stationary_divergence import (
    StationaryDivergence,
    class_edges,
    depth_bins,
    expected_class_probabilities,
    kl_divergence,
    miller_madow_bias,
    observed_class_frequencies,
    off_path,
    zero_probability,
)
from test_statistics_synthetic import (
    composition,
    daily_design,
    fit_rows,
    fitted,
    neutral_batch,
    on_off,
    snapshot_design,
    varying_depths,
)

STAT = StationaryDivergence()
P = composition(30, seed=1)


def test_kl_divergence_matches_scipy():
    # Source: KL(o || e) = sum o log(o / e) = scipy.stats.entropy(o, e) = sum rel_entr(o, e).
    rng = np.random.default_rng(3)
    observed = rng.dirichlet(np.ones(7), size=20)
    observed[:5, :3] = 0.0
    observed /= observed.sum(axis=1, keepdims=True)
    expected = rng.dirichlet(np.ones(7), size=20)
    mine = kl_divergence(observed, expected, floor=1e-12)
    np.testing.assert_allclose(mine, stats.entropy(observed, expected, axis=1), rtol=1e-12)
    np.testing.assert_allclose(mine, special.rel_entr(observed, expected).sum(axis=1), rtol=1e-12)


def test_miller_madow_bias_counts_occupied_classes():
    # Source: Miller (1955): the plug-in information estimate from T samples is biased by
    # (m - 1)/(2 T), m the number of occupied cells.
    observed = np.array([[0.5, 0.5, 0.0, 0.0], [0.25, 0.25, 0.25, 0.25], [1.0, 0, 0, 0]])
    np.testing.assert_allclose(miller_madow_bias(observed, 40), np.array([1, 3, 0]) / 80)


def test_bias_corrected_contributions_are_centred_for_independent_samples():
    # Source: Miller (1955) / Wilks (1938): 2 T KL(o || e) ~ chi-square with m - 1 degrees of
    # freedom when o is multinomial(T, e); the corrected plug-in KL then has mean ~ 0. Checked
    # at the exact class probabilities: draws of T = 400 samples over 6 classes, 4000 taxa.
    rng = np.random.default_rng(12)
    expected = np.array([0.3, 0.25, 0.2, 0.15, 0.07, 0.03])
    observed = rng.multinomial(400, expected, size=4000) / 400
    corrected = kl_divergence(observed, np.broadcast_to(expected, observed.shape), 1e-12)
    corrected -= miller_madow_bias(observed, 400)
    # chi-square_5 / 800 has sd sqrt(10)/800; SE of the mean over 4000: ~6e-5; 5 SE plus the
    # O(1/T^2) remainder (~1e-4 at T = 400; common practice).
    assert abs(corrected.mean()) < 5 * np.sqrt(10) / 800 / np.sqrt(4000) + 2e-4


def test_kl_divergence_floors_and_renormalises_expected():
    # An observed class with expected probability 0 costs o log(o / floor) after renormalising.
    observed = np.array([[0.5, 0.5, 0.0]])
    expected = np.array([[1.0, 0.0, 0.0]])
    floor = 1e-4
    q = np.array([1.0, floor, floor]) / (1.0 + 2 * floor)
    assert kl_divergence(observed, expected, floor)[0] == pytest.approx(
        stats.entropy(observed[0], q), rel=1e-12)


def test_zero_probability_is_the_beta_binomial_pmf_at_zero():
    # Source: BetaBinomial(n, a, b) P(N = 0) = B(a, b + n)/B(a, b) (Johnson, Kemp & Kotz 2005,
    # Univariate Discrete Distributions, ch. 6); compared with scipy.stats.betabinom.pmf.
    theta = np.array([3.0, 250.0])
    p = np.array([[0.001, 0.2, 0.7], [0.5, 0.01, 1e-5]])
    shape_b = theta[:, None] * (1 - p)
    depths = np.array([1.0, 40.0, 5000.0])
    mine = zero_probability(shape_b, theta, depths)
    reference = stats.betabinom.pmf(0, depths, (theta[:, None] * p)[..., None],
                                    shape_b[..., None])
    np.testing.assert_allclose(mine, reference, rtol=1e-9)


@pytest.mark.parametrize("depth", [50, 500, 5000])
def test_expected_classes_approximate_the_exact_beta_binomial(depth):
    # Source: exact class probabilities from scipy.stats.betabinom.cdf at the integer cuts
    # floor(n q_j). The moment-matched Beta cdf is an approximation; its error bound here
    # (0.03) is what the module docstring states, measured for these shapes.
    shape_a = np.array([[0.3, 2.0, 5.0, 0.02]])
    shape_b = np.array([[30.0, 50.0, 20.0, 50.0]])
    theta = (shape_a + shape_b)[:, 0]
    shape_b = theta[:, None] - shape_a
    edges = class_edges(shape_a, shape_b, 6)
    mine = expected_class_probabilities(shape_a, shape_b, theta, edges,
                                        np.array([float(depth)]), np.array([1.0]))
    cuts = np.floor(edges * depth)
    cdf = stats.betabinom.cdf(cuts, depth, shape_a[..., None], shape_b[..., None])
    p0 = stats.betabinom.pmf(0, depth, shape_a, shape_b)[..., None]
    exact = np.diff(np.concatenate([np.zeros_like(p0), p0, cdf, np.ones_like(p0)], axis=-1),
                    axis=-1)
    np.testing.assert_allclose(mine.sum(axis=-1), 1.0, rtol=1e-12)
    assert np.all(mine >= 0)
    assert np.abs(mine - exact).max() < 0.03


def test_precision_weighted_composition():
    # Equal depths: the pooled read fraction. Rows sum to 1, absent taxa get 0.
    rng = np.random.default_rng(4)
    counts = rng.integers(0, 30, size=(3, 8, 5))
    counts[..., 4] = 0
    counts[..., 0] += 200 - counts.sum(axis=2)
    depths = np.full(8, 200.0)
    composition = precision_weighted_composition(counts, depths, np.array([1.0, 10.0, 1e4]))
    np.testing.assert_allclose(composition, counts.sum(axis=1) / 1600.0, rtol=1e-12)
    # Varying depths: inverse-variance weights 1/(v + (1 - v)/n_t) give the smallest
    # variance among weighted means (Aitken 1935, Proc. R. Soc. Edinb. 55:42, generalised
    # least squares). Spread over 400 stationary tables against the pooled fraction: the
    # variance ratio is ~0.3 here, and a ratio of two variances from 400 tables has a
    # relative SE of ~0.1, so 0.6 is far outside chance.
    design = snapshot_design(40, varying_depths(40, seed=5, low=20, high=20000))
    counts, fit = neutral_batch(P, 5.0, None, design, 400, seed=6)
    weighted = precision_weighted_composition(counts, design.depths.astype(float),
                                              np.full(400, 5.0))
    np.testing.assert_allclose(weighted.sum(axis=1), 1.0)
    assert np.all(weighted.var(axis=0)[:5] < 0.6 * fit.p.var(axis=0)[:5])


def test_class_edges_are_beta_quantiles():
    # Source: scipy.stats.beta.ppf at j / M.
    edges = class_edges(np.array([[0.5, 4.0]]), np.array([[20.0, 9.0]]), 4)
    reference = stats.beta.ppf(np.arange(1, 4) / 4, np.array([[0.5], [4.0]]),
                               np.array([[20.0], [9.0]]))
    np.testing.assert_allclose(edges[0], reference, rtol=1e-10)


def test_observed_classes_count_samples_by_hand():
    # depth 10, edges 0.1 and 0.35: counts 0 | 1 | 3, 5 | 8 -> zero, (0, .1], (.1, .35], (.35, 1]
    counts = np.array([0, 1, 3, 5, 8, 0])[None, :, None]
    depths = np.full(6, 10.0)
    edges = np.array([[[0.1, 0.35]]])
    observed = observed_class_frequencies(counts, counts / depths[:, None], edges)
    np.testing.assert_allclose(observed[0, 0], np.array([2, 1, 1, 2]) / 6)


def disturbed_series(n_replicates: int, seed: int) -> tuple[np.ndarray, Design, np.ndarray,
                                                           np.ndarray, float]:
    """Neutral series whose three most abundant taxa start at a tenth of their share."""
    rng = np.random.default_rng(seed)
    start = P.copy()
    top = np.argsort(-P)[:3]
    start[top] /= 10
    design = Design(np.full(25, 20_000), np.arange(25.0))
    rate = 0.15
    counts = simulate(NeutralModel(P, 300.0, rate), design, n_replicates, rng,
                      start=start / start.sum())
    return counts, design, top, start / start.sum(), rate


def test_off_path_values_vary_about_p_after_a_disturbance():
    # The neutral mean relaxes as E[X(t)] = p + (x_0 - p) exp(-rate t) given the start x_0
    # (Ornstein-Uhlenbeck mean of the diffusion; Ewens 2004, "Mathematical Population
    # Genetics", ch. 5; design note, section 2), so Y_t - (Y_0 - p) e_t has mean p at every
    # later time, while the read fractions themselves are far below p early on.
    counts, design, top, start, rate = disturbed_series(400, seed=31)
    relative = counts / design.depths[:, None]
    weights = relaxation_weights(design, np.full(counts.shape[0], rate))
    np.testing.assert_allclose(weights[0], np.exp(-rate * design.times), rtol=1e-12)
    shifted = off_path(relative, np.broadcast_to(P, (counts.shape[0], P.size)), weights)
    assert shifted.shape == (400, 24, P.size)
    mean = shifted[:, :, top].mean(axis=0)
    se = shifted[:, :, top].std(axis=0, ddof=1) / np.sqrt(400)
    assert np.all(np.abs(mean - P[top]) < 5 * se + 1e-4)
    assert np.all(relative[:, 1:6, top].mean(axis=0) < 0.7 * P[top])


def test_path_composition_recovers_p_where_the_time_mean_does_not():
    counts, design, top, _, rate = disturbed_series(200, seed=32)
    theta = np.full(200, 300.0)
    weights = relaxation_weights(design, np.full(200, rate))
    depths = design.depths.astype(float)
    relaxed = path_composition(counts, depths, theta, weights)
    np.testing.assert_allclose(relaxed.sum(axis=1), 1.0)
    np.testing.assert_allclose(relaxed[:, top].mean(axis=0) / P[top], 1.0, atol=0.08)
    time_mean = precision_weighted_composition(counts, depths, theta)
    assert np.all(time_mean[:, top].mean(axis=0) / P[top] < 0.8)


def test_a_conditioned_null_measures_the_divergence_off_the_relaxation_path():
    # A neutral series starting from a bloom (one taxon at 40%) fills the outer classes of
    # the stationary law while it relaxes; taken off its relaxation path it is close to a
    # stationary series (60 daily samples, rate 0.2: 12 correlation times; measured excess of
    # the medians over the stationary series 0.80 against the stationary law, 0.15 off the
    # path; 60 series each).
    n, rate, theta = 60, 0.2, 300.0
    rng = np.random.default_rng(31)
    start = 0.6 * P
    start[10] += 0.4
    design = Design(np.full(60, 20_000), np.arange(60.0))
    model = NeutralModel(P, theta, rate)
    bloom = simulate(model, design, n, rng, start=start)
    stationary = simulate(model, design, n, rng)
    flat = NullFit(np.broadcast_to(P, (n, P.size)), np.full(n, theta), np.full(n, rate),
                   np.zeros(n, dtype=bool))
    along = NullFit(flat.p, flat.theta, flat.rate, flat.clipped, conditioned=True)

    def excess(fit: NullFit) -> float:
        return float(np.median(STAT.compute(bloom, design, fit, None))
                     - np.median(STAT.compute(stationary, design, fit, None)))

    assert excess(flat) > 0.5
    assert excess(along) < excess(flat) / 3


def test_samples_without_reads_stay_in_the_zero_class_off_the_path():
    # A taxon cut at the first sample has its later values raised by (p - Y_0) e_t: a sample
    # without reads stays in {N = 0}, so every class frequency is a share of the samples.
    counts = np.array([0, 0, 2, 0, 6])[None, :, None]
    shifted = np.array([0.05, 0.2, 0.3, 0.5, 0.6])[None, :, None]
    observed = observed_class_frequencies(counts, shifted, np.array([[[0.1, 0.4]]]))
    np.testing.assert_allclose(observed[0, 0], np.array([3, 0, 1, 1]) / 5)


def test_depth_bins_cover_all_samples_and_respect_the_bin_limit():
    depths = varying_depths(200, seed=1)
    representative, weight = depth_bins(depths, 8)
    assert 1 <= representative.size <= 8
    assert weight.sum() == pytest.approx(1.0)
    assert representative.min() >= depths.min() and representative.max() <= depths.max()
    single, single_weight = depth_bins(np.full(7, 1234), 8)
    np.testing.assert_array_equal(single, [1234.0])
    np.testing.assert_array_equal(single_weight, [1.0])


def test_shape_dtype_and_determinism():
    design = daily_design(60, varying_depths(60, seed=2))
    counts, fit = neutral_batch(P, 40.0, 0.3, design, 12, seed=4)
    first = STAT.compute(counts, design, fit, np.random.default_rng(0))
    second = STAT.compute(counts, design, fit, np.random.default_rng(99))
    assert first.shape == (12,) and first.dtype == np.float64
    assert np.all(np.isfinite(first))
    np.testing.assert_array_equal(first, second)
    # Each table's value does not depend on the rest of the batch (up to rounding).
    np.testing.assert_allclose(STAT.compute(counts[3:5], design, fit_rows(fit, slice(3, 5)),
                                            np.random.default_rng(0)), first[3:5], rtol=1e-9)


@pytest.mark.parametrize("design", [snapshot_design(80, 5000),
                                    daily_design(80, varying_depths(80, seed=2))],
                         ids=["snapshot", "series-100x-depths"])
def test_habitat_filtering_is_far_in_the_neutral_tail(design):
    # Niche: each taxon absent from ~30% of samples (habitat filtering). With 200 neutral
    # tables, at least 36 of 40 niche values must exceed the largest neutral value (power
    # >= 0.9 at level 1/200; rare taxa pooled with others lose some of their signal).
    counts, fit = neutral_batch(P, 30.0, 0.3, design, 200, seed=5)
    neutral = STAT.compute(counts, design, fit, np.random.default_rng(0))
    niche_counts, niche_fit = fitted(on_off(P, 30.0, 0.7, design, 40, seed=6), design)
    niche = STAT.compute(niche_counts, design, niche_fit, np.random.default_rng(0))
    assert np.isfinite(neutral).all()
    assert np.sum(niche > neutral.max()) >= 36


def test_absent_taxa_many_zeros_and_few_samples():
    # theta = 2 and 20 taxa at depth 300: most cells are zero; three samples only; two taxa
    # have no reads at all in some tables.
    design = daily_design(3, np.array([300, 3000, 30000]))
    counts, fit = neutral_batch(composition(20, seed=8), 2.0, 0.5, design, 30, seed=9)
    counts[:5, :, -2:] = 0
    counts[:5, :, 0] = design.depths - counts[:5, :, 1:].sum(axis=2)
    _, fit = fitted(counts, design)
    assert np.mean(counts == 0) > 0.5
    values = STAT.compute(counts, design, fit, np.random.default_rng(0))
    assert np.all(np.isfinite(values))
    parts = STAT.by_taxon(counts, design, fit)
    # absent taxa have p = 0: they sort first and join no group with reads
    absent = parts.pooled.p[:5] == 0
    assert np.all(absent[:, :2]) and np.all(parts.contribution[:5][absent] == 0.0)
    assert np.all(parts.divergence >= 0)


def test_rare_taxa_are_pooled_into_groups_of_shape_at_least_one():
    # Grouping property of the Dirichlet law (design note, section 6): pooled counts are the
    # sums of their members' counts, and every pool of rare taxa has theta P_G >= 1.
    design = snapshot_design(40, 2000)
    p = composition(60, seed=4)
    counts, fit = neutral_batch(p, 10.0, 0.5, design, 5, seed=3)
    parts = STAT.by_taxon(counts, design, fit)
    pooled = parts.pooled
    assert np.array_equal(pooled.counts.sum(axis=2), counts.sum(axis=2))
    pools = pooled.members > 1
    assert pools.any()
    assert np.all(fit.theta[:, None].repeat(60, 1)[pools] * pooled.p[pools] >= 1.0 - 1e-12)


def test_diagnose_reports_sorted_taxa_whose_contributions_sum_to_the_statistic():
    design = snapshot_design(80, 4000)
    counts = on_off(P, 30.0, 0.7, design, 1, seed=6)[0]
    _, fit = fitted(counts[None], design)
    model = fitted_model(fit, design)
    table = STAT.diagnose(counts, design, model, np.random.default_rng(0))
    assert isinstance(table, pd.DataFrame)
    assert list(table.columns) == ["taxon", "members", "p", "observed_zero_fraction",
                                   "expected_zero_fraction", "kl_divergence", "contribution",
                                   "variance_ratio", "direction"]
    assert np.all(np.diff(table["contribution"].to_numpy()) <= 0)
    total = STAT.compute(counts[None], design, fit, np.random.default_rng(0))[0]
    assert table["contribution"].sum() == pytest.approx(total)
    assert np.all(table["kl_divergence"] >= table["contribution"])
    # Habitat filtering makes the leading taxa absent more often than neutral predicts.
    top = table.iloc[:3]
    assert np.all(top["observed_zero_fraction"] > top["expected_zero_fraction"])


def test_diagnose_direction_follows_the_variance_ratio():
    model = NeutralModel(np.array([0.5, 0.3, 0.2]), 10.0)
    design = snapshot_design(4, 100)
    steady = np.array([[50, 30, 20]] * 4)
    table = STAT.diagnose(steady, design, model, np.random.default_rng(0))
    assert set(table["direction"]) == {"less variable"}
    assert np.all(table["variance_ratio"] == 0.0)

