"""The per-taxon scan: detection probability, units, p-values, planted departures, outputs."""

from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from driftscreen.calibrate import neutrality_test
from driftscreen.cli import main
from driftscreen.synthetic import neutral_collection, write_collection
from driftscreen.dataset import Dataset, Design
from driftscreen.neutral.model import NullFit
from driftscreen.report.tables import TAXA_COLUMNS, result_taxa_tsv
from driftscreen.report.format import WIDTH
from driftscreen.serialize import result_from_dict, result_to_dict
from driftscreen.synthetic import DesignSpec
from driftscreen.taxon_scan import (MIN_CENTRED, MIN_SHAPE, SMALLEST_RATIO, TaxonScan,
                                    across_datasets, centred_across_units, detection_depths,
                                    detection_probability, expected_occupancy,
                                    leave_one_out, occupancy_band, occupancy_tested,
                                    pooled_pvalues, randomised_sides, scan_pvalues, scan_units,
                                    compared_values, tie_draws, two_sided_pvalues, VERSION)

RNG_DRAWS = 400_000


def test_detection_probability_is_one_minus_the_beta_binomial_zero():
    # Source: scipy.stats.betabinom; Sloan et al. 2006 (Environ. Microbiol. 8:732) use the
    # beta distribution of the same neutral model for the occupancy prediction.
    depths = np.array([1, 10, 500, 20_000])
    for a, b in [(0.01, 40.0), (0.5, 99.5), (3.0, 7.0), (150.0, 50.0), (1e-4, 1000.0)]:
        expected = 1.0 - stats.betabinom.pmf(0, depths, a, b)
        # Both are float64 differences of log-beta functions, which lose up to ~1e-7 of
        # relative precision to cancellation at large depths.
        np.testing.assert_allclose(detection_probability(depths, a, b), expected, rtol=1e-6,
                                   atol=1e-14)
        # The zero term as a product, P(N = 0) = prod_{k < n} (b + k) / (a + b + k) (common
        # practice: the beta-binomial pmf at 0), summed in logs without cancellation.
        exact = [-np.expm1(-np.sum(np.log1p(a / (b + np.arange(n))))) for n in depths]
        np.testing.assert_allclose(detection_probability(depths, a, b), exact, rtol=1e-6,
                                   atol=1e-11)


def test_detection_probability_edges():
    assert detection_probability(100, 0.0, 5.0) == 0.0
    assert detection_probability(100, 5.0, 0.0) == 1.0


@pytest.mark.parametrize("theta, p, depth", [(50.0, 0.002, 1000), (20.0, 0.03, 300),
                                             (300.0, 0.001, 5000)])
def test_detection_probability_matches_a_direct_monte_carlo(theta, p, depth):
    # Common practice: draw the taxon's share from its stationary Beta law (design note,
    # section 1), then multinomial (binomial) reads; tolerance 5 Monte Carlo SE.
    rng = np.random.default_rng(11)
    shares = rng.beta(theta * p, theta * (1 - p), RNG_DRAWS)
    detected = np.mean(rng.binomial(depth, shares) > 0)
    se = np.sqrt(detected * (1 - detected) / RNG_DRAWS)
    formula = detection_probability(depth, theta * p, theta * (1 - p))
    assert abs(formula - detected) < 5 * se


@pytest.mark.parametrize("theta, p, depth, precision", [(50.0, 0.002, 1000, 300.0),
                                                        (50.0, 0.01, 5000, 100.0),
                                                        (300.0, 0.003, 10_000, 30.0)])
def test_expected_occupancy_with_noisy_reads_matches_a_direct_monte_carlo(theta, p, depth,
                                                                          precision):
    # Dirichlet-multinomial reads (Mosimann 1962, Biometrika 49:65): share X ~ Beta, read
    # composition Z ~ Beta(C X, C (1 - X)), reads Binomial(n, Z). The effective depth is an
    # approximation derived in driftscreen.taxon_scan; measured within 0.002 there.
    rng = np.random.default_rng(12)
    shares = rng.beta(theta * p, theta * (1 - p), RNG_DRAWS)
    reads = rng.beta(np.maximum(precision * shares, 1e-300), precision * (1 - shares))
    detected = np.mean(rng.binomial(depth, reads) > 0)
    se = np.sqrt(detected * (1 - detected) / RNG_DRAWS)
    formula = expected_occupancy(np.array([depth]), np.array([[p]]), np.array([theta]),
                                 np.array([1.0 / (1.0 + precision)]))[0, 0]
    assert abs(formula - detected) < 0.003 + 5 * se
    # The multinomial formula at the full depth would be far off.
    assert detection_probability(depth, theta * p, theta * (1 - p)) - detected > 0.02


