"""A small, fast version of the validation study: a broken calibration turns CI red.

Neutral datasets (exact and discrete Wright-Fisher generators, regular and irregular sampling,
snapshots, weak and strong immigration) must be rejected at about the nominal rate, and clear
niche datasets must be rejected. A few shrunken datasets of every new neutral collection
(disturbed, Dirichlet-multinomial and log-normal noise, short) run through the test with loose
binomial bounds, and the generators themselves are checked: disturbed at the first sample,
technical noise with the Dirichlet-multinomial excess variance (Mosimann 1962), short
series, communities of at least 10^4 individuals. The full study is
`python -m driftscreen.calibration_study`.
"""

from __future__ import annotations

import itertools
from dataclasses import asdict, replace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from driftscreen.dataset import Design
from driftscreen.niche import StochasticLogistic
from driftscreen.calibration_study import (
    COLLECTIONS,
    MAX_GENERATIONS,
    MAX_GENERATIONS_PER_DAY,
    MIN_POPULATION,
    NEUTRAL_COLLECTIONS,
    NICHE_COLLECTIONS,
    OUTSIDE_NULL,
    WRIGHT_FISHER_MAX_SIZE,
    Scenario,
    bloom,
    colonisation,
    complete_pvalue_share,
    cut_top_taxa,
    disturbed_scenarios,
    lognormal_noise_scenarios,
    main,
    niche_reads,
    niche_scenarios,
    noise_scenarios,
    pvalue_columns,
    rejection_table,
    report,
    run_study,
    short_scenarios,
    simulate_scenario,
    study_scenarios,
    wright_fisher_community,
)

REPLICATES = 19
LEVEL = 0.2  # a high level gives many expected rejections, so the bound is tight


def small_neutral_scenarios() -> list[Scenario]:
    """48 small neutral datasets, all series covering >= 15 correlation times."""
    levels = itertools.product(("exact", "wright-fisher"), (1.0, None), (False, True),
                               (20.0, 200.0), (0.5, 1.0), (0.0, 0.5))
    scenarios = []
    for index, (generator, interval, irregular, theta, rate, spread) in enumerate(levels):
        if generator == "wright-fisher" and interval is None:
            generator = "exact"  # the discrete reference simulates time series only
        scenarios.append(Scenario(f"check_{index:02d}", generator, n_taxa=20, n_samples=40,
                                  interval=interval, irregular=irregular, depth=3_000,
                                  depth_spread=spread, theta=theta, rate=rate))
    return scenarios


@pytest.fixture(scope="module")
def neutral_study():
    return run_study(small_neutral_scenarios(), replicates=REPLICATES, groupings=40, seed=11,
                     jobs=1)


@pytest.mark.slow
def test_false_positive_rate_within_binomial_bounds(neutral_study) -> None:
    # Under a calibrated test the number of rejections at LEVEL among n datasets is
    # Binomial(n, LEVEL) (p-values of a Monte Carlo test with B = 19 are uniform on
    # {1/20, ..., 1}; LEVEL = 0.2 is a multiple of 1/20). Bounds at the 0.0005 tails of that
    # binomial law (common practice for a two-sided check at about 0.001).
    table = rejection_table(neutral_study, LEVEL)
    for row in table.itertuples():
        low = stats.binom.ppf(0.0005, row.datasets, LEVEL)
        high = stats.binom.isf(0.0005, row.datasets, LEVEL)
        assert low <= row.rejected <= high, (row.statistic, row.rejected, row.datasets)


@pytest.mark.slow
def test_every_statistic_has_pvalues_on_long_series(neutral_study) -> None:
    for column in pvalue_columns(neutral_study):
        assert np.isfinite(neutral_study[column]).sum() >= 20, column


@pytest.mark.slow
def test_clear_niche_structure_is_rejected() -> None:
    scenarios = niche_scenarios(3, "logistic") + niche_scenarios(3, "lotka-volterra")
    study = run_study(scenarios, replicates=REPLICATES, groupings=40, seed=5, jobs=1)
    # smallest attainable p-value is 1/(B+1) = 0.05
    assert np.sum(study["p_combined"] <= 0.1) >= 5


# --- the new neutral collections through the calibrated test ---------------------------

