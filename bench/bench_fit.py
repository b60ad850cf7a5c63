"""Speed and memory of the neutral-null estimators on a bootstrap-sized batch (run by hand).

Prints, for (T, K) in {(100, 40), (200, 100), (365, 200)} and R = 999 replicates of an
irregular daily-ish time series, the time per replicate of ``fit_batch``, the time of
one pass that turns the counts into proportions (the floor: every estimator reads every
count at least once), their ratio, the snapshot fit time, and the peak memory allocated
by ``fit_batch`` beyond its input. One BLAS thread, as on one core.

Usage: python bench/bench_fit.py [R]
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import sys
import time
import tracemalloc

import numpy as np

from driftscreen.dataset import Design
from driftscreen.neutral.fit import fit_batch

SIZES = ((100, 40), (200, 100), (365, 200))


def neutral_like_counts(n_replicates: int, design: Design, n_taxa: int,
                        rng: np.random.Generator) -> np.ndarray:
    """Dirichlet-multinomial counts (independent samples): the fit's cost does not depend on
    the dependence between samples, only on the sizes."""
    p = rng.dirichlet(np.full(n_taxa, 0.5))
    x = rng.dirichlet(50.0 * p + 1e-3, size=(n_replicates, design.n_samples))
    x /= x.sum(axis=2, keepdims=True)
    return rng.multinomial(design.depths[None, :], x)


def best_time(func, repeats: int = 3) -> float:
    """Best wall time of ``repeats`` calls, in seconds."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return min(times)


def proportions_floor(counts: np.ndarray, design: Design) -> float:
    """One pass turning counts into float proportions, in seconds."""
    depths = design.depths[:, None].astype(np.float64)
    return best_time(lambda: counts / depths)


def peak_extra_memory(counts: np.ndarray, design: Design) -> float:
    """Peak bytes allocated during fit_batch (numpy reports to tracemalloc), in MB."""
    tracemalloc.start()
    fit_batch(counts, design)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak / 2**20


def main(n_replicates: int) -> None:
    rng = np.random.default_rng(20240601)
    print(f"R = {n_replicates}; times in ms per replicate; one BLAS thread")
    print(f"{'T':>4} {'K':>4} {'fit series':>11} {'floor':>11} {'ratio':>6} "
          f"{'fit snapshot':>13} {'peak MB':>8} {'input MB':>9}")
    for n_samples, n_taxa in SIZES:
        times = np.cumsum(rng.uniform(0.5, 1.5, n_samples))
        depths = rng.integers(5_000, 30_000, n_samples)
        series = Design(depths, times)
        snapshot = Design(depths)
        counts = neutral_like_counts(n_replicates, series, n_taxa, rng)
        t_series = best_time(lambda: fit_batch(counts, series), repeats=2)
        t_snapshot = best_time(lambda: fit_batch(counts, snapshot), repeats=2)
        t_floor = proportions_floor(counts, series)
        peak = peak_extra_memory(counts, series)
        per = 1e3 / n_replicates
        print(f"{n_samples:>4} {n_taxa:>4} {t_series * per:>11.3f} {t_floor * per:>11.3f} "
              f"{t_series / t_floor:>6.2f} {t_snapshot * per:>13.3f} {peak:>8.0f} "
              f"{counts.nbytes / 2**20:>9.0f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 999)
