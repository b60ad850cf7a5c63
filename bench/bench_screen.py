"""Wall time of `driftscreen screen` with one and two jobs (run by hand).

Simulates N neutral time series (default 100) of 40 taxa x 100 daily samples with
``driftscreen.synthetic.neutral_collection``, writes them as one table, screens them with B = 199 replicates
with --jobs 1 and with --jobs 2 (loky), and prints both wall times, the speedup, the time
per dataset and whether the two runs wrote byte-identical results.tsv. Worker processes
use one BLAS thread each, so the speedup measures the parallel layout on a 2-core machine.
With a third argument, an interpreter that has another driftscreen version installed (e.g.
the previous release in its own venv), the same screen is also timed there with --jobs 2,
in ROUNDS rounds (default 3) that alternate this version and the baseline, and the ratio of
each round and their median are printed: on a shared machine the load drifts within
minutes, and alternating rounds see the same drift.

Usage: python bench/bench_screen.py [N_DATASETS] [REPLICATES] [BASELINE_PYTHON] [ROUNDS]
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# Only names every version has are imported by name: the baseline interpreter imports this
# module for timed_screen, and older versions kept the collection helpers elsewhere.
from driftscreen import synthetic
from driftscreen.commands import screen_command

N_TAXA = 40
N_SAMPLES = 100
THETA = 50.0
RATE = 0.2
SEED = 2024


def write_inputs(folder: Path, n_datasets: int) -> tuple[Path, Path]:
    spec = synthetic.DesignSpec(n_samples=N_SAMPLES, interval=1.0, depth=10_000,
                                depth_spread=0.3)
    datasets = synthetic.neutral_collection(n_datasets, spec, N_TAXA, THETA, RATE, SEED)
    return synthetic.write_collection(datasets, folder / "sim")


def timed_screen(counts: Path, metadata: Path, out: Path, replicates: int, jobs: int) -> float:
    start = time.perf_counter()
    screen_command(str(counts), str(metadata), out=out,
                   intake={"dataset_by": ["dataset"], "time_by": "day"},
                   replicates=replicates, groupings=200, seed=1, jobs=jobs)
    return time.perf_counter() - start


def baseline_wall(python: str, counts: Path, metadata: Path, out: Path,
                  replicates: int) -> float:
    """Wall time of the same screen, --jobs 2, under another interpreter's driftscreen."""
    code = ("import sys, time; sys.path.insert(0, sys.argv[1]); import bench_screen as b; "
            "from pathlib import Path; "
            "print('WALL', b.timed_screen(Path(sys.argv[2]), Path(sys.argv[3]), "
            "Path(sys.argv[4]), int(sys.argv[5]), 2))")
    output = subprocess.run([python, "-c", code, str(Path(__file__).parent), str(counts),
                             str(metadata), str(out), str(replicates)], check=True,
                            capture_output=True, text=True).stdout
    return float(output.split("WALL")[-1])


def main(n_datasets: int, replicates: int, baseline: str | None = None,
         rounds: int = 3) -> None:
    with tempfile.TemporaryDirectory() as temporary:
        folder = Path(temporary)
        counts, metadata = write_inputs(folder, n_datasets)
        print(f"{n_datasets} datasets of {N_TAXA} taxa x {N_SAMPLES} samples, B = {replicates}, "
              f"{os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f} "
              "(other processes share the cores above 0)")
        seconds = {}
        for jobs in (1, 2):
            seconds[jobs] = timed_screen(counts, metadata, folder / f"jobs{jobs}", replicates,
                                         jobs)
            print(f"--jobs {jobs}: {seconds[jobs]:8.1f} s  "
                  f"({seconds[jobs] / n_datasets:.2f} s per dataset)")
        print(f"speedup jobs 2 / jobs 1: {seconds[1] / seconds[2]:.2f}x")
        same = ((folder / "jobs1" / "results.tsv").read_bytes()
                == (folder / "jobs2" / "results.tsv").read_bytes())
        print(f"results.tsv identical: {same}")
        if baseline:
            ratios = []
            for round_ in range(1, rounds + 1):
                this = seconds[2] if round_ == 1 else timed_screen(
                    counts, metadata, folder / f"this{round_}", replicates, 2)
                other = baseline_wall(baseline, counts, metadata, folder / f"baseline{round_}",
                                      replicates)
                ratios.append(this / other)
                print(f"round {round_}: this version --jobs 2 {this:8.1f} s, baseline "
                      f"({baseline}) {other:8.1f} s; ratio {ratios[-1]:.2f}")
            print(f"this version / baseline, median of {rounds} alternating rounds: "
                  f"{statistics.median(ratios):.2f} (range {min(ratios):.2f} - {max(ratios):.2f})")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 100,
         int(sys.argv[2]) if len(sys.argv) > 2 else 199,
         sys.argv[3] if len(sys.argv) > 3 else None,
         int(sys.argv[4]) if len(sys.argv) > 4 else 3)