def test_effective_depth_is_the_depth_without_noise_and_smaller_with_it():
    depths = np.array([100.0, 10_000.0])
    np.testing.assert_array_equal(detection_depths(depths, np.array([0.0]))[0], depths)
    noisy = detection_depths(depths, np.array([1.0 / 301.0]))[0]
    assert np.all(noisy < depths) and noisy[1] > noisy[0]
    # C -> inf: C (digamma(C + n) - digamma(C)) -> n.
    nearly = detection_depths(depths, np.array([1e-9]))[0]
    np.testing.assert_allclose(nearly, depths, rtol=1e-4)


def test_expected_occupancy_averages_the_samples_depths():
    depths = np.array([500, 2000, 500, 8000])
    p, theta = np.array([[0.01, 0.2]]), np.array([40.0])
    expected = expected_occupancy(depths, p, theta, np.array([0.0]))
    direct = np.mean([1 - stats.betabinom.pmf(0, n, theta[0] * p[0], theta[0] * (1 - p[0]))
                      for n in depths], axis=0)
    np.testing.assert_allclose(expected[0], direct, rtol=1e-10)


def test_units_partition_the_taxa_and_pool_only_rare_ones():
    rng = np.random.default_rng(3)
    p = rng.dirichlet(np.full(60, 0.3))
    theta = 80.0
    units = scan_units(p, theta)
    assert sorted(units.order.tolist()) == list(range(60))
    assert units.members.sum() == 60
    shapes = units.sums(theta * p)
    assert np.all(shapes[units.members > 1] >= MIN_SHAPE - 1e-12)
    alone = units.lead[units.members == 1]
    assert np.all(theta * p[alone][:-1] >= 0) and (units.members > 1).any()
    # A taxon of shape >= 1 is pooled only when it completes a group of rarer taxa.
    pooled = np.concatenate([units.order[s:s + m] for s, m in zip(units.starts, units.members)
                             if m > 1])
    assert np.sum(theta * p[pooled] >= MIN_SHAPE) <= np.count_nonzero(units.members > 1)
    # The lead of a pool is its most abundant member.
    for start, m, lead in zip(units.starts, units.members, units.lead):
        assert p[lead] == p[units.order[start:start + m]].max()


def randomised_equal_tailed(observed: float, null: np.ndarray, u: float) -> float:
    """The randomised two-sided Monte Carlo p-value, written from its definition: the
    observed value's rank among itself and the replicates, ties broken by u and spread over
    its cell, P = (#{replicates < x} + u (1 + #{replicates == x})) / (B + 1), doubled on its
    smaller side (randomised p-values for discrete statistics: Habiger 2015, arXiv:1412.0561,
    sec. 2; the (1 + #) / (B + 1) Monte Carlo p-value: Davison & Hinkley 1997, sec. 4.2)."""
    null = null[np.isfinite(null)]
    low = (np.sum(null < observed) + u * (1 + np.sum(null == observed))) / (null.size + 1)
    return min(1.0, 2 * min(low, 1 - low))