PER_COLLECTION = 6
BUILDERS = {
    "disturbed": lambda n, seed: disturbed_scenarios(n, seed),
    "noise100": lambda n, seed: noise_scenarios("noise100", n, seed),
    "noise300": lambda n, seed: noise_scenarios("noise300", n, seed),
    "noise1000": lambda n, seed: noise_scenarios("noise1000", n, seed),
    "lognormal-noise": lambda n, seed: lognormal_noise_scenarios(n, seed),
    "short": lambda n, seed: short_scenarios(n, seed),
}
#: Log-normal read noise multiplies each taxon's abundance: its variance grows as x^2, the
#: signature of multiplicative environmental noise, which the null (Dirichlet-multinomial
#: reads, variance x (1 - x)) does not and should not absorb. The study reports it as a
#: limitation; the calibration checks cover the collections inside the null.
WITHIN_NULL = sorted(set(BUILDERS) - set(OUTSIDE_NULL))


def binomial_bounds(n: int, level: float) -> tuple[float, float]:
    """Rejections of a calibrated test among n datasets lie within these 0.0005 tails of
    Binomial(n, level) (common practice for a two-sided check at about 0.001)."""
    return stats.binom.ppf(0.0005, n, level), stats.binom.isf(0.0005, n, level)


def small_collection_scenarios() -> list[Scenario]:
    """PER_COLLECTION datasets of every new neutral collection, shrunk to 20 taxa and at
    most 40 samples (same communities, disturbances and noise)."""
    return [replace(s, n_taxa=20, n_samples=min(s.n_samples, 40))
            for build in BUILDERS.values() for s in build(PER_COLLECTION, 3)]


@pytest.fixture(scope="module")
def collection_study():
    return run_study(small_collection_scenarios(), replicates=REPLICATES, groupings=40,
                     seed=13, jobs=1)


@pytest.mark.slow
def test_new_collections_pooled_within_binomial_bounds(collection_study) -> None:
    within = collection_study[collection_study["collection"].isin(WITHIN_NULL)]
    for row in rejection_table(within, LEVEL).itertuples():
        low, high = binomial_bounds(row.datasets, LEVEL)
        assert low <= row.rejected <= high, (row.statistic, row.rejected, row.datasets)


@pytest.mark.slow
@pytest.mark.parametrize("collection", WITHIN_NULL)
def test_new_collection_is_not_rejected_wholesale(collection_study, collection: str) -> None:
    # Few datasets per collection, so only a collapse shows: at LEVEL 0.2, 6 of 6
    # rejections have probability 6e-5 under a calibrated test.
    part = collection_study[collection_study["collection"] == collection]
    assert len(part) == PER_COLLECTION
    for row in rejection_table(part, LEVEL).itertuples():
        assert row.rejected <= binomial_bounds(row.datasets, LEVEL)[1], (
            row.statistic, row.rejected, row.datasets)


@pytest.mark.slow
def test_new_collections_run_end_to_end(collection_study) -> None:
    assert set(collection_study["collection"]) == set(BUILDERS)
    pvalues = collection_study[pvalue_columns(collection_study)].to_numpy(dtype=float)
    assert np.isfinite(pvalues).any(axis=1).all()  # every dataset got some p-value
    assert (collection_study["kept_taxa"] <= 20).all()
    assert "noise_precision_hat" in collection_study


# --- the generators --------------------------------------------------------------------


@pytest.mark.parametrize("collection", sorted(BUILDERS))
def test_wright_fisher_collections_stay_in_the_diffusion_domain(collection: str) -> None:
    # theta = 2 N m and rate = m g (haploid Wright-Fisher; design note section 1)
    scenarios = BUILDERS[collection](40, 5)
    sizes = np.array([s.population_size for s in scenarios])
    per_day = np.array([s.generations_per_day for s in scenarios])
    theta = np.array([s.theta for s in scenarios])
    rate = np.array([s.rate for s in scenarios])
    assert sizes.min() >= MIN_POPULATION and sizes.max() <= WRIGHT_FISHER_MAX_SIZE
    assert per_day.max() <= MAX_GENERATIONS_PER_DAY
    assert np.all(per_day * 1.5 * np.array([s.n_samples for s in scenarios]) <= MAX_GENERATIONS)
    np.testing.assert_allclose([2 * s.population_size * s.immigration for s in scenarios], theta)
    np.testing.assert_allclose([s.immigration * s.generations_per_day for s in scenarios], rate)
    assert theta.min() == 10 and theta.max() == 1000 and len(set(theta)) == 5
    assert rate.min() == 0.05 and rate.max() == 1.0
    assert {s.irregular for s in scenarios} == {False, True}
    assert {s.depth_spread for s in scenarios} == {0.0, 0.5}
    assert 15 <= min(s.n_taxa for s in scenarios) and max(s.n_taxa for s in scenarios) <= 100


