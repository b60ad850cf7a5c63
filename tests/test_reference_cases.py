"""Reference cases with expected values from outside the project (``reference_cases/*/``).

Every folder holds a ``README.md`` naming its source, a ``case.json`` whose ``check`` names
one of the functions registered below (plus inputs, expected values and tolerances) and
any TSV tables. The test is parametrised over the folders, so a new folder with the same
layout is picked up. Simulation checks use fixed seeds and bounds stated in the folder
(Monte Carlo standard errors or chi-square quantiles), so they are deterministic and can
fail.
"""

from __future__ import annotations

import csv
import json
import math
from collections.abc import Callable, Iterator
from fractions import Fraction
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import stats

from driftscreen.calibrate import neutrality_test
from driftscreen.dataset import Design
from driftscreen.fdr import benjamini_hochberg
from driftscreen.intake import read_datasets
from driftscreen.neutral.fit import fit
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.statistics.combination import cauchy_combination
from driftscreen.statistics.regrouping_invariance import angular_transform

ROOT = Path(__file__).resolve().parents[1] / "reference_cases"
FOLDERS = sorted(path for path in ROOT.iterdir() if path.is_dir())

Case = dict[str, Any]
CHECKS: dict[str, Callable[[Path, Case], None]] = {}


def check(name: str) -> Callable[[Callable[[Path, Case], None]], Callable[[Path, Case], None]]:
    """Register a function as the check that runs folders whose ``case.json`` names it."""
    def register(function: Callable[[Path, Case], None]) -> Callable[[Path, Case], None]:
        CHECKS[name] = function
        return function
    return register


@pytest.mark.parametrize("folder", FOLDERS, ids=lambda path: path.name)
def test_reference_case(folder: Path) -> None:
    assert (folder / "case.json").is_file(), f"{folder.name}: case.json is missing"
    readme = (folder / "README.md").read_text(encoding="utf-8")
    assert "**Source.**" in readme or "**Origin.**" in readme, \
        f"{folder.name}: README.md must name its source"
    case = json.loads((folder / "case.json").read_text(encoding="utf-8"))
    assert case["check"] in CHECKS, f"{folder.name}: unknown check {case['check']!r}"
    CHECKS[case["check"]](folder, case)


def test_the_required_cases_are_present() -> None:
    names = {folder.name for folder in FOLDERS}
    assert {"dirichlet_multinomial", "ewens_sampling", "benjamini_hochberg", "angular_transform",
            "beta_binomial_moments", "cauchy_combination", "open_dataset"} <= names


# ----------------------------------------------------------------------------- helpers
def read_tsv(path: Path) -> list[dict[str, str]]:
    with path.open(encoding="utf-8", newline="") as stream:
        return list(csv.DictReader(stream, delimiter="\t"))


def simulated_marginals(p: np.ndarray, theta: float, depth: int, spec: Case,
                        seed: int | tuple[int, ...]) -> Iterator[tuple[str, np.ndarray]]:
    """Counts of independent neutral samples, ``(N, K)``, one array per checked time point.

    A snapshot design yields all its samples pooled (they are independent stationary
    draws); a time series yields, for each index in ``use_samples``, that sample of every
    chain (samples of one chain are dependent, so they are never pooled).
    """
    times = spec["times"]
    design = Design(depths=np.full(spec["samples"], depth),
                    times=None if times is None else np.asarray(times, dtype=float))
    model = NeutralModel(p, theta, spec["rate"])
    counts = simulate(model, design, spec["replicates"], np.random.default_rng(seed))
    if spec["use_samples"] == "all":
        yield spec["label"], counts.reshape(-1, p.size)
        return
    for index in spec["use_samples"]:
        yield f"{spec['label']} (sample {index})", counts[:, index]


def pearson_chi_square(observed: np.ndarray, probabilities: np.ndarray,
                       smallest_expected: float = 5.0) -> tuple[float, int]:
    """Pearson's statistic and its degrees of freedom; cells expected below
    ``smallest_expected`` are pooled into one cell (Cochran's rule; common practice)."""
    expected = observed.sum() * probabilities
    small = expected < smallest_expected
    observed_cells = np.append(observed[~small], observed[small].sum())
    expected_cells = np.append(expected[~small], expected[small].sum())
    if expected_cells[-1] == 0:
        assert observed_cells[-1] == 0, "outcomes of probability 0 were drawn"
        observed_cells, expected_cells = observed_cells[:-1], expected_cells[:-1]
    statistic = float(np.sum((observed_cells - expected_cells) ** 2 / expected_cells))
    return statistic, observed_cells.size - 1


