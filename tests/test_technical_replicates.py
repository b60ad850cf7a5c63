"""Technical replicates: intake keeps one sequenced sample per biological sample, the read
precision comes from the pairs, and the bootstrap carries simulated pairs."""

from __future__ import annotations

import hashlib
import re
from pathlib import Path

import numpy as np
import pytest

from cli_run import run_cli

from driftscreen.calibrate import neutrality_test
from driftscreen.dataset import Dataset, Design, TechnicalReplicates
from driftscreen.influence import without_sample
from driftscreen.intake import read_datasets
from driftscreen.neutral.model import NeutralModel, sampling_variance_factor
from driftscreen.neutral.simulate import (simulate, simulate_conditioned,
                                          simulate_with_replicates)
from driftscreen.neutral.technical import replicate_noise
from driftscreen.neutral.wright_fisher import dirichlet_multinomial_reads
from driftscreen.reanalysis import at_lower_depth

PRECISION = 300.0


def dirichlet_multinomial(rng: np.random.Generator, x: np.ndarray, depths: np.ndarray,
                          precision: float, size: int) -> np.ndarray:
    """``size`` draws of Multinomial(n, Dirichlet(C x)) for every depth n, with numpy only:
    the Dirichlet-multinomial of Mosimann 1962 (Biometrika 49:65), ``(size, E, K)``."""
    composition = rng.dirichlet(precision * x, size=(size, depths.size))
    return rng.multinomial(np.broadcast_to(depths, (size, depths.size)), composition)


def test_estimator_is_unbiased_on_dirichlet_multinomial_reads():
    # Reads drawn by numpy alone as Mosimann 1962 (Biometrika 49:65) defines them.
    rng = np.random.default_rng(11)
    x = rng.dirichlet(np.full(10, 1.5))
    kept_depths = np.array([2000, 5000, 800, 3000, 10000, 1500, 4000, 2500])
    extra_depths = np.array([3000, 1200, 900, 6000, 2000, 2500, 700, 5000])
    g = 1.0 / (1.0 + 150.0)
    kept = dirichlet_multinomial(rng, x, kept_depths, 150.0, 4000)
    extra = dirichlet_multinomial(rng, x, extra_depths, 150.0, 4000)
    estimates = replicate_noise(kept, extra, kept_depths, extra_depths)
    assert np.mean(estimates == 0.0) < 0.001          # the clip at 0 does not bias the mean
    standard_error = estimates.std() / np.sqrt(estimates.size)
    assert abs(estimates.mean() - g) < 5 * standard_error
    assert standard_error < 0.05 * g                  # the check has the power to see 25% bias


def test_expected_squared_difference_is_the_sum_of_the_two_read_variances():
    # E[sum_i (Y_ij - Y_ik)^2] = H (s_j + s_k), the formula the estimator inverts, against
    # Var(Y_j - Y_k) = Var Y_j + Var Y_k for independent reads (textbook) with each read's
    # variance measured on its own draws, and against the mean squared difference itself.
    rng = np.random.default_rng(12)
    x = rng.dirichlet(np.full(6, 2.0))
    depths = np.array([1000, 4000])
    g = 1.0 / (1.0 + PRECISION)
    expected = (1.0 - np.sum(x**2)) * sampling_variance_factor(depths, g).sum()
    reads = dirichlet_multinomial(rng, x, depths, PRECISION, 200_000) / depths[:, None]
    variances = reads.var(axis=0).sum()               # sum over both reads and all taxa
    squared = np.sum((reads[:, 0] - reads[:, 1]) ** 2, axis=1)
    assert variances == pytest.approx(expected, rel=0.01)
    assert squared.mean() == pytest.approx(expected, abs=5 * squared.std() / np.sqrt(squared.size))


def test_estimator_on_multinomial_reads_is_near_zero():
    # Without technical noise (C = inf) the estimate is g = 0 up to its noise.
    rng = np.random.default_rng(13)
    x = rng.dirichlet(np.full(8, 1.0))
    depths = np.full(10, 3000)
    kept = dirichlet_multinomial_reads(np.broadcast_to(x, (500, 10, 8)), depths, np.inf, rng)
    extra = dirichlet_multinomial_reads(np.broadcast_to(x, (500, 10, 8)), depths, np.inf, rng)
    estimates = replicate_noise(kept, extra, depths, depths)
    assert np.median(estimates) < 1e-4 and np.all(estimates < 1.0 / (1.0 + PRECISION))