def test_simulated_series_lie_on_the_generation_grid() -> None:
    for scenario in short_scenarios(4, 6) + disturbed_scenarios(3, 6):
        dataset = simulate_scenario(scenario, 7)
        generations = dataset.design.times * scenario.generations_per_day
        np.testing.assert_allclose(generations, np.rint(generations), atol=1e-6)
        assert np.all(np.diff(np.rint(generations)) >= 1)
        assert generations[-1] <= MAX_GENERATIONS
        assert dataset.n_samples == scenario.n_samples


def test_short_series_have_10_to_25_samples() -> None:
    scenarios = short_scenarios(40, 8)
    lengths = [s.n_samples for s in scenarios]
    assert min(lengths) == 10 and max(lengths) == 25
    assert {s.irregular for s in scenarios} == {False, True}
    for scenario in scenarios[:3]:
        dataset = simulate_scenario(scenario, 9)
        assert dataset.design.is_time_series and 10 <= dataset.n_samples <= 25


def test_study_scenarios_per_collection_and_deterministic() -> None:
    scenarios = study_scenarios(COLLECTIONS, 4, 2, seed=3)
    sizes = pd.Series([s.collection for s in scenarios]).value_counts()
    for collection in NEUTRAL_COLLECTIONS:
        assert sizes[collection] == (2 if collection == "lognormal-noise" else 4)
    for collection in NICHE_COLLECTIONS:
        assert sizes[collection] == 2
    assert len({s.name for s in scenarios}) == len(scenarios)
    assert study_scenarios(COLLECTIONS, 4, 2, seed=3) == scenarios
    assert study_scenarios(COLLECTIONS, 4, 2, seed=4) != scenarios
    assert all(s.read_precision == 300 for s in scenarios if s.collection.endswith("noise300"))


def relaxed_community(disturbance: str, strength: float) -> Scenario:
    """A fast-relaxing, large-theta community: 60 daily samples at depth 20,000."""
    return Scenario("relaxing", "wright-fisher", n_taxa=30, n_samples=60, interval=1.0,
                    irregular=False, depth=20_000, depth_spread=0.0, theta=1000.0, rate=1.0,
                    collection="disturbed", population_size=100_000, generations_per_day=200.0,
                    disturbance=disturbance, disturbance_strength=strength)


def proportions(scenario: Scenario, seed: int) -> np.ndarray:
    counts = simulate_scenario(scenario, seed).counts
    return counts / counts.sum(axis=1, keepdims=True)


def sharply_reduced(y: np.ndarray) -> np.ndarray:
    """Taxa above 3% of the relaxed community (days 30-59, 30 correlation times after the
    start) whose share at the first sample is below 0.3 of it (a 4-sd drop at theta 1000)."""
    relaxed = y[30:].mean(axis=0)
    return np.flatnonzero((relaxed > 0.03) & (y[0] < 0.3 * relaxed))


def test_cut_disturbance_shows_at_the_first_sample() -> None:
    # The three taxa most abundant just before the first sample were cut to a tenth, so
    # (after renormalisation) the odds of their share are a tenth of the relaxed odds.
    y = proportions(relaxed_community("cut-top3", 0.1), 21)
    cut = sharply_reduced(y)
    relaxed = y[30:].mean(axis=0)
    assert len(cut) == 3 and set(cut) <= set(np.argsort(relaxed)[-5:])
    first, later = y[0, cut].sum(), relaxed[cut].sum()
    odds_ratio = (first / (1 - first)) / (later / (1 - later))
    assert 0.07 < odds_ratio < 0.14, odds_ratio
    # the check can fail: without a disturbance no taxon drops
    assert len(sharply_reduced(proportions(relaxed_community("none", np.nan), 21))) == 0


def test_bloom_and_colonisation_show_at_the_first_sample() -> None:
    y = proportions(relaxed_community("bloom", 0.5), 22)
    assert abs(y[0].max() - 0.5) < 0.02 and y[30:].mean(axis=0).max() < 0.4
    y = proportions(relaxed_community("colonisation", 1.0), 23)
    relaxed = y[30:].mean(axis=0)
    assert 0.5 * np.abs(y[0] - relaxed).sum() > 0.3
    assert 0.5 * np.abs(y[-1] - relaxed).sum() < 0.1


