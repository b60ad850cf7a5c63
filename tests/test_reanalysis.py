"""Published-table reanalysis: counts at a tenfold lower stated depth, and the report line."""

from __future__ import annotations

import numpy as np
import pytest

from driftscreen.cli import main
from driftscreen.intake import read_datasets
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.reanalysis import (DEPTH_SENSITIVITY_PREFIX, at_lower_depth,
                                    largest_remainder_rows)
from driftscreen.synthetic import DesignSpec, metacommunity


def test_largest_remainder_rounding_sums_exactly_and_stays_within_one() -> None:
    # Hamilton's largest-remainder method (common practice in apportionment): every row sums
    # to its total and no entry is more than one away from its exact share.
    rng = np.random.default_rng(3)
    shares = rng.dirichlet(np.full(12, 0.3), size=50)
    totals = rng.integers(2, 5000, size=50)
    counts = largest_remainder_rows(shares, totals)
    assert np.array_equal(counts.sum(axis=1), totals)
    assert np.all(np.abs(counts - shares * totals[:, None]) < 1.0)
    assert np.array_equal(largest_remainder_rows(np.array([[0.5, 0.3, 0.2]]), np.array([7])),
                          np.array([[4, 2, 1]]))


@pytest.fixture()
def percent_table(tmp_path):
    """A published-style table: percent abundances of the 12 most abundant taxa."""
    rng = np.random.default_rng(5)
    design = DesignSpec(40, 1.0, depth=20_000).draw(rng)
    counts = simulate(NeutralModel(metacommunity(30, rng), 60.0, 0.8), design, 1, rng)[0]
    fractions = counts / counts.sum(axis=1, keepdims=True)
    top = np.argsort(-fractions.mean(axis=0))[:12]
    lines = ["genus\t" + "\t".join(f"s{t}" for t in range(40))]
    lines += [f"genus_{j}\t" + "\t".join(f"{100 * v:.3f}" for v in fractions[:, k])
              for j, k in enumerate(top)]
    table, meta = tmp_path / "table.tsv", tmp_path / "meta.tsv"
    table.write_text("\n".join(lines) + "\n")
    meta.write_text("sample\tday\n" + "".join(f"s{t}\t{t}\n" for t in range(40)))
    return table, meta


def test_lower_depth_keeps_compositions(percent_table) -> None:
    table, meta = percent_table
    [dataset] = read_datasets(table, meta, time_by="day", abundance="percent", depth=20_000)
    assert dataset.from_relative
    lower = at_lower_depth(dataset)
    assert np.array_equal(lower.design.depths, np.rint(dataset.design.depths / 10))
    assert np.array_equal(lower.counts.sum(axis=1), lower.design.depths)
    kept = [dataset.taxa.index(t) for t in lower.taxa]
    share = dataset.counts[:, kept] / dataset.design.depths[:, None]
    assert np.all(np.abs(lower.counts / lower.design.depths[:, None] - share) <= 1.0 / 2000 + 1e-9)


def test_report_states_how_the_depth_moves_the_pvalues(percent_table, capsys) -> None:
    table, meta = percent_table
    code = main(["test", str(table), "--metadata", str(meta), "--time-by", "day",
                 "--abundance", "percent", "--depth", "20000", "--replicates", "19"])
    assert code == 0
    out = capsys.readouterr().out
    assert DEPTH_SENSITIVITY_PREFIX in out and "stated -> lower" in out.replace("\n    ", " ")


def test_count_tables_get_no_depth_line(tmp_path, capsys) -> None:
    assert main(["simulate", "--out", str(tmp_path), "--samples", "30", "--rate", "1",
                 "--seed", "2"]) == 0
    capsys.readouterr()
    assert main(["test", str(tmp_path / "counts.tsv"), "--metadata",
                 str(tmp_path / "metadata.tsv"), "--time-by", "day", "--replicates", "9"]) == 0
    assert DEPTH_SENSITIVITY_PREFIX not in capsys.readouterr().out
