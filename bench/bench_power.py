"""Speed of power runs: seconds per simulated dataset, speed-up with jobs, a detectable line.

Run by hand: ``python bench/bench_power.py``. Prints figures and ratios; asserts nothing.
"""

from __future__ import annotations

import time

from driftscreen.calibrate import CalibrationSettings
from driftscreen.power import PowerDesign, detectable_line, power_curve
from driftscreen.synthetic import DesignSpec, neutral_collection

DESIGN = dict(n_taxa=40, n_samples=100, interval=1.0, depth=10_000)
STRENGTHS = (1e-3, 1e-2)
DATASETS = 8
REPLICATES = 199


def timed_run(jobs: int) -> float:
    design = PowerDesign.from_numbers(**DESIGN)
    start = time.perf_counter()
    power_curve(design, "logistic", STRENGTHS, n_datasets=DATASETS, replicates=REPLICATES,
                groupings=200, seed=1, jobs=jobs)
    return time.perf_counter() - start


def main() -> None:
    n_tests = len(STRENGTHS) * DATASETS
    print(f"design {DESIGN}, strengths {STRENGTHS}, {DATASETS} datasets each, B = {REPLICATES}")
    seconds = {jobs: timed_run(jobs) for jobs in (1, 2)}
    for jobs, value in seconds.items():
        print(f"jobs {jobs}: {value:.1f} s, {value / n_tests:.2f} s per simulated dataset")
    print(f"speed-up jobs 2 / jobs 1: {seconds[1] / seconds[2]:.2f}x")
    dataset = neutral_collection(1, DesignSpec(n_samples=DESIGN["n_samples"], interval=1.0,
                                               depth=DESIGN["depth"]),
                                 DESIGN["n_taxa"], 50.0, 0.2, seed=2)[0]
    start = time.perf_counter()
    line = detectable_line(dataset, CalibrationSettings(seed=0), jobs=2)
    print(f"detectable line (jobs 2): {time.perf_counter() - start:.1f} s")
    print(line)


if __name__ == "__main__":
    main()