def test_disturbance_functions() -> None:
    rng = np.random.default_rng(24)
    x = np.array([[0.4, 0.1, 0.3, 0.2, 0.0]])
    expected = np.array([0.04, 0.1, 0.03, 0.02, 0.0]) / 0.19
    np.testing.assert_allclose(cut_top_taxa(x, rng, factor=0.1), [expected])
    # a bloom sets one random taxon to its share; the others keep their ratios
    bloomed = bloom(np.repeat(x, 50, axis=0), rng, share=0.45)
    bloomer = np.argmax(np.isclose(bloomed, 0.45), axis=1)
    expected = x * (0.55 / (1 - x[0, bloomer]))[:, None]
    expected[np.arange(50), bloomer] = 0.45
    np.testing.assert_allclose(bloomed, expected)
    assert len(set(bloomer)) == 5
    # Source: Dirichlet(a) has mean a / sum(a) (textbook property).
    shape = np.array([2.0, 5.0, 13.0])
    fresh = colonisation(np.zeros((40_000, 3)), rng, shape=shape)
    se = fresh.std(axis=0) / np.sqrt(fresh.shape[0])
    assert np.all(np.abs(fresh.mean(axis=0) - shape / shape.sum()) < 4.5 * se)


def paired_design(pairs: int, depth: int, generations_per_day: float) -> Design:
    """Pairs of samples one generation apart, one pair a day: lag ~0 within a pair."""
    days = np.arange(pairs, dtype=float)
    times = np.column_stack([days, days + 1.0 / generations_per_day]).ravel()
    return Design(depths=np.full(2 * pairs, depth), times=times)


def noise_scenario(**noise) -> Scenario:
    return Scenario("paired", "wright-fisher", n_taxa=30, n_samples=2, interval=1.0,
                    irregular=False, depth=2_000, depth_spread=0.0, theta=100.0, rate=0.5,
                    collection="noise", population_size=20_000, generations_per_day=200.0,
                    **noise)


def lag_zero_z(counts: np.ndarray, depth: int, precision: float, population: int) -> float:
    """z of the squared differences within pairs against the Dirichlet-multinomial excess.

    Source: Mosimann 1962 (Biometrika 49:65): given the composition x, reads at precision
    C have Var N_i = n x_i (1 - x_i) f with f = (n + C) / (1 + C), so two samples of the
    same community differ by E (N_i1 - N_i2)^2 = 2 n x_i (1 - x_i) f. One generation of
    Wright-Fisher drift between them adds about n^2 x_i (1 - x_i) / N (binomial offspring
    variance, from memory). x_i is estimated by the pair's pooled fraction, whose
    x(1 - x) is low by the factor 1 - f / (2n).
    """
    f = 1.0 if np.isinf(precision) else (depth + precision) / (1 + precision)
    first, second = counts[0::2], counts[1::2]
    pooled = (first + second) / (2.0 * depth)
    heterozygosity = pooled * (1 - pooled) / (1 - f / (2 * depth))
    excess = ((first - second) ** 2).sum(axis=1) \
        - (heterozygosity * (2 * depth * f + depth ** 2 / population)).sum(axis=1)
    return float(excess.mean() / (excess.std(ddof=1) / np.sqrt(excess.size)))


def test_noise_reads_have_the_dirichlet_multinomial_excess_at_lag_zero() -> None:
    scenario = noise_scenario(read_precision=100.0)
    design, counts = wright_fisher_community(scenario, paired_design(150, 2_000, 200.0),
                                             np.random.default_rng(25))
    assert np.all(np.diff(np.rint(design.times * 200.0))[0::2] == 1)
    assert abs(lag_zero_z(counts, 2_000, 100.0, 20_000)) < 4.5
    for wrong in (300.0, np.inf):  # the check can fail
        assert abs(lag_zero_z(counts, 2_000, wrong, 20_000)) > 4.5


