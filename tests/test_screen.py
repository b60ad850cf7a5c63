"""`driftscreen screen`: outputs, parallel reproducibility, resume, refusals, failures."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from driftscreen import __version__, calibrate
from driftscreen.calibrate import CalibrationSettings
from driftscreen.cli import main
from driftscreen.synthetic import neutral_collection, write_collection
from driftscreen.report.tables import RESULTS_COLUMNS
from driftscreen.report.format import WIDTH
from driftscreen.screen import screen
from driftscreen.serialize import result_to_dict
from driftscreen.store import STORE_FOLDER, RECORDS_FOLDER
from driftscreen.synthetic import DesignSpec

OUTPUTS = ["results.tsv", "parameters.tsv", "results.json", "report.txt", "taxa.tsv",
           "taxa_across.tsv"]
N_DATASETS = 4
STATISTICS_PER_SERIES = 5  # four statistics + combined


@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    """Four small neutral time series written by `driftscreen simulate --datasets 4`."""
    folder = tmp_path_factory.mktemp("sim")
    code = main(["simulate", "--out", str(folder), "--datasets", str(N_DATASETS), "--taxa", "15",
                 "--samples", "30", "--theta", "40", "--rate", "1.0", "--seed", "5"])
    assert code == 0
    return folder / "counts.tsv", folder / "metadata.tsv"


@pytest.fixture(scope="module")
def mixed_tables(tmp_path_factory):
    """Three neutral time series plus one too short to analyse (3 samples)."""
    spec = DesignSpec(n_samples=25, interval=1.0, depth=3000)
    datasets = neutral_collection(3, spec, 12, 40.0, 1.0, seed=8, prefix="lake")
    datasets += neutral_collection(1, DesignSpec(n_samples=3, interval=1.0, depth=3000), 12,
                                   40.0, 0.3, seed=8, prefix="pond")
    return write_collection(datasets, tmp_path_factory.mktemp("mixed"))


def screen_args(tables, out, *extra, replicates=19, seed=1, jobs=1, time_by=True):
    counts, metadata = tables
    args = ["screen", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
            "--replicates", str(replicates), "--groupings", "10", "--seed", str(seed),
            "--jobs", str(jobs), "--out", str(out)]
    return args + (["--time-by", "day"] if time_by else []) + list(extra)


def read_rows(path: Path) -> list[dict[str, str]]:
    header, *lines = path.read_text(encoding="utf-8").splitlines()
    columns = header.split("\t")
    return [dict(zip(columns, line.split("\t"))) for line in lines]


def strict_json(path: Path):
    def refuse(constant):
        raise ValueError(f"non-standard JSON constant {constant}")
    return json.loads(path.read_text(encoding="utf-8"), parse_constant=refuse)


@pytest.fixture(scope="module")
def reference(tables, tmp_path_factory):
    """An uninterrupted --jobs 1 run to compare other runs with."""
    out = tmp_path_factory.mktemp("reference")
    assert main(screen_args(tables, out, "--quiet")) == 0
    return out


def test_screen_writes_every_output_and_only_paths_on_stdout(tables, tmp_path, capsys):
    out = tmp_path / "res"
    assert main(screen_args(tables, out)) == 0
    captured = capsys.readouterr()
    assert captured.out.splitlines() == [str(out / name) for name in OUTPUTS]
    assert all((out / name).is_file() for name in OUTPUTS)
    assert f"{N_DATASETS}/{N_DATASETS} datasets done" in captured.err
    rows = read_rows(out / "results.tsv")
    assert (out / "results.tsv").read_text().splitlines()[0].split("\t") == list(RESULTS_COLUMNS)
    assert len(rows) == N_DATASETS * STATISTICS_PER_SERIES
    names = sorted({r["dataset"] for r in rows})
    assert names == [f"community_{k}" for k in range(1, N_DATASETS + 1)]
    for name in names:
        own = [r["statistic"] for r in rows if r["dataset"] == name]
        assert own[-1] == "combined" and len(own) == STATISTICS_PER_SERIES
    for row in rows:
        p = float(row["p_value"])
        # A bootstrap p-value is (1 + k) / (B + 1) with B = 19 (Davison & Hinkley 1997, eq. 4.11).
        assert abs(p * 20 - round(p * 20)) < 1e-4 and 1 / 20 <= p <= 1
        assert row["replicates"] == "19" and row["n_samples"] == "30"
    parameters = read_rows(out / "parameters.tsv")
    assert [r["dataset"] for r in parameters] == names
    assert all(float(r["theta_low"]) <= float(r["theta"]) <= float(r["theta_high"])
               for r in parameters)
    assert all(r["design"] == "time series" and r["span_days"] == "29" for r in parameters)


def test_quiet_silences_stderr(tables, tmp_path, capsys):
    assert main(screen_args(tables, tmp_path / "res", "--quiet")) == 0
    captured = capsys.readouterr()
    assert captured.err == ""
    assert len(captured.out.splitlines()) == len(OUTPUTS)


def test_one_and_two_jobs_give_identical_files(tables, reference, tmp_path, capsys):
    out = tmp_path / "two"
    assert main(screen_args(tables, out, "--quiet", jobs=2)) == 0
    for name in ("results.tsv", "parameters.tsv", "results.json", "taxa.tsv", "taxa_across.tsv"):
        assert (out / name).read_bytes() == (reference / name).read_bytes(), name


def test_qvalues_are_benjamini_hochberg_across_datasets(reference):
    document = strict_json(reference / "results.json")
    assert document["driftscreen_version"] == __version__
    assert document["settings"]["replicates"] == 19 and document["settings"]["seed"] == 1
    assert {i["role"] for i in document["inputs"]} == {"counts", "metadata"}
    assert all(len(i["sha256"]) == 64 for i in document["inputs"])
    for statistic in ("stationary_divergence", "combined"):
        entries = [next(s for s in d["statistics"] if s["name"] == statistic)
                   for d in document["datasets"]]
        p = np.array([e["p_value"] for e in entries])
        # Source: scipy.stats.false_discovery_control implements Benjamini & Hochberg (1995).
        np.testing.assert_allclose([e["q_value"] for e in entries],
                                   stats.false_discovery_control(p, method="bh"), rtol=1e-12)
        assert all(len(e["null_distribution"]) == 19 for e in entries)
    rows = read_rows(reference / "results.tsv")
    combined = [r for r in rows if r["statistic"] == "combined"]
    q_json = [next(s for s in d["statistics"] if s["name"] == "combined")["q_value"]
              for d in document["datasets"]]
    assert [float(r["q_value"]) for r in combined] == pytest.approx(q_json, rel=1e-5)


def test_report_is_fixed_width_with_summary_sections_and_methods(reference):
    report = (reference / "report.txt").read_text(encoding="utf-8")
    lines = report.splitlines()
    assert max(len(line) for line in lines) <= WIDTH
    assert lines[0].startswith(f"driftscreen {__version__}: neutrality screen of 4 datasets")
    for k in range(1, N_DATASETS + 1):
        assert f"[{k}] Dataset 'community_{k}'" in report
    methods = report[report.index("\nMethods\n"):]
    flat = " ".join(methods.split())
    for text in ("B = 19", "R = 10", "seed 1", f"driftscreen {__version__}", "Hubbell 2001",
                 "Etienne 2005", "Griffiths 1980", "Jenkins & Spano 2017", "Davison & Hinkley",
                 "Fisher & Mehta 2014", "Washburne et al. 2016", "Taylor 1961",
                 "Anscombe 1948", "Wilson 2019", "Benjamini & Hochberg 1995"):
        assert text in flat, text
    assert "sha256 " in report
    # Summary rows come sorted by combined q-value.
    start = lines.index("Summary, sorted by combined q-value") + 4
    summary = lines[start:start + N_DATASETS]
    q_column = [float(line.split()[7]) for line in summary]
    assert q_column == sorted(q_column)


def test_unanalysable_dataset_gets_a_note_and_the_others_go_on(mixed_tables, tmp_path):
    out = tmp_path / "res"
    assert main(screen_args(mixed_tables, out, "--quiet")) == 0
    rows = read_rows(out / "results.tsv")
    pond = [r for r in rows if r["dataset"] == "pond_1"]
    assert [r["statistic"] for r in pond][-1] == "combined" and len(pond) == 5
    for row in pond:
        assert row["p_value"] == row["q_value"] == row["observed"] == ""
        assert "needs at least 4 samples" in row["note"] and row["n_samples"] == "3"
    lakes = [r for r in rows if r["dataset"].startswith("lake")]
    assert len(lakes) == 15 and all(r["p_value"] for r in lakes)
    report = (out / "report.txt").read_text(encoding="utf-8")
    assert "Not analysed: a time series needs at least 4 samples" in report
    assert "not tested" in report
    parameters = {r["dataset"]: r for r in read_rows(out / "parameters.tsv")}
    assert parameters["pond_1"]["theta"] == "" and "needs at least" in parameters["pond_1"]["note"]
    document = strict_json(out / "results.json")
    pond_json = next(d for d in document["datasets"] if d["name"] == "pond_1")
    assert pond_json["analysed"] is False and "needs at least" in pond_json["note"]


def test_a_failing_dataset_becomes_a_note(tables, reference, tmp_path, monkeypatch, capsys):
    real_run_chunk = calibrate.run_chunk
    failing = {}

    def plan_failing_for_one(dataset, settings, statistics=None):
        if dataset.name == "community_2":
            raise np.linalg.LinAlgError("singular matrix")
        plan = calibrate.plan_calibration(dataset, settings, statistics)
        if dataset.name == "community_3":
            failing["p"] = plan.model.p
        return plan

    def chunk_failing_for_one(task):
        if np.array_equal(task.model.p, failing["p"]):
            raise FloatingPointError("overflow encountered")
        return real_run_chunk(task)

    monkeypatch.setattr("driftscreen.screen.plan_calibration", plan_failing_for_one)
    monkeypatch.setattr(calibrate, "run_chunk", chunk_failing_for_one)
    out = tmp_path / "res"
    assert main(screen_args(tables, out)) == 0
    assert "2 of 4 datasets could not be analysed" in capsys.readouterr().err
    notes = {r["dataset"]: r["note"] for r in read_rows(out / "parameters.tsv")}
    assert notes["community_2"] == ("analysing the observed data failed "
                                    "(LinAlgError: singular matrix)")
    assert notes["community_3"] == ("computing the neutral replicates failed "
                                    "(FloatingPointError: overflow encountered)")
    assert notes["community_1"] == notes["community_4"] == ""
    combined = {r["dataset"]: r for r in read_rows(out / "results.tsv")
                if r["statistic"] == "combined"}
    assert combined["community_1"]["q_value"] and not combined["community_2"]["q_value"]
    # Failed datasets are not kept: the next run tries them again.
    assert len(list((out / STORE_FOLDER / RECORDS_FOLDER).glob("*.json"))) == 2
    monkeypatch.undo()
    assert main(screen_args(tables, out)) == 0
    assert "reusing 2 finished datasets" in capsys.readouterr().err
    assert (out / "results.tsv").read_bytes() == (reference / "results.tsv").read_bytes()


def test_resume_after_interruption_recomputes_nothing(tables, reference, tmp_path, monkeypatch,
                                                      capsys):
    real_run_chunk = calibrate.run_chunk
    calls = []

    def interrupted_at_second_chunk(task):
        calls.append(task)
        if len(calls) == 2:
            raise KeyboardInterrupt
        return real_run_chunk(task)

    out = tmp_path / "res"
    monkeypatch.setattr(calibrate, "run_chunk", interrupted_at_second_chunk)
    assert main(screen_args(tables, out)) == 130
    assert "interrupted" in capsys.readouterr().err
    records = list((out / STORE_FOLDER / RECORDS_FOLDER).glob("*.json"))
    assert len(records) == 1  # B = 19 is one chunk per dataset: the first one finished
    assert not (out / "results.tsv").exists()

    calls.clear()
    monkeypatch.setattr(calibrate, "run_chunk",
                        lambda task: calls.append(task) or real_run_chunk(task))
    assert main(screen_args(tables, out)) == 0
    assert f"reusing 1 finished dataset from {out}" in capsys.readouterr().err
    assert len(calls) == N_DATASETS - 1
    for name in ("results.tsv", "parameters.tsv", "results.json", "taxa.tsv", "taxa_across.tsv"):
        assert (out / name).read_bytes() == (reference / name).read_bytes(), name

    calls.clear()
    assert main(screen_args(tables, out)) == 0
    assert f"reusing {N_DATASETS} finished datasets" in capsys.readouterr().err
    assert calls == []
    assert (out / "results.tsv").read_bytes() == (reference / "results.tsv").read_bytes()


#: `driftscreen screen ARGS...` whose chunks after the first take 0.5 s longer, so that the
#: test can kill it after one dataset is stored and well before the last one.
SLOW_SCREEN = """
import sys, time
from driftscreen import calibrate
from driftscreen.cli import main
real, calls = calibrate.run_chunk, []
def slow(task):
    calls.append(1)
    if len(calls) > 1:
        time.sleep(0.5)
    return real(task)