def test_pvalues_are_randomised_equal_tailed_bootstrap_pvalues():
    rng = np.random.default_rng(5)
    null = rng.gamma(2.0, size=(49, 2, 7))  # skewed
    null[3, 0, 1] = null[10, 1, 4] = np.nan
    null[:, 1, 6] = np.round(null[:, 1, 6])  # ties
    observed = rng.gamma(2.0, scale=2.0, size=(2, 7))
    observed[1, 6] = null[0, 1, 6]  # tied with several replicates
    draws, null_draws = rng.random((2, 7)), rng.random((49, 2, 7))
    pvalues, sides = two_sided_pvalues(observed, null, draws)
    loo = leave_one_out(null, null_draws)
    for s in range(2):
        for g in range(7):
            column = null[:, s, g]
            finite = np.isfinite(column)
            reference = randomised_equal_tailed(observed[s, g], column, draws[s, g])
            beyond = not (np.nanmin(column) <= observed[s, g] <= np.nanmax(column))
            if beyond:  # past every replicate on its side: the normal tail within the cell
                assert 0 < pvalues[s, g] <= 2 / (finite.sum() + 1)
                assert sides[s, g] == (1 if observed[s, g] > np.nanmax(column) else -1)
            else:
                assert pvalues[s, g] == pytest.approx(reference, abs=1e-15)
            for b in np.flatnonzero(finite):
                others = np.delete(column, b)
                expected = randomised_equal_tailed(column[b], others, null_draws[b, s, g])
                if np.nanmin(others) <= column[b] <= np.nanmax(others):
                    assert loo[b, s, g] == pytest.approx(expected, abs=1e-15)
                else:
                    assert 0 < loo[b, s, g] <= 2 / finite.sum()
            assert np.isnan(loo[~finite, s, g]).all()


def test_randomised_pvalues_of_a_discrete_statistic_are_exactly_uniform():
    # Exchangeable draws of a statistic with heavy ties (Poisson, mean 0.7): the randomised
    # rank p-value is Uniform(0, 1) exactly (Habiger 2015, arXiv:1412.0561, sec. 2), checked
    # with scipy.stats.kstest; the non-randomised one piles up at 1.
    rng = np.random.default_rng(11)
    values = rng.poisson(0.7, size=(20, 1, 4000)).astype(float)
    draws = rng.random((1, 4000))
    pvalues, _ = two_sided_pvalues(values[0], values[1:], draws, False)
    assert stats.kstest(pvalues[0], "uniform").pvalue > 0.01
    low, high = randomised_sides(np.array([3.0]), np.array([5.0]), np.array([11.0]),
                                 np.array([0.25]))
    assert (low[0], high[0]) == (pytest.approx((3 + 0.25 * 6) / 20), pytest.approx(1 - low[0]))
    leave = leave_one_out(values, rng.random(values.shape), False)
    assert stats.kstest(leave[:, 0].ravel()[::20], "uniform").pvalue > 0.01


def test_the_tail_beyond_the_replicates_orders_departures():
    rng = np.random.default_rng(6)
    null = rng.normal(size=(99, 1, 1))
    center = np.median(null)
    scale = np.sqrt(np.mean((null - center) ** 2))
    boundary = np.max(null) - center
    far = center + boundary * np.array([1.05, 1.15, 1.3])
    half = np.array([[0.5]])
    pvalues = [two_sided_pvalues(np.array([[x]]), null, half)[0][0, 0] for x in far]
    assert 0 < pvalues[2] < pvalues[1] < pvalues[0] < 2 / 100
    # The tail ratio is that of the normal law (scipy.stats.norm), down to its floor.
    ratio = stats.norm.sf((far[1] - center) / scale) / stats.norm.sf(boundary / scale)
    assert pvalues[1] == pytest.approx(2 * max(ratio, SMALLEST_RATIO) / 100, rel=1e-9)
    assert two_sided_pvalues(np.array([[center + 50.0]]), null, half)[0][0, 0] == \
        pytest.approx(2 * SMALLEST_RATIO / 100)
    # Without the tail (a discrete statistic), the draw U places it within its cell: above
    # every replicate, high = (1 - U) / (n + 1).
    assert two_sided_pvalues(np.array([[far[2]]]), null, np.array([[0.3]]),
                             np.array([False]))[0][0, 0] == pytest.approx(2 * 0.7 / 100)
    # A discrete law (one replicate in a hundred differs) gets no tail either.
    degenerate = np.zeros((99, 1, 1))
    degenerate[7] = 1.0
    assert two_sided_pvalues(np.array([[5.0]]), degenerate, half)[0][0, 0] == \
        pytest.approx(2 / 100)