def test_lognormal_noise_spreads_log_ratios() -> None:
    # Within a pair the log ratio of two taxa changes by sd (Z_i1 - Z_j1 - Z_i2 + Z_j2)
    # plus sampling error: variance 4 sd^2 + sum of 1/(n y) over the four counts (delta
    # method for a binomial log count, common practice); normalisation cancels in a ratio.
    sd, depth = 0.35, 20_000
    scenario = noise_scenario(lognormal_sd=sd)
    _, counts = wright_fisher_community(scenario, paired_design(300, depth, 200.0),
                                        np.random.default_rng(26))
    i, j = np.argsort(counts.sum(axis=0))[-2:]
    log_ratio = np.log(counts[:, i] / counts[:, j])
    change = log_ratio[0::2] - log_ratio[1::2]
    sampling = np.mean(1 / counts[0::2, i] + 1 / counts[0::2, j] + 1 / counts[1::2, i]
                       + 1 / counts[1::2, j])
    centred = change - change.mean()
    se = np.sqrt((np.mean(centred ** 4) - np.mean(centred ** 2) ** 2) / change.size)
    assert abs(change.var(ddof=1) - (4 * sd ** 2 + sampling)) < 4.5 * se
    assert abs(change.var(ddof=1) - (4 * 0.2 ** 2 + sampling)) > 4.5 * se  # can fail


def test_niche_reads_at_finite_precision_are_dirichlet_multinomial() -> None:
    # A logistic community without environmental noise stays at its capacities, so its
    # samples are independent Dirichlet-multinomial draws around one composition x:
    # Var N_i = n x_i (1 - x_i) (n + C) / (1 + C) (Mosimann 1962, Biometrika 49:65).
    depth, precision, n_samples = 1_000, 300.0, 600
    design = Design(depths=np.full(n_samples, depth), times=np.arange(n_samples, dtype=float))
    counts = niche_reads(StochasticLogistic(12, strength=0.0, spread_decades=1.0), design,
                         precision, np.random.default_rng(27))
    x = counts.sum(axis=0) / counts.sum()
    for truth, bound in ((precision, lambda z: z < 4.5), (np.inf, lambda z: z > 4.5)):
        f = 1.0 if np.isinf(truth) else (depth + truth) / (1 + truth)
        expected = depth * x * (1 - x) * f
        centred = counts - counts.mean(axis=0)
        se = np.sqrt((np.mean(centred ** 4, axis=0) - np.mean(centred ** 2, axis=0) ** 2)
                     / n_samples)
        z = np.abs(counts.var(axis=0, ddof=1) - expected) / se
        assert bound(z.max() if np.isfinite(truth) else z.min()), (truth, z)


# --- the report and the command line --------------------------------------------------


def synthetic_rows(collection: str, rejected: int, total: int, **fields) -> list[dict]:
    """Rows as run_scenario makes them, with ``rejected`` of ``total`` p_combined <= 0.05."""
    base = asdict(Scenario("x", "wright-fisher", 20, 30, 1.0, False, 2_000, 0.0, theta=100.0,
                           rate=0.5, collection=collection, **fields))
    rows = []
    for index in range(total):
        rows.append(dict(base, name=f"{collection}_{index}", correlation_times=20.0,
                         noise_precision_hat=np.nan, p_combined=0.01 if index < rejected else 0.5,
                         p_other=np.nan if index == 0 else 0.5))
    return rows


def test_report_has_a_table_per_collection_with_band_verdicts() -> None:
    neutral = pd.DataFrame(synthetic_rows("stationary", 1, 20)
                           + synthetic_rows("noise100", 10, 20, read_precision=100.0))
    neutral.loc[neutral["collection"] == "noise100", "noise_precision_hat"] = 120.0
    niche = pd.DataFrame(synthetic_rows("logistic-noise300", 20, 20))
    text = report(neutral, niche, 0.05, "python -m driftscreen.calibration_study --neutral 20", 60.0)
    assert "    python -m driftscreen.calibration_study --neutral 20" in text
    assert "target band is 0.03 to 0.07 at alpha = 0.05" in text
    lines = text.splitlines()
    stationary = lines.index("### stationary (20 datasets)")
    noise = lines.index("### noise100 (20 datasets)")
    combined = [n for n, line in enumerate(lines) if line.startswith("| combined |")]
    first, second = lines[combined[0]], lines[combined[1]]
    assert stationary < combined[0] < noise < combined[1]
    assert first.startswith("| combined | 20 | 1 | 0.050 |") and first.endswith("inside |")
    assert second.startswith("| combined | 20 | 10 | 0.500 |") and second.endswith("above |")
    assert "### logistic-noise300 (20 datasets)" in text
    assert "| noise100 | 100 | 20 | 120 |" in text  # precision estimates against the truth
    # one dataset per collection lacks p_other: 38 of 40 long series have every p-value
    assert "38 of 40 neutral time series with at least 25 samples" in text


