"""`driftscreen screen --backend dask`: same results as loky on a local Dask cluster."""

from __future__ import annotations

import pytest

from driftscreen import calibrate
from driftscreen.cli import main

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    folder = tmp_path_factory.mktemp("sim")
    assert main(["simulate", "--out", str(folder), "--datasets", "3", "--taxa", "12",
                 "--samples", "25", "--seed", "9"]) == 0
    return folder / "counts.tsv", folder / "metadata.tsv"


@pytest.fixture(scope="module")
def scheduler():
    """An in-process Dask cluster (threads, no network) started by the test."""
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster:
        yield cluster.scheduler_address


def screen_args(tables, out, *extra):
    counts, metadata = tables
    return ["screen", str(counts), "--metadata", str(metadata), "--dataset-by", "dataset",
            "--time-by", "day", "--replicates", "19", "--groupings", "10", "--seed", "3",
            "--out", str(out), "--quiet", *extra]


def test_dask_backend_gives_the_same_files_as_loky(tables, scheduler, tmp_path, capsys):
    loky, dask = tmp_path / "loky", tmp_path / "dask"
    assert main(screen_args(tables, loky, "--jobs", "2")) == 0
    assert main(screen_args(tables, dask, "--backend", "dask", "--scheduler", scheduler)) == 0
    assert capsys.readouterr().err == ""
    for name in ("results.tsv", "parameters.tsv", "results.json"):
        assert (dask / name).read_bytes() == (loky / name).read_bytes(), name


def test_dask_backend_runs_the_chunks_on_the_cluster(tables, scheduler, tmp_path,
                                                     monkeypatch):
    real_run_chunk = calibrate.run_chunk
    workers = []

    def run_chunk_on_worker(task):
        workers.append(distributed.get_worker().address)  # ValueError outside a worker
        return real_run_chunk(task)

    monkeypatch.setattr(calibrate, "run_chunk", run_chunk_on_worker)
    assert main(screen_args(tables, tmp_path / "res", "--backend", "dask",
                            "--scheduler", scheduler)) == 0
    assert len(workers) >= 3 and all(workers)  # one chunk per dataset, more for influence
