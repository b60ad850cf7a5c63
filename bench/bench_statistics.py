"""Speed of the neutrality statistics on a bootstrap-sized batch (run by hand).

R = 999 exact neutral replicates of a daily time series with T = 200 samples, K = 100
taxa, theta = 50, rate 0.5 per day and depths spread 100-fold, each fitted with
``fit_batch``. For every statistic prints the time for the whole batch in calibration
chunks (as the parametric bootstrap calls it) and in one call, the time per replicate,
and its ratio to the time of one gammaln evaluation over all R T K count cells (the unit
of work of a likelihood pass). Target: all statistics together ~10 s on one core.
One BLAS thread, as on one core.

Usage: python bench/bench_statistics.py [R]
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

import sys
import time

import numpy as np
from scipy import special

from driftscreen.dataset import Design
from driftscreen.neutral.fit import fit_batch
from driftscreen.neutral.model import NeutralModel, NullFit
from driftscreen.neutral.simulate import simulate
from driftscreen.statistics.registry import default_statistics

N_SAMPLES, N_TAXA = 200, 100
#: Replicates per call of ``compute`` in the calibration's chunks (2e6 count cells).
CHUNK_CELLS = 2_000_000


def bench_design(rng: np.random.Generator) -> Design:
    """Daily samples, depths log-uniform over 200..20000 reads."""
    depths = np.rint(np.exp(rng.uniform(np.log(200), np.log(20000), N_SAMPLES)))
    return Design(depths=depths.astype(np.int64), times=np.arange(N_SAMPLES, dtype=float))


def rows(fit: NullFit, part: slice) -> NullFit:
    """The fits of the tables ``part``."""
    rate = None if fit.rate is None else fit.rate[part]
    return NullFit(fit.p[part], fit.theta[part], rate, fit.clipped[part])


def timed(function) -> float:
    """Wall time of one call, seconds."""
    start = time.perf_counter()
    function()
    return time.perf_counter() - start


def main(n_replicates: int = 999) -> None:
    rng = np.random.default_rng(20240601)
    weights = np.exp(rng.normal(0.0, 1.5, N_TAXA))
    model = NeutralModel(weights / weights.sum(), 50.0, 0.5)
    design = bench_design(rng)
    counts = simulate(model, design, n_replicates, rng)
    fit = fit_batch(counts, design)
    cells = counts.size
    shifted = counts + 0.5
    out = special.gammaln(shifted)
    unit = timed(lambda: special.gammaln(shifted, out=out))
    chunk = max(1, CHUNK_CELLS // (N_SAMPLES * N_TAXA))
    parts = [slice(s, s + chunk) for s in range(0, n_replicates, chunk)]
    print(f"R={n_replicates} T={N_SAMPLES} K={N_TAXA}: {cells:.3g} cells; one gammaln pass "
          f"{unit:.3f} s ({unit / cells * 1e9:.1f} ns/cell); chunks of {chunk} replicates")
    print(f"{'statistic':26s} {'chunked s':>10s} {'whole s':>8s} {'ms/replicate':>13s} "
          f"{'x gammaln':>10s}")
    total = 0.0
    for statistic in default_statistics(time_series=True):
        chunked = timed(lambda: [statistic.compute(counts[part], design, rows(fit, part),
                                                   np.random.default_rng(1))
                                 for part in parts])
        whole = timed(lambda: statistic.compute(counts, design, fit, np.random.default_rng(1)))
        total += chunked
        print(f"{statistic.name:26s} {chunked:10.2f} {whole:8.2f} "
              f"{chunked / n_replicates * 1e3:13.2f} {chunked / unit:10.1f}")
    print(f"{'all statistics':26s} {total:10.2f} {'':8s} {total / n_replicates * 1e3:13.2f} "
          f"{total / unit:10.1f}   (target ~10 s for R = 999)")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 999)