def assert_chi_square_below(label: str, observed: np.ndarray, probabilities: np.ndarray,
                            quantile: float, smallest_expected: float = 5.0) -> None:
    statistic, df = pearson_chi_square(observed, probabilities, smallest_expected)
    bound = stats.chi2.ppf(quantile, df)
    assert statistic < bound, f"{label}: chi-square {statistic:.1f} >= {bound:.1f} (df {df})"


def rising(a: Fraction, k: int) -> Fraction:
    """Rising factorial a (a+1) ... (a+k-1), exactly."""
    return math.prod((a + i for i in range(k)), start=Fraction(1))


def close(actual: float, expected: float, relative: float) -> bool:
    return abs(actual - expected) <= relative * max(abs(expected), 1e-300)


# ------------------------------------------------------------------------ Dirichlet-multinomial
def mosimann_probability(x: tuple[int, ...], alpha: tuple[Fraction, ...]) -> Fraction:
    """DM(n, alpha) probability of counts x in exact arithmetic.

    Source: Mosimann (1962) Biometrika 49:65, compound multinomial probability function:
    n!/prod x_i! * prod alpha_i^(x_i) / A^(n), rising factorials.
    """
    n = sum(x)
    coefficient = Fraction(math.factorial(n), math.prod(math.factorial(v) for v in x))
    return coefficient * math.prod((rising(a, v) for a, v in zip(alpha, x)),
                                   start=Fraction(1)) / rising(sum(alpha), n)


@check("dirichlet_multinomial")
def check_dirichlet_multinomial(folder: Path, case: Case) -> None:
    rows = read_tsv(folder / case["table"])
    by_case: dict[str, list[dict[str, str]]] = {}
    for row in rows:
        by_case.setdefault(row["case"], []).append(row)
    relative = case["pmf_tolerance"]["relative"]
    for name, table in by_case.items():
        alpha = tuple(Fraction(a) for a in table[0]["alpha"].split(","))
        exact = [Fraction(row["probability_exact"]) for row in table]
        assert sum(exact) == 1, f"{name}: probabilities do not sum to 1"
        for row, value in zip(table, exact):
            x = tuple(int(v) for v in row["counts"].split(","))
            assert mosimann_probability(x, alpha) == value, f"{name} {x}"
            assert close(float(row["probability"]), float(value), 1e-15)
            # Source: scipy.stats.dirichlet_multinomial (reference library)
            scipy_value = stats.dirichlet_multinomial.pmf(np.array(x), np.array(alpha, float),
                                                          sum(x))
            assert close(float(scipy_value), float(value), relative), f"{name} {x}: scipy"
    simulator = case["simulator"]
    table = by_case[simulator["case"]]
    outcomes = [tuple(int(v) for v in row["counts"].split(",")) for row in table]
    probabilities = np.array([float(row["probability"]) for row in table])
    index = {x: i for i, x in enumerate(outcomes)}
    p = np.asarray(simulator["p"])
    theta = simulator["theta"]
    alpha = np.array([float(Fraction(a)) for a in table[0]["alpha"].split(",")])
    np.testing.assert_allclose(theta * p, alpha, rtol=1e-12)
    depth = int(table[0]["n"])
    for spec in simulator["designs"]:
        for label, counts in simulated_marginals(p, theta, depth, spec, spec["seed"]):
            cells = np.array([index[tuple(row)] for row in counts.tolist()])
            observed = np.bincount(cells, minlength=len(outcomes))
            assert_chi_square_below(label, observed, probabilities,
                                    simulator["chi_square_upper_quantile"])


# ----------------------------------------------------------------------------- Ewens sampling
def ewens_pmf(n: int, theta: Fraction) -> list[Fraction]:
    """P(K_n = k), k = 0..n: |s(n,k)| theta^k / theta^(n) (Ewens 1972), exactly."""
    stirling = [1] + [0] * n  # unsigned Stirling numbers of the first kind, row by row
    for m in range(1, n + 1):
        stirling = [0] + [stirling[k - 1] + (m - 1) * stirling[k] for k in range(1, n + 1)]
    total = rising(theta, n)
    return [stirling[k] * theta**k / total for k in range(n + 1)]