def test_centring_across_units_removes_a_shared_shift_and_needs_enough_units():
    rng = np.random.default_rng(8)
    values = rng.normal(size=(3, 2, 9))
    values[1, 0, 4] = np.nan
    shifted = values + rng.normal(size=(3, 2, 1))  # one shift per table and statistic
    np.testing.assert_allclose(centred_across_units(shifted), centred_across_units(values))
    assert np.isnan(centred_across_units(values)[1, 0, 4])
    assert np.nanmedian(centred_across_units(values), axis=-1) == pytest.approx(0.0)
    # Persistence shifted alike in every unit of a table tests the same; with fewer units
    # than MIN_CENTRED nothing is centred.
    measures = rng.normal(size=(4, MIN_CENTRED)) ** 2
    scan = TaxonScan(scan_units(np.full(MIN_CENTRED, 1 / MIN_CENTRED), 100.0), True)
    moved = measures.copy()
    moved[3] += 0.7
    np.testing.assert_allclose(compared_values(moved, scan), compared_values(measures, scan))
    few = TaxonScan(scan_units(np.full(MIN_CENTRED - 1, 1 / (MIN_CENTRED - 1)), 100.0), True)
    assert compared_values(measures[:, 1:], few)[2] == pytest.approx(measures[3, 1:])


def test_tie_draws_come_from_the_stream_given():
    first = tie_draws(np.random.default_rng(9), (3, 6), 30)
    again = tie_draws(np.random.default_rng(9), (3, 6), 30)
    np.testing.assert_array_equal(first[0], again[0])
    np.testing.assert_array_equal(first[1], again[1])
    assert first[0].shape == (3, 6) and first[1].shape == (30, 3, 6)
    assert not np.array_equal(tie_draws(np.random.default_rng(10), (3, 6), 30)[0], first[0])


def test_occupancy_of_a_taxon_in_every_sample_of_every_replicate_is_tested_only_if_missed():
    rng = np.random.default_rng(10)
    null = rng.random((40, 4, 6))
    null[:, 0] = rng.integers(5, 11, size=(40, 6)) / 10
    null[:, 0, 2] = 1.0  # detected in every sample of every replicate
    observed = null[7] * 1.01
    observed[0] = np.minimum(observed[0], 1.0)
    tested = occupancy_tested(observed[0], occupancy_band(null))
    assert tested.tolist() == [True, True, False, True, True, True]
    scan = TaxonScan(scan_units(np.full(6, 1 / 6), 100.0), True)
    pvalues, _, combined = scan_pvalues(scan, observed, null, np.random.default_rng(3))
    assert np.isnan(pvalues[0, 2]) and np.isfinite(pvalues[1:, 2]).all()
    assert np.isfinite(combined).all()
    observed[0, 2] = 0.8  # missed in two samples of ten: below every replicate
    pvalues, sides, _ = scan_pvalues(scan, observed, null, np.random.default_rng(3))
    assert pvalues[0, 2] <= 2 / 41 and sides[0, 2] == -1


def test_pooled_pvalues_count_the_reference_at_least_as_large():
    reference = np.array([[0.1, 0.5, np.nan], [0.9, 2.0, 0.5]])
    np.testing.assert_allclose(pooled_pvalues(np.array([0.5, 3.0, np.nan]), reference),
                               [5 / 6, 1 / 6, np.nan])


def small_series(seed: int = 21, n_taxa: int = 25, samples: int = 40) -> Dataset:
    spec = DesignSpec(n_samples=samples, interval=1.0, depth=4000, depth_spread=0.2)
    return neutral_collection(1, spec, n_taxa, 60.0, 0.4, seed=seed, prefix="tank")[0]


def test_measures_are_vectorised_over_replicates():
    dataset = small_series()
    counts = np.stack([dataset.counts, dataset.counts[::-1], np.roll(dataset.counts, 3, 0)])
    p = counts.sum(axis=1) / counts.sum(axis=(1, 2))[:, None]
    fit = NullFit(p, np.array([50.0, 70.0, 30.0]), np.array([0.3, 0.5, 0.2]),
                  np.zeros(3, bool), np.array([0.0, 0.002, 0.0]))
    scan = TaxonScan(scan_units(p[0], 50.0), True)
    batch = scan.measure(counts, dataset.design, fit)
    for r in range(3):
        one = NullFit(p[r:r + 1], fit.theta[r:r + 1], fit.rate[r:r + 1], fit.clipped[r:r + 1],
                      fit.noise[r:r + 1])
        np.testing.assert_allclose(scan.measure(counts[r:r + 1], dataset.design, one)[0],
                                   batch[r], rtol=1e-12)


