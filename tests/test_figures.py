"""Figures: PNG files drawn from a result (null distributions, Taylor's law, volatility)."""

from __future__ import annotations

import json
import struct
import sys
from pathlib import Path

import matplotlib
import matplotlib.image
import pytest

from driftscreen.calibrate import neutrality_test
from driftscreen.cli import main
from driftscreen.synthetic import neutral_collection, write_collection
from driftscreen.errors import InputError
from driftscreen.report import figures
from driftscreen.report.figures import figure_paths, figure_stem, write_figures
from driftscreen.serialize import result_from_dict, result_to_dict
from driftscreen.statistics.fluctuation_scaling import FluctuationScaling
from driftscreen.statistics.regrouping_invariance import RegroupingInvariance
from driftscreen.synthetic import DesignSpec

matplotlib.use("Agg")

# Source: PNG specification (ISO/IEC 15948:2004, W3C PNG 2nd ed.), section 5.2 (signature)
# and 11.2.2 (IHDR: width and height as 4-byte big-endian integers after the chunk type).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def png_size(path: Path) -> tuple[int, int]:
    """Width and height of a PNG file, after checking its signature and IHDR chunk."""
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def assert_valid_png(path: Path) -> None:
    assert path.is_file() and path.stat().st_size > 0
    width, height = png_size(path)
    assert width > 300 and height > 300
    image = matplotlib.image.imread(path)  # decodes the whole file
    assert image.shape[:2] == (height, width)


@pytest.fixture(scope="module")
def series_result():
    spec = DesignSpec(n_samples=40, interval=1.0, depth=2000, depth_spread=0.3)
    dataset = neutral_collection(1, spec, 20, 20.0, 0.5, seed=31, prefix="reactor")[0]
    return neutrality_test(dataset, replicates=19, groupings=30, seed=2)


@pytest.fixture(scope="module")
def snapshot_result():
    spec = DesignSpec(n_samples=25, interval=None, depth=1500)
    dataset = neutral_collection(1, spec, 15, 30.0, 0.5, seed=32, prefix="jar")[0]
    return neutrality_test(dataset, replicates=19, seed=2)


def test_time_series_gets_four_valid_pngs(series_result, tmp_path):
    paths = write_figures(series_result, tmp_path / "figs")
    expected = figure_paths(tmp_path / "figs", "reactor_1")
    assert paths == [expected["null"], expected["taylor"], expected["volatility"],
                     expected["taxa"]]
    assert [p.name for p in paths] == ["reactor_1_null.png", "reactor_1_taylor.png",
                                       "reactor_1_volatility.png", "reactor_1_taxa.png"]
    for path in paths:
        assert_valid_png(path)
    assert sorted(p.name for p in (tmp_path / "figs").iterdir()) == sorted(p.name for p in paths)


def test_snapshot_has_no_volatility_figure(snapshot_result, tmp_path):
    paths = write_figures(snapshot_result, tmp_path)
    assert [p.name for p in paths] == ["jar_1_null.png", "jar_1_taylor.png", "jar_1_taxa.png"]
    for path in paths:
        assert_valid_png(path)


def test_figures_are_drawn_from_the_result_without_recomputing(series_result, tmp_path,
                                                               monkeypatch):
    def refuse(*args, **kwargs):
        raise AssertionError("a figure recomputed a statistic")

    for cls in (FluctuationScaling, RegroupingInvariance):
        monkeypatch.setattr(cls, "compute", refuse)
        monkeypatch.setattr(cls, "diagnose", refuse)
    stored = result_from_dict(json.loads(json.dumps(result_to_dict(series_result))))
    first = write_figures(stored, tmp_path / "a")
    second = write_figures(series_result, tmp_path / "b")
    assert len(first) == 4
    # The same result draws the same bytes (Agg output is deterministic).
    for a, b in zip(first, second):
        assert a.read_bytes() == b.read_bytes()


def test_file_names_are_safe_and_distinct():
    assert figure_stem("lake_2019") == "lake_2019"
    names = ["site A/2019", "site_A_2019", "site A 2019", "../etc", "", "é"]
    stems = [figure_stem(name) for name in names]
    assert len(set(stems)) == len(stems)
    for stem in stems:
        assert stem and "/" not in stem and " " not in stem and not stem.startswith(".")
        assert all(c.isascii() and (c.isalnum() or c in "._-") for c in stem)