def finite_taxa_pmf(n: int, theta: float, n_taxa: int) -> np.ndarray:
    """P(K_n = k) for n reads from Dirichlet(theta/M, ..., theta/M) over M taxa.

    Summing Mosimann's (1962) DM probability over the assignments of the blocks of a
    sample partition to distinct taxa: M (M-1)...(M-k+1) C(n, k) / theta^(n), with
    C(m+1, k) = (m + k a) C(m, k) + a C(m, k-1), a = theta / M (see the folder's README).
    """
    a = theta / n_taxa
    blocks = np.zeros(n + 1)
    blocks[0] = 1.0
    for m in range(n):
        k = np.arange(n + 1)
        shifted = np.concatenate([[0.0], blocks[:-1]])
        blocks = blocks * (m + k * a) + shifted * a
    k = np.arange(n + 1)
    log_falling = np.array([np.sum(np.log(n_taxa - np.arange(j))) for j in k])
    log_rising = np.sum(np.log(theta + np.arange(n)))
    with np.errstate(divide="ignore"):
        return np.exp(log_falling + np.log(blocks) - log_rising)


@check("ewens_sampling")
def check_ewens_sampling(folder: Path, case: Case) -> None:
    n, theta = case["sample_size"], case["theta"]
    expected = case["expected"]
    exact = ewens_pmf(n, Fraction(theta))
    k = np.arange(n + 1)
    # Source: Ewens (1972) Theor. Popul. Biol. 3:87, distribution, mean and variance of K_n
    assert sum(exact) == 1
    mean = Fraction(expected["mean_distinct_taxa"])
    assert sum(j * q for j, q in enumerate(exact)) == mean
    assert mean == sum(Fraction(theta) / (Fraction(theta) + i) for i in range(n))
    variance = sum(j * j * q for j, q in enumerate(exact)) - mean**2
    assert close(float(variance), expected["variance_distinct_taxa"], 1e-12)
    assert close(float(variance), sum(theta * i / (theta + i) ** 2 for i in range(n)), 1e-12)
    np.testing.assert_allclose([float(q) for q in exact], expected["pmf_distinct_taxa"],
                               rtol=1e-12, atol=1e-300)

    n_taxa = case["metacommunity_taxa"]
    finite = finite_taxa_pmf(n, theta, n_taxa)
    assert abs(finite.sum() - 1.0) < 1e-12
    a = theta / n_taxa
    # Source: scipy.stats.betabinom: E K_n = M P(taxon present) for exchangeable taxa
    mean_finite = n_taxa * (1.0 - stats.betabinom.pmf(0, n, a, theta - a))
    assert close(float(np.dot(k, finite)), mean_finite, 1e-9)
    approximation = case["approximation"]
    mean_error = abs(mean_finite - float(mean))
    assert mean_error <= approximation["mean_error_bound"]
    total_variation = 0.5 * np.abs(finite - np.array([float(q) for q in exact])).sum()
    assert total_variation <= approximation["total_variation_bound"]

    simulator = case["simulator"]
    p = np.full(n_taxa, 1.0 / n_taxa)
    for spec in simulator["designs"]:
        for label, counts in simulated_marginals(p, theta, n, spec, spec["seed"]):
            distinct = np.count_nonzero(counts, axis=1)
            # tolerance: 4.5 Monte Carlo standard errors plus the stated finite-M error
            standard_error = math.sqrt(float(variance) / distinct.size)
            gap = abs(distinct.mean() - float(mean))
            assert gap <= simulator["mean_tolerance_in_standard_errors"] * standard_error \
                + mean_error, f"{label}: mean K_n {distinct.mean():.4f} vs {float(mean):.4f}"
            assert_chi_square_below(label, np.bincount(distinct, minlength=n + 1), finite,
                                    simulator["chi_square_upper_quantile"],
                                    simulator["smallest_expected_cell"])