def with_planted_departure(dataset: Dataset, taxon: int) -> Dataset:
    """The taxon's reads removed from every other sample of the second half (a niche-like
    absence: the habitat excludes it there)."""
    counts = dataset.counts.copy()
    half = dataset.n_samples // 2
    counts[half::2, taxon] = 0
    design = Design(depths=counts.sum(axis=1), times=dataset.design.times)
    return replace(dataset, counts=counts, design=design)


@pytest.fixture(scope="module")
def planted():
    dataset = small_series()
    taxon = int(np.argsort(dataset.counts.sum(axis=0))[-3])  # the third most abundant
    return dataset.taxa[taxon], neutrality_test(with_planted_departure(dataset, taxon),
                                                replicates=199, groupings=20, seed=4)


def test_a_planted_absence_is_flagged_less_frequent(planted):
    name, result = planted
    scan = result.taxa
    row = scan[scan["taxon"] == name].iloc[0]
    assert row["q_value"] <= 0.05
    assert "less frequent" in row["direction"]
    assert row["occupancy"] < row["occupancy_low"]
    assert (scan["q_value"] <= 0.05).sum() <= 3  # the others stay mostly unflagged
    report = result.summary()
    assert "Taxa departing from neutrality" in report and name in report
    assert max(len(line) for line in report.splitlines()) <= WIDTH


def test_neutral_data_flag_no_taxon():
    result = neutrality_test(small_series(seed=22), replicates=99, groupings=20, seed=4)
    scan = result.taxa
    assert len(scan) > 5 and not (scan["q_value"] <= 0.05).any()
    assert set(scan.columns) >= {"persistence_effect", "persistence_p"}
    assert "No taxon departs at q <= 0.05" in result.summary()


def test_scan_survives_a_json_round_trip(planted):
    _, result = planted
    stored = result_from_dict(json.loads(json.dumps(result_to_dict(result))))
    pd.testing.assert_frame_equal(stored.taxa, result.taxa)
    assert result_taxa_tsv(stored) == result_taxa_tsv(result)


@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    spec = DesignSpec(n_samples=20, interval=None, depth=3000)
    datasets = neutral_collection(2, spec, 15, 40.0, 0.5, seed=23, prefix="pot")
    return write_collection(datasets, tmp_path_factory.mktemp("tables"))


def test_test_command_writes_the_taxa_table(tables, tmp_path, capsys):
    counts, metadata = tables
    path = tmp_path / "taxa.tsv"
    assert main(["test", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
                 "--dataset", "pot_1", "--replicates", "19", "--groupings", "10",
                 "--taxa", str(path)]) == 0
    header, *rows = path.read_text(encoding="utf-8").splitlines()
    assert header.split("\t") == list(TAXA_COLUMNS)
    cells = [row.split("\t") for row in rows]
    assert rows and all(len(c) == len(TAXA_COLUMNS) and c[0] == "pot_1" for c in cells)
    persistence = TAXA_COLUMNS.index("persistence_p")
    assert all(c[persistence] == "" for c in cells)  # snapshots have no persistence
    occupancy = [float(c[TAXA_COLUMNS.index("occupancy")]) for c in cells]
    assert all(0 <= x <= 1 for x in occupancy)