def simulated_dataset(snapshot: bool, seed: int = 5, n_samples: int = 40, n_taxa: int = 15,
                      every: int = 3, name: str = "reactor") -> Dataset:
    """A neutral dataset with read precision :data:`PRECISION` whose every ``every``-th
    sample was sequenced twice (the replicate read from the same latent community)."""
    rng = np.random.default_rng(seed)
    model = NeutralModel(rng.dirichlet(np.full(n_taxa, 2.0)), 50.0, None if snapshot else 0.2,
                         1.0 / (1.0 + PRECISION))
    design = Design(rng.integers(4000, 8000, n_samples),
                    None if snapshot else np.arange(n_samples, dtype=np.float64))
    of = np.arange(0, n_samples, every)
    # The simulator reads only which sample each replicate repeats and its depth: here all
    # its reads stand in one taxon.
    depths = np.zeros((of.size, n_taxa), dtype=np.int64)
    depths[:, 0] = rng.integers(3000, 6000, of.size)
    shape = TechnicalReplicates(of, tuple(f"{name}_r{k:02d}" for k in of), depths)
    counts, extra = simulate_with_replicates(model, design, 1, shape, rng)
    present = counts[0].sum(axis=0) > 0
    return Dataset(name, counts[0][:, present],
                   tuple(f"taxon_{k:02d}" for k in np.flatnonzero(present)),
                   tuple(f"{name}_s{t:02d}" for t in range(n_samples)), design,
                   technical=TechnicalReplicates(of, shape.samples, extra[0][:, present]))


@pytest.mark.parametrize("snapshot", [False, True], ids=["time-series", "snapshot"])
def test_precision_is_recovered_within_its_interval(snapshot):
    dataset = simulated_dataset(snapshot)
    result = neutrality_test(dataset, replicates=99, groupings=10, seed=3)
    precision = result.parameters["precision"]
    assert precision.low < PRECISION < precision.high
    assert precision.low < precision.estimate < precision.high
    assert precision.high / precision.low < 4.0       # the pairs pin C down
    pairs = dataset.technical.n_pairs
    assert precision.unit == f"from {pairs} technical replicate pairs"
    assert any(f"read precision from {pairs} technical replicate pairs" in note
               for note in result.notes)


def test_bootstrap_re_estimates_the_precision_from_simulated_pairs():
    # The interval reflects the replicates' own estimation error: it shrinks with more pairs.
    few = neutrality_test(simulated_dataset(True, every=8), replicates=49, groupings=10, seed=3)
    many = neutrality_test(simulated_dataset(True, every=1), replicates=49, groupings=10,
                           seed=3)
    width = {label: np.log(r.parameters["precision"].high / r.parameters["precision"].low)
             for label, r in (("few", few), ("many", many))}
    assert width["many"] < 0.6 * width["few"]


def test_fixed_or_no_noise_leaves_the_replicates_unused():
    dataset = simulated_dataset(False)
    fixed = neutrality_test(dataset, replicates=19, groupings=10, seed=3, noise=1000.0)
    off = neutrality_test(dataset, replicates=19, groupings=10, seed=3, noise="off")
    assert fixed.parameters["precision"].estimate == 1000.0
    assert fixed.parameters["precision"].unit == "fixed"
    assert "precision" not in off.parameters
    unused = f"technical replicates ({dataset.technical.n_pairs} pairs) not used"
    for result in (fixed, off):
        assert any(unused in note for note in result.notes)
        assert not any("read precision from" in note for note in result.notes)


