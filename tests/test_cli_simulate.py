"""`driftscreen simulate` output reads back through intake with the moments of its theta."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from driftscreen.cli import main
from driftscreen.intake import read_datasets
from driftscreen.neutral.fit import fit


def simulated(tmp_path, *options: str):
    assert main(["simulate", "--out", str(tmp_path), *options]) == 0
    [dataset] = read_datasets(tmp_path / "counts.tsv", tmp_path / "metadata.tsv",
                              dataset_by=["dataset"],
                              time_by=None if "--snapshot" in options else "day")
    truth = pd.read_csv(tmp_path / "truth.tsv", sep="\t")
    p = truth.set_index("taxon").loc[list(dataset.taxa), "p"].to_numpy()
    return dataset, p


@pytest.mark.parametrize("options", [
    ("--snapshot", "--samples", "800"),
    ("--samples", "800", "--rate", "3", "--irregular"),
])
def test_stationary_moments_match_the_theta_given(tmp_path, options) -> None:
    """Stationary Dirichlet-multinomial moments (Mosimann 1962, Biometrika 49:65):
    E[Y_i] = p_i and Var(Y_i) = p_i (1 - p_i) (v + (1 - v)/n), v = 1/(1 + theta)."""
    theta, depth = 30.0, 4000
    dataset, p = simulated(tmp_path, *options, "--taxa", "8", "--theta", str(theta),
                           "--depth", str(depth), "--seed", "3")
    assert np.array_equal(dataset.design.depths, np.full(800, depth))
    y = dataset.counts / depth
    v = 1.0 / (1.0 + theta)
    expected_var = p * (1 - p) * (v + (1 - v) / depth)
    # means within 5 standard errors (at rate 3 per day successive samples correlate by
    # exp(-3) < 0.05, so the samples count as nearly independent)
    assert np.all(np.abs(y.mean(axis=0) - p) < 5 * np.sqrt(expected_var / 800) * 1.2)
    # pooled variance ratio within +-15% (about 4 standard errors for 800 samples, 8 taxa)
    assert y.var(axis=0, ddof=1).sum() / expected_var.sum() == pytest.approx(1.0, abs=0.15)
    assert fit(dataset.counts, dataset.design).theta == pytest.approx(theta, rel=0.2)


def test_round_trip_keeps_counts_times_and_names(tmp_path) -> None:
    dataset, _ = simulated(tmp_path, "--samples", "25", "--irregular", "--taxa", "12",
                           "--depth-spread", "0.5", "--seed", "9")
    meta = pd.read_csv(tmp_path / "metadata.tsv", sep="\t")
    assert dataset.name == "community_1"
    assert np.allclose(dataset.design.times, meta["day"].to_numpy() - meta["day"].min())
    table = pd.read_csv(tmp_path / "counts.tsv", sep="\t", index_col=0)
    assert np.array_equal(table.loc[list(dataset.taxa), list(dataset.samples)].to_numpy().T,
                          dataset.counts)


def test_niche_model_writes_a_niche_dataset(tmp_path) -> None:
    assert main(["simulate", "--out", str(tmp_path), "--model", "logistic", "--strength", "0.7",
                 "--samples", "20", "--seed", "1"]) == 0
    truth = pd.read_csv(tmp_path / "truth.tsv", sep="\t")
    assert list(truth["model"]) == ["logistic"] and truth["strength"][0] == 0.7


def test_strength_without_a_niche_model_is_an_input_error(tmp_path, capsys) -> None:
    assert main(["simulate", "--out", str(tmp_path), "--strength", "0.3"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "--model logistic" in err


@pytest.mark.parametrize("options", [("--taxa", "1"), ("--samples", "1"),
                                     ("--model", "logistic", "--strength", "2")])
def test_impossible_simulations_are_input_errors(tmp_path, capsys, options) -> None:
    try:
        code = main(["simulate", "--out", str(tmp_path / "sim"), *options])
    except SystemExit as stop:  # usage errors found while parsing the options
        code = stop.code
    assert code == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert not (tmp_path / "sim" / "counts.tsv").exists()