# ----------------------------------------------------------------------------- Benjamini-Hochberg
@check("benjamini_hochberg")
def check_benjamini_hochberg(folder: Path, case: Case) -> None:
    pvalues = np.array([float(row["p_value"]) for row in read_tsv(folder / case["table"])])
    q_star, m = case["q_star"], pvalues.size
    expected = case["expected"]
    qvalues = benjamini_hochberg(pvalues)
    rejected = np.flatnonzero(qvalues <= q_star)
    order = np.argsort(pvalues, kind="stable")
    assert rejected.tolist() == sorted(order[:expected["rejections_false_discovery_rate"]])
    # Source: Benjamini & Hochberg (1995) JRSS-B 57:289, step-up rule: largest i with
    # p_(i) <= i q*/m, reject the i smallest
    passing = np.flatnonzero(np.sort(pvalues) <= np.arange(1, m + 1) * q_star / m)
    assert passing.max() + 1 == expected["rejections_false_discovery_rate"]
    assert np.count_nonzero(pvalues <= q_star / m) == expected["rejections_bonferroni"]
    tolerance = case["qvalue_tolerance"]["absolute"]
    # Source: scipy.stats.false_discovery_control (reference library)
    np.testing.assert_allclose(qvalues, stats.false_discovery_control(pvalues, method="bh"),
                               rtol=0, atol=tolerance)
    shuffle = np.random.default_rng(case["permutation_seed"]).permutation(m)
    np.testing.assert_allclose(benjamini_hochberg(pvalues[shuffle]), qvalues[shuffle],
                               rtol=0, atol=tolerance)


# ----------------------------------------------------------------------------- angular transform
@check("angular_transform")
def check_angular_transform(folder: Path, case: Case) -> None:
    regime, outside = case["regime"], case["outside"]
    checked = {"inside": 0, "outside": 0}
    for row in read_tsv(folder / case["table"]):
        n, p = int(row["n"]), float(row["p"])
        reads = np.arange(n + 1)
        depths = np.full(n + 1, float(n))
        transformed = angular_transform(reads[:, None].astype(float), depths)[:, 0]
        # Source: Anscombe (1948) Biometrika 35:246, arcsin sqrt((N + 3/8)/(n + 3/4))
        np.testing.assert_allclose(transformed, np.arcsin(np.sqrt((reads + 0.375) / (n + 0.75))),
                                   rtol=1e-14)
        weights = stats.binom.pmf(reads, n, p)
        mean = np.dot(weights, transformed)
        ratio = (4 * n + 2) * np.dot(weights, (transformed - mean) ** 2)
        npq = n * p * (1 - p)
        if npq >= regime["min_npq"]:
            checked["inside"] += 1
            assert abs(ratio - 1) <= regime["relative_tolerance"], f"n={n}, p={p}: {ratio:.4f}"
        elif npq <= outside["max_npq"]:
            checked["outside"] += 1
            assert ratio < outside["ratio_below"], f"n={n}, p={p}: {ratio:.4f}"
    assert checked["inside"] >= 10 and checked["outside"] >= 5


# ------------------------------------------------------------------------ beta-binomial moments
@check("beta_binomial_moments")
def check_beta_binomial_moments(folder: Path, case: Case) -> None:
    theta, p = case["theta"], np.asarray(case["p"])
    simulator = case["simulator"]
    for depth in case["depths"]:
        mean = depth * p
        variance = depth * p * (1 - p) * (theta + depth) / (theta + 1)
        # Source: scipy.stats.betabinom (reference library), the same two moments
        scipy_mean, scipy_variance, scipy_kurtosis = stats.betabinom.stats(
            depth, theta * p, theta * (1 - p), moments="mvk")
        relative = case["formula_tolerance"]["relative"]
        np.testing.assert_allclose(mean, scipy_mean, rtol=relative)
        np.testing.assert_allclose(variance, scipy_variance, rtol=relative)
        fourth_central = (scipy_kurtosis + 3.0) * variance**2
        for spec in simulator["designs"]:
            for label, counts in simulated_marginals(p, theta, depth, spec,
                                                     (spec["seed"], depth)):
                size = counts.shape[0]
                # tolerance: 4.5 Monte Carlo SEs; SE of a sample variance from mu_4
                limit = simulator["tolerance_in_standard_errors"]
                mean_z = (counts.mean(axis=0) - mean) / np.sqrt(variance / size)
                variance_z = ((counts.var(axis=0, ddof=1) - variance)
                              / np.sqrt((fourth_central - variance**2) / size))
                assert np.all(np.abs(mean_z) < limit), f"{label}, depth {depth}: {mean_z}"
                assert np.all(np.abs(variance_z) < limit), f"{label}, depth {depth}: {variance_z}"