def test_across_datasets_uses_the_cauchy_combination_and_skips_pools():
    def table(rows):
        return pd.DataFrame(rows, columns=["taxon", "members", "combined_p", "q_value",
                                           "direction"])
    first = table([("A", 1, 0.001, 0.01, "more variable"), ("B", 1, 0.4, 0.8, ""),
                   ("C +3 rare", 4, 0.0001, 0.001, "less frequent")])
    second = table([("A", 1, 0.02, 0.04, "more variable; less frequent"),
                    ("B", 1, 0.7, 0.9, "")])
    across = across_datasets([first, second]).set_index("taxon")
    assert list(across.index) == ["A", "B"]
    # Liu & Xie 2020 (J. Am. Stat. Assoc. 115:393): T = mean tan((1/2 - p) pi),
    # p = 1/2 - arctan(T)/pi.
    for taxon, pvalues in {"A": [0.001, 0.02], "B": [0.4, 0.7]}.items():
        t = np.mean(np.tan((0.5 - np.array(pvalues)) * np.pi))
        assert across.loc[taxon, "combined_p"] == pytest.approx(0.5 - np.arctan(t) / np.pi)
    # Source: scipy.stats.false_discovery_control implements Benjamini & Hochberg (1995).
    np.testing.assert_allclose(across["q_value"],
                               stats.false_discovery_control(across["combined_p"], method="bh"))
    assert across.loc["A", "departing"] == 2 and across.loc["A", "datasets"] == 2
    assert across.loc["A", "directions"] == "more variable in 2, less frequent in 1"


def test_a_store_written_without_the_scan_is_refused(tables, tmp_path, capsys):
    counts, metadata = tables
    args = ["screen", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
            "--replicates", "9", "--groupings", "10", "--out", str(tmp_path), "--quiet"]
    assert main(args) == 0
    rows = (tmp_path / "taxa.tsv").read_text(encoding="utf-8").splitlines()[1:]
    assert {row.split("\t")[0] for row in rows} == {"pot_1", "pot_2"}
    settings = tmp_path / ".driftscreen" / "settings.json"
    stored = json.loads(settings.read_text(encoding="utf-8"))
    del stored["taxon_scan"]
    settings.write_text(json.dumps(stored), encoding="utf-8")
    assert main(args) == 2
    assert f"taxon scan: none there, {VERSION} now" in capsys.readouterr().err


def test_a_taxon_departing_in_every_dataset_is_reported_across_the_screen(tmp_path):
    spec = DesignSpec(n_samples=40, interval=1.0, depth=4000, depth_spread=0.2)
    datasets = [with_planted_departure(dataset, dataset.taxa.index("taxon_03"))
                for dataset in neutral_collection(3, spec, 25, 60.0, 0.4, seed=31,
                                                  prefix="subject")]
    counts, metadata = write_collection(datasets, tmp_path / "in")
    out = tmp_path / "out"
    assert main(["screen", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
                 "--time-by", "day", "--replicates", "99", "--groupings", "10", "--out",
                 str(out), "--quiet"]) == 0
    header, *lines = (out / "taxa_across.tsv").read_text(encoding="utf-8").splitlines()
    rows = {line.split("\t")[0]: dict(zip(header.split("\t"), line.split("\t")))
            for line in lines}
    planted = rows["taxon_03"]
    # Each dataset alone flags the 25% absence near the resolution of 99 replicates (its
    # combined p-value about 0.001-0.02 among 25 units); across the three it is clear.
    assert int(planted["datasets"]) == 3 and int(planted["departing"]) >= 1
    assert float(planted["q_value"]) <= 0.05 and "less frequent in" in planted["directions"]
    assert lines[0].startswith("taxon_03\t")  # the smallest q comes first
    report = (out / "report.txt").read_text(encoding="utf-8")
    section = report[report.index("Taxa departing across datasets"):]
    assert "taxon_03" in section.splitlines()[4]
    assert max(len(line) for line in report.splitlines()) <= WIDTH


def test_taxa_file_that_is_the_input_or_the_report_is_refused_before_any_work(tables,
                                                                              capsys):
    counts, metadata = tables
    base = ["test", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
            "--dataset", "pot_1", "--replicates", "9", "--groupings", "10"]
    before = counts.read_bytes()
    assert main(base + ["--taxa", str(counts)]) == 2
    assert "option --taxa" in capsys.readouterr().err
    assert counts.read_bytes() == before
    same = str(counts.parent / "out.txt")
    assert main(base + ["--taxa", same, "--output", same]) == 2
    assert "is also given as --output" in capsys.readouterr().err