def test_missing_matplotlib_is_one_input_error(monkeypatch):
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import now raises ImportError
    with pytest.raises(InputError) as caught:
        figures.require_matplotlib()
    line = caught.value.one_line()
    assert "\n" not in line
    assert "figures need matplotlib" in line and "pip install 'driftscreen[plot]'" in line


# ----------------------------------------------------------------------------- command line
@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    spec = DesignSpec(n_samples=30, interval=1.0, depth=2500)
    datasets = neutral_collection(2, spec, 12, 30.0, 0.8, seed=33, prefix="vat")
    return write_collection(datasets, tmp_path_factory.mktemp("tables"))


def args_for_test(tables, *extra):
    counts, metadata = tables
    return ["test", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
            "--time-by", "day", "--dataset", "vat_1", "--replicates", "19", "--groupings",
            "10", *extra]


def screen_args(tables, out, *extra):
    counts, metadata = tables
    return ["screen", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
            "--time-by", "day", "--replicates", "19", "--groupings", "10", "--out", str(out),
            "--quiet", *extra]


def test_test_command_writes_figures(tables, tmp_path, capsys):
    folder = tmp_path / "figs"
    assert main(args_for_test(tables, "--figures", str(folder))) == 0
    captured = capsys.readouterr()
    assert "Diagnostics" in captured.out
    assert f"4 figures written to {folder}" in captured.err
    for kind in ("null", "taylor", "volatility", "taxa"):
        assert_valid_png(folder / f"vat_1_{kind}.png")


def test_screen_figures_default_to_the_output_folder(tables, tmp_path, capsys):
    out = tmp_path / "res"
    assert main(screen_args(tables, out, "--figures")) == 0
    printed = capsys.readouterr().out.splitlines()
    pngs = sorted((out / "figures").glob("*.png"))
    assert [p.name for p in pngs] == sorted(f"vat_{i}_{kind}.png" for i in (1, 2)
                                            for kind in ("null", "taylor", "volatility",
                                                         "taxa"))
    assert sorted(printed[6:]) == sorted(str(p) for p in pngs)
    for path in pngs:
        assert_valid_png(path)
    assert not list((out / "figures").glob(".*"))  # no temporary files left
    # A second run reuses every stored result and draws the same figures.
    before = {p.name: p.read_bytes() for p in pngs}
    assert main(screen_args(tables, out, "--figures")) == 0
    assert {p.name: p.read_bytes() for p in (out / "figures").glob("*.png")} == before


def test_screen_figures_into_a_named_folder(tables, tmp_path):
    folder = tmp_path / "elsewhere"
    assert main(screen_args(tables, tmp_path / "res", "--figures", str(folder))) == 0
    assert len(list(folder.glob("*.png"))) == 8
    assert not (tmp_path / "res" / "figures").exists()


@pytest.mark.parametrize("command", ["test", "screen"])
def test_without_matplotlib_figures_exit_2_before_any_work(command, tables, tmp_path,
                                                           monkeypatch, capsys):
    from driftscreen import calibrate

    def refuse(*args, **kwargs):
        raise AssertionError("work started before the figures check")

    monkeypatch.setattr(calibrate, "plan_calibration", refuse)
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    out = tmp_path / "res"
    args = (args_for_test(tables, "--figures", str(tmp_path / "figs")) if command == "test"
            else screen_args(tables, out, "--figures"))
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.splitlines() == [
        "driftscreen: error: option --figures: figures need matplotlib; "
        "pip install 'driftscreen[plot]'"]
    assert not (tmp_path / "figs").exists() and not out.exists()


def test_a_diagnostic_table_without_its_columns_gets_no_figure(series_result, tmp_path):
    from dataclasses import replace

    tables = dict(series_result.diagnostics)
    tables["fluctuation_scaling"] = tables["fluctuation_scaling"].drop(
        columns=["neutral_variance"])
    scan = series_result.taxa.drop(columns=["occupancy_low"])
    paths = write_figures(replace(series_result, diagnostics=tables, taxa=scan), tmp_path)
    assert [p.name for p in paths] == ["reactor_1_null.png", "reactor_1_volatility.png"]