def test_complete_pvalue_share_counts_long_time_series_only() -> None:
    rows = synthetic_rows("short", 0, 4)
    rows[1]["n_samples"] = 24  # too short to count
    rows[2]["interval"] = None  # a snapshot
    assert complete_pvalue_share(pd.DataFrame(rows)) == (1, 2)  # row 0 lacks p_other


@pytest.mark.slow
def test_command_line_runs_chosen_collections(tmp_path) -> None:
    out, table = tmp_path / "v.md", tmp_path / "v.tsv"
    assert main(["--collections", "short,logistic-noise300", "--neutral", "2", "--niche", "1",
                 "--replicates", "9", "--groupings", "20", "--jobs", "1", "--out", str(out),
                 "--table", str(table)]) == 0
    text = out.read_text()
    assert "### short (2 datasets)" in text and "### logistic-noise300 (1 datasets)" in text
    assert "--collections short,logistic-noise300" in text
    rows = pd.read_csv(table, sep="\t")
    assert list(rows["collection"]) == ["short", "short", "logistic-noise300"]
    assert "noise_precision_hat" in rows


@pytest.mark.parametrize("argv", [["--collections", "stationary,nonsense"],
                                  ["--neutral", "-1"],
                                  ["--collections", "short", "--neutral", "0"]])
def test_bad_command_lines_are_one_line_errors(argv, capsys) -> None:
    with pytest.raises(SystemExit) as stopped:
        main(argv)
    assert stopped.value.code == 2
    message = capsys.readouterr().err
    assert message.count("\n") == 1 and "error:" in message and "Traceback" not in message


# --- the per-taxon scan --------------------------------------------------------------------

@pytest.mark.slow
def test_neutral_datasets_rarely_flag_a_taxon(neutral_study) -> None:
    # Under the global null Benjamini-Hochberg at 0.05 controls the familywise rate at 0.05
    # (Benjamini & Hochberg 1995): datasets with any taxon at q <= 0.05 are at most
    # Binomial(n, 0.05), bounded here at its 0.0005 upper tail (common practice).
    flagged = int((neutral_study["taxa_flagged"] > 0).sum())
    assert flagged <= stats.binom.isf(0.0005, len(neutral_study), 0.05)
    assert (neutral_study["taxa_units"] >= 2).all()
    for column in ("taxon_p_variability", "taxon_p_combined"):
        values = neutral_study[column].dropna()
        assert len(values) >= 40 and values.between(0, 1).all()


@pytest.mark.slow
def test_tracking_taxa_are_flagged_first() -> None:
    study = run_study(niche_scenarios(4, "tracking"), replicates=99, groupings=40, seed=6,
                      jobs=1)
    # Five of 40 taxa respond to the environment: by chance, 5 of the 5 taxa of smallest q
    # would hold 5/40 of them on average (overlap 0.125).
    assert study["top_overlap"].mean() >= 0.3
    assert (study["taxa_flagged"] > 0).sum() >= 2


def test_report_has_the_per_taxon_section() -> None:
    rows = []
    for index, (collection, generator) in enumerate([("stationary", "exact"),
                                                     ("tracking", "tracking")] * 6):
        rows.append({"name": f"d{index}", "collection": collection, "generator": generator,
                     "interval": 1.0, "theta": 50.0, "n_taxa": 40, "n_samples": 100,
                     "correlation_times": 20.0, "disturbance": "none",
                     "disturbance_strength": np.nan, "p_combined": 0.5,
                     "taxa_units": 20, "taxa_flagged": index % 4 == 0,
                     "taxon_p_occupancy": (index + 0.5) / 12,
                     "taxon_p_variability": (index + 0.5) / 12,
                     "taxon_p_persistence": np.nan, "taxon_p_combined": (index + 0.5) / 12,
                     "top_recall": 0.4, "top_overlap": 0.6})
    frame = pd.DataFrame(rows)
    neutral, niche = frame[frame.generator == "exact"], frame[frame.generator == "tracking"]
    text = report(neutral, niche.drop(columns=["taxa_flagged"]).assign(
        taxa_flagged=niche["taxa_flagged"].astype(int)), 0.05, "cmd", 1.0)
    assert "## Per-taxon scan" in text
    assert "| stationary | 6 |" in text and "| tracking | 6 |" in text
    assert "0.400 | 0.600 |" in text