calibrate.run_chunk = slow
sys.exit(main(["screen", *sys.argv[1:]]))
"""


@pytest.mark.slow
def test_resume_after_the_process_is_killed(tables, reference, tmp_path, monkeypatch, capsys):
    out = tmp_path / "res"
    args = screen_args(tables, out, "--quiet", replicates=19)[1:]
    records = out / STORE_FOLDER / RECORDS_FOLDER
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
    process = subprocess.Popen([sys.executable, "-c", SLOW_SCREEN, *args],
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env)
    deadline = time.monotonic() + 120
    try:
        while time.monotonic() < deadline and process.poll() is None:
            if records.is_dir() and any(records.glob("*.json")):
                process.send_signal(signal.SIGKILL)
                break
            time.sleep(0.005)
    finally:
        process.wait(timeout=60)
    finished = len(list(records.glob("*.json")))
    assert process.returncode == -signal.SIGKILL
    assert 1 <= finished < N_DATASETS
    real_run_chunk = calibrate.run_chunk
    calls = []
    monkeypatch.setattr(calibrate, "run_chunk",
                        lambda task: calls.append(task) or real_run_chunk(task))
    assert main(screen_args(tables, out)) == 0
    assert f"reusing {finished} finished dataset" in capsys.readouterr().err
    assert len(calls) == N_DATASETS - finished
    assert (out / "results.tsv").read_bytes() == (reference / "results.tsv").read_bytes()


def test_other_settings_into_the_same_folder_are_refused(tables, tmp_path, capsys):
    out = tmp_path / "res"
    assert main(screen_args(tables, out, "--quiet", seed=1)) == 0
    capsys.readouterr()
    assert main(screen_args(tables, out, "--quiet", seed=2)) == 2
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1
    assert "--seed: 1 there, 2 now" in err and "another --out" in err
    assert main(screen_args(tables, out, "--quiet", time_by=False)) == 2
    assert "--time-by: day there, none now" in capsys.readouterr().err


def test_results_of_a_dataset_do_not_depend_on_the_others(tables):
    from driftscreen.intake import read_datasets

    counts, metadata = tables
    datasets = read_datasets(counts, metadata, dataset_by=["dataset"], time_by="day")
    settings = CalibrationSettings(replicates=19, groupings=10, seed=4)
    everything = screen(datasets, settings)
    alone = screen([datasets[2]], settings)
    without = screen([datasets[3], datasets[2]], settings)
    expected = result_to_dict(everything.outcomes[2].result)
    assert result_to_dict(alone.outcomes[0].result) == expected
    assert result_to_dict(without.outcomes[1].result) == expected
    # Only the q-values depend on the family of datasets, by the nature of FDR control.
    assert alone.qvalue(0, "combined") == alone.outcomes[0].pvalue("combined")


def test_snapshot_screen(tmp_path):
    sim = tmp_path / "sim"
    assert main(["simulate", "--out", str(sim), "--datasets", "3", "--snapshot", "--taxa", "12",
                 "--samples", "20", "--seed", "2"]) == 0
    out = tmp_path / "res"
    tables = (sim / "counts.tsv", sim / "metadata.tsv")
    assert main(screen_args(tables, out, "--quiet", time_by=False)) == 0
    rows = read_rows(out / "results.tsv")
    assert "regrouping_invariance" not in {r["statistic"] for r in rows}
    assert len(rows) == 3 * 4
    parameters = read_rows(out / "parameters.tsv")
    assert all(r["design"] == "snapshot" and r["rate_per_day"] == "" and r["span_days"] == ""
               for r in parameters)
    report = (out / "report.txt").read_text(encoding="utf-8")
    assert max(len(line) for line in report.splitlines()) <= WIDTH
    assert "R = 10" not in report.split("\nMethods\n")[1]


def test_missing_dask_is_a_one_line_input_error(tables, tmp_path, monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "distributed", None)
    out = tmp_path / "res"
    assert main(screen_args(tables, out, "--backend", "dask")) == 2
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and "pip install 'driftscreen[dask]'" in err
    assert not out.exists()


def test_scheduler_needs_the_dask_backend(tables, tmp_path, capsys):
    assert main(screen_args(tables, tmp_path / "res", "--scheduler", "tcp://127.0.0.1:1")) == 2
    assert "add --backend dask" in capsys.readouterr().err


def test_python_call_and_command_line_share_the_store(tables, reference, tmp_path, capsys):
    from driftscreen.commands import screen_command

    counts, metadata = tables
    out = tmp_path / "res"
    paths = screen_command(str(counts), str(metadata), out=out,
                           intake={"dataset_by": ["dataset"], "time_by": "day"},
                           replicates=19, groupings=10, seed=1)
    assert [p.name for p in paths] == OUTPUTS
    assert (out / "results.tsv").read_bytes() == (reference / "results.tsv").read_bytes()
    assert main(screen_args(tables, out)) == 0
    assert f"reusing {N_DATASETS} finished datasets" in capsys.readouterr().err


def test_marginal_statistics_withheld_on_short_series_with_a_stationary_start(tmp_path, capsys):
    """A slow series (rate x span ~ 6 correlation times) tested with replicates from the
    stationary law gets no p-value for the marginal statistics, with the reason in the note;
    regrouping_invariance and combined keep theirs. Conditioned on the first sample (the
    default) every statistic gets one."""
    folder = tmp_path / "slow"
    assert main(["simulate", "--out", str(folder), "--taxa", "15", "--samples", "30",
                 "--theta", "40", "--rate", "0.2", "--seed", "5"]) == 0
    tables = (folder / "counts.tsv", folder / "metadata.tsv")
    marginal = ("stationary_divergence", "fluctuation_scaling", "dispersion_heterogeneity")
    for start, withheld in (("stationary", True), ("first-sample", False)):
        out = tmp_path / start
        assert main(screen_args(tables, out) + ["--start", start]) == 0
        capsys.readouterr()
        rows = {r["statistic"]: r for r in read_rows(out / "results.tsv")}
        for name in marginal:
            assert (rows[name]["p_value"] == "") == withheld
            assert ("correlation times" in rows[name]["note"]) == withheld
            assert rows[name]["observed"] != ""
        assert rows["regrouping_invariance"]["p_value"] != ""
        assert rows["combined"]["p_value"] != ""
