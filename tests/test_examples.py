"""The worked examples stay runnable: their data are what make_data.py writes, and their
commands run (with few replicates, to keep the suite quick)."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from driftscreen.cli import main

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"
DATA = {"lagoon_cohort": ("counts.tsv", "metadata.tsv"),
        "published_table": ("genera_percent.tsv", "samples.tsv")}


@pytest.mark.parametrize("folder", sorted(DATA))
def test_example_data_are_what_make_data_writes(folder, tmp_path) -> None:
    shutil.copy(EXAMPLES / folder / "make_data.py", tmp_path)
    subprocess.run([sys.executable, "make_data.py"], cwd=tmp_path, check=True)
    for name in DATA[folder]:
        assert (tmp_path / name).read_bytes() == (EXAMPLES / folder / name).read_bytes(), name


def test_lagoon_screen_command_runs(tmp_path, capsys) -> None:
    folder = EXAMPLES / "lagoon_cohort"
    assert main(["screen", str(folder / "counts.tsv"), "--metadata", str(folder / "metadata.tsv"),
                 "--dataset-by", "lagoon,layer", "--time-by", "day", "--replicates", "19",
                 "--seed", "7", "--out", str(tmp_path / "results"), "--quiet"]) == 0
    rows = (tmp_path / "results" / "results.tsv").read_text().splitlines()
    assert len({row.split("\t")[0] for row in rows[1:]}) == 8


def test_published_table_command_runs(capsys) -> None:
    folder = EXAMPLES / "published_table"
    assert main(["test", str(folder / "genera_percent.tsv"), "--metadata",
                 str(folder / "samples.tsv"), "--time-by", "date", "--abundance", "percent",
                 "--depth", "25000", "--replicates", "19", "--seed", "3"]) == 0
    out = capsys.readouterr().out
    assert "pooled the unlisted remainder" in out and "depth sensitivity" in out