# ----------------------------------------------------------------------------- intake
def write_tables(folder: Path, datasets: list[Dataset], time_series: bool) -> None:
    """Counts (taxa as rows) and metadata with a biological sample column ``extract``."""
    taxa = sorted({t for d in datasets for t in d.taxa})
    samples, columns, meta = [], [], ["sample\tdataset\textract" + ("\tday" if time_series
                                                                    else "")]
    for d in datasets:
        rows = [(s, d.counts[t], t) for t, s in enumerate(d.samples)]
        rows += [(s, d.technical.counts[e], int(d.technical.of[e]))
                 for e, s in enumerate(d.technical.samples)]
        for sample, reads, of in rows:
            samples.append(sample)
            columns.append({taxon: int(n) for taxon, n in zip(d.taxa, reads)})
            day = f"\t{d.design.times[of]:g}" if time_series else ""
            meta.append(f"{sample}\t{d.name}\t{d.samples[of]}{day}")
    lines = ["taxon\t" + "\t".join(samples)]
    lines += [taxon + "\t" + "\t".join(str(c.get(taxon, 0)) for c in columns) for taxon in taxa]
    (folder / "counts.tsv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    (folder / "meta.tsv").write_text("\n".join(meta) + "\n", encoding="utf-8")


def checksums(folder: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in folder.iterdir()}


def test_intake_keeps_the_deepest_sequenced_sample(tmp_path):
    (tmp_path / "counts.tsv").write_text(
        "taxon\tS1\tS2\tS3\tS4\tS5\tS6\n"
        "A\t5\t20\t4\t6\t3\t7\n"
        "B\t5\t10\t6\t4\t9\t1\n", encoding="utf-8")
    (tmp_path / "meta.tsv").write_text(
        "sample\textract\nS1\tE1\nS2\tE1\nS3\tE2\nS4\tE2\nS5\tE3\nS6\tE1\n", encoding="utf-8")
    before = checksums(tmp_path)
    (dataset,) = read_datasets(tmp_path / "counts.tsv", tmp_path / "meta.tsv",
                               replicate_by="extract")
    assert dataset.samples == ("S2", "S3", "S5")      # deepest of E1; tie in E2: first
    assert dataset.technical.samples == ("S1", "S6", "S4")
    assert dataset.technical.of.tolist() == [0, 0, 1]
    assert dataset.technical.counts.tolist() == [[5, 5], [7, 1], [6, 4]]
    assert dataset.design.depths.tolist() == [30, 10, 12]
    assert any("2 biological samples were sequenced more than once (column 'extract')" in n
               and "'S2' for 'E1'" in n and "3 sequenced samples are technical replicates" in n
               for n in dataset.notes)
    assert checksums(tmp_path) == before


def test_intake_reads_back_simulated_replicates(tmp_path):
    original = simulated_dataset(False, n_samples=12, n_taxa=6, every=4)
    write_tables(tmp_path, [original], time_series=True)
    (dataset,) = read_datasets(tmp_path / "counts.tsv", tmp_path / "meta.tsv", time_by="day",
                               dataset_by=["dataset"], replicate_by="extract")
    deeper = original.technical.depths > original.design.depths[original.technical.of]
    assert dataset.n_samples == original.n_samples
    assert dataset.technical.n_pairs == original.technical.n_pairs
    assert sorted(dataset.samples + dataset.technical.samples) == sorted(
        original.samples + original.technical.samples)
    swapped = {original.technical.samples[e] for e in np.flatnonzero(deeper)}
    assert swapped <= set(dataset.samples)            # a deeper replicate is the one analysed
    assert np.all(np.diff(dataset.design.times) > 0)


def error_case(tmp_path: Path, meta: str, *options: str) -> tuple[int, str, str]:
    (tmp_path / "counts.tsv").write_text(
        "taxon\tS1\tS2\tS3\tS4\tS5\nA\t5\t20\t4\t6\t3\nB\t5\t10\t6\t4\t9\n", encoding="utf-8")
    (tmp_path / "meta.tsv").write_text(meta, encoding="utf-8")
    before = checksums(tmp_path)
    outcome = run_cli(["test", str(tmp_path / "counts.tsv"), "--metadata",
                       str(tmp_path / "meta.tsv"), "--replicates", "19", *options])
    assert checksums(tmp_path) == before
    return outcome


@pytest.mark.parametrize("meta, options, message", [
    ("sample\tday\nS1\t1\nS2\t2\nS3\t3\nS4\t4\nS5\t5\n", ["--replicate-by", "extract"],
     r"meta\.tsv: header: no column 'extract' \(option --replicate-by\); use one of the "
     r"columns 'sample', 'day'$"),
    ("sample\tday\textract\nS1\t1\tE1\nS2\t2\tE2\nS3\t3\tE1\nS4\t4\tE4\nS5\t5\tE5\n",
     ["--time-by", "day", "--replicate-by", "extract"],
     r"meta\.tsv: dataset 'counts': samples 'S1' and 'S3' come from one biological sample "
     r"\('E1' in column 'extract'\) but have different times \('1', '3'\); give the sequenced "
     r"samples of one biological sample the same time in column 'day', or different "
     r"biological sample names$"),
    ("sample\textract\nS1\tE1\nS2\tE2\nS3\t \nS4\tE4\nS5\tE5\n", ["--replicate-by", "extract"],
     r"meta\.tsv: row 4, column 'extract': empty biological sample name; write the "
     r"biological sample this sequenced sample comes from"),
], ids=["unknown-column", "two-times", "empty-name"])
def test_bad_replicates_are_one_line_and_exit_2(tmp_path, meta, options, message):
    status, out, err = error_case(tmp_path, meta, *options)
    assert status == 2 and out == ""
    assert err.count("\n") == 1 and "Traceback" not in err
    assert re.search(message, err.rstrip("\n")), err


def test_jobs_do_not_change_results_with_replicates(tmp_path):
    inputs = tmp_path / "in"
    inputs.mkdir()
    datasets = [simulated_dataset(True, seed=s, n_samples=12, n_taxa=8, every=3, name=n)
                for s, n in ((21, "pond_a"), (22, "pond_b"))]
    write_tables(inputs, datasets, time_series=False)
    outputs = {}
    for jobs in ("1", "2"):
        out = tmp_path / f"jobs{jobs}"
        status, _, err = run_cli(["screen", str(inputs / "counts.tsv"), "--metadata",
                                  str(inputs / "meta.tsv"), "--dataset-by", "dataset",
                                  "--replicate-by", "extract", "--replicates", "119",
                                  "--groupings", "10", "--seed", "4", "--jobs", jobs,
                                  "--quiet", "--out", str(out)])
        assert status == 0, err
        outputs[jobs] = {name: (out / name).read_bytes() for name in
                         ("results.tsv", "parameters.tsv", "results.json", "taxa.tsv")}
    assert outputs["1"] == outputs["2"]
    parameters = outputs["1"]["parameters.tsv"].decode()
    assert "read precision from 4 technical replicate pairs" in parameters
    assert '"replicate_by": "extract"' in outputs["1"]["results.json"].decode()
    methods = (tmp_path / "jobs1" / "report.txt").read_text(encoding="utf-8")
    assert "estimated from its pairs of technical" in " ".join(methods.split())


def test_a_dataset_without_a_sample_keeps_the_replicates_of_the_others():
    dataset = simulated_dataset(True, n_samples=12, n_taxa=6, every=3)   # pairs of 0, 3, 6, 9
    without = without_sample(dataset, 3)
    technical = without.technical
    assert technical.samples == tuple(s for s in dataset.technical.samples
                                      if not s.endswith("_r03"))
    assert technical.of.tolist() == [0, 5, 8]          # samples 0, 6, 9 after removing 3
    for e, name in enumerate(technical.samples):
        original = dataset.technical.samples.index(name)
        assert without.samples[technical.of[e]] == dataset.samples[dataset.technical.of[original]]


def test_the_lower_depth_reanalysis_converts_the_replicates_too():
    dataset = simulated_dataset(True, n_samples=12, n_taxa=6, every=3)
    lower = at_lower_depth(dataset, 0.1)
    assert lower.technical.depths.tolist() == np.rint(dataset.technical.depths * 0.1).tolist()
    assert lower.technical.counts.shape[1] == lower.n_taxa


def test_replicate_by_without_repeats_says_so(tmp_path):
    (tmp_path / "counts.tsv").write_text("taxon\tS1\tS2\tS3\nA\t5\t20\t4\nB\t5\t10\t6\n",
                                         encoding="utf-8")
    (tmp_path / "meta.tsv").write_text("sample\textract\nS1\tE1\nS2\tE2\nS3\tE3\n",
                                       encoding="utf-8")
    (dataset,) = read_datasets(tmp_path / "counts.tsv", tmp_path / "meta.tsv",
                               replicate_by="extract")
    assert dataset.technical is None and dataset.samples == ("S1", "S2", "S3")
    assert any("no biological sample was sequenced more than once" in n for n in dataset.notes)


def test_simulation_without_replicates_draws_as_before():
    dataset = simulated_dataset(False, n_samples=10, n_taxa=5)
    model = NeutralModel(np.full(dataset.n_taxa, 1.0 / dataset.n_taxa), 30.0, 0.3, 0.01)
    counts, extra = simulate_with_replicates(model, dataset.design, 7, None, 9)
    assert extra.shape == (7, 0, dataset.n_taxa)
    np.testing.assert_array_equal(counts, simulate(model, dataset.design, 7, 9))
    conditioned, _ = simulate_with_replicates(model, dataset.design, 7, None, 9,
                                              first_counts=dataset.counts[0])
    np.testing.assert_array_equal(conditioned, simulate_conditioned(
        model, dataset.design, 7, dataset.counts[0], 9))


@pytest.mark.parametrize("snapshot", [False, True], ids=["time-series", "snapshot"])
def test_simulated_replicates_share_the_latent_community_of_their_sample(snapshot):
    # Read from the same community, a pair differs by reads alone: the estimator recovers
    # the model's g; read from another sample's community, drift would inflate it.
    dataset = simulated_dataset(snapshot, n_samples=20, n_taxa=10, every=2)
    g = 1.0 / (1.0 + PRECISION)
    model = NeutralModel(np.full(dataset.n_taxa, 0.1), 5.0, None if snapshot else 0.5, g)
    counts, extra = simulate_with_replicates(model, dataset.design, 400, dataset.technical, 10)
    technical = dataset.technical
    assert np.array_equal(extra.sum(axis=2), np.broadcast_to(technical.depths, (400, 10)))
    estimates = replicate_noise(counts[:, technical.of], extra,
                                dataset.design.depths[technical.of], technical.depths)
    assert abs(estimates.mean() - g) < 5 * estimates.std() / np.sqrt(estimates.size)
    shifted = replicate_noise(counts[:, technical.of + 1], extra,
                              dataset.design.depths[technical.of + 1], technical.depths)
    assert shifted.mean() > 10 * g