# ----------------------------------------------------------------------------- Cauchy combination
def parse_numbers(text: str) -> np.ndarray:
    return np.array([float(Fraction(v)) for v in text.split(",")]) if text else np.array([])


@check("cauchy_combination")
def check_cauchy_combination(folder: Path, case: Case) -> None:
    for row in read_tsv(folder / case["table"]):
        pvalues, weights = parse_numbers(row["pvalues"]), parse_numbers(row["weights"])
        statistic, pvalue = cauchy_combination(pvalues, weights if weights.size else None)
        relative = float(row["relative_tolerance"])
        expected_statistic, expected_pvalue = float(row["statistic"]), float(row["pvalue"])
        assert abs(float(statistic) - expected_statistic) <= relative * max(
            abs(expected_statistic), 1.0), row["case"]
        assert close(float(pvalue), expected_pvalue, relative), row["case"]
        total = weights.sum() if weights.size else 1.0
        # Source: scipy.stats.cauchy (reference library): p = P(C > T / sum w)
        assert close(float(stats.cauchy.sf(float(statistic) / total)), expected_pvalue,
                     max(relative, 1e-9)), row["case"]
    settings = case["uniformity"]
    rng = np.random.default_rng(settings["seed"])
    uniform = rng.random((settings["rows"], settings["n_pvalues"]))
    _, combined = cauchy_combination(uniform, axis=1)
    # Source: Liu & Xie (2020) JASA 115:393: exactly uniform under independence
    assert stats.kstest(combined, "uniform").pvalue > settings["ks_pvalue_above"]


def test_cauchy_combination_keeps_relative_precision_for_tiny_pvalues() -> None:
    # Source: Liu & Xie (2020) JASA 115:393: one p-value (or k equal ones) combines to itself
    for p in (1e-10, 1e-20, 1e-200):
        _, combined = cauchy_combination(np.array([p, p]))
        assert close(float(combined), p, 1e-12), (p, float(combined))


# ----------------------------------------------------------------------------- open dataset
@check("open_dataset")
def check_open_dataset(folder: Path, case: Case) -> None:
    counts_path, metadata_path = folder / case["counts"], folder / case["metadata"]
    with counts_path.open(encoding="utf-8", newline="") as stream:
        header, *lines = list(csv.reader(stream, delimiter="\t"))
    table = {line[0]: [int(v) for v in line[1:]] for line in lines}
    column = {sample: j for j, sample in enumerate(header[1:])}
    phenotype = {row["sample"]: row["phenotype"] for row in read_tsv(metadata_path)}
    expected = case["expected"]
    datasets = read_datasets(counts_path, metadata_path, **case["intake"])
    assert {d.name: d.n_samples for d in datasets} == expected["datasets"]
    settings = case["quick_test"]
    for dataset in datasets:
        assert dataset.is_time_series == expected["time_series"]
        assert dataset.n_taxa == expected["taxa"]
        assert all(phenotype[s] == dataset.name for s in dataset.samples)
        from_file = np.array([[table[t][column[s]] for t in dataset.taxa]
                              for s in dataset.samples])
        np.testing.assert_array_equal(dataset.counts, from_file)
        np.testing.assert_array_equal(dataset.design.depths, from_file.sum(axis=1))
        model = fit(dataset.counts, dataset.design)
        assert np.isfinite(model.theta) and model.theta > 0
        assert abs(model.p.sum() - 1.0) < 1e-12
        result = neutrality_test(dataset, replicates=settings["replicates"],
                                 groupings=settings["groupings"], seed=settings["seed"])
        floor = 1.0 / (settings["replicates"] + 1)
        for name, statistic in result.statistics.items():
            assert np.isfinite(statistic.statistic), name
            assert floor - 1e-12 <= statistic.pvalue <= 1.0, name
        theta = result.parameters["theta"]
        assert np.isfinite([theta.estimate, theta.low, theta.high]).all()
        assert theta.low <= theta.estimate <= theta.high
