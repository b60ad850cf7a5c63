"""Speed and memory of the exact neutral simulator (run by hand).

Scenario: K = 200 taxa, T = 365 samples, R = 999 replicates; gaps between samples drawn
from a gamma law with shape 2 and mean 1 day; theta = 100 and rate lambda = 0.3 per day
(a gut-like community whose lag-1 correlation is ~0.74; E[A] per interval ~100-1000);
metacommunity p log-normal with sigma 2 (a few dominant taxa, a long rare tail); depths
log-normal around 1e4 reads (sigma 0.3). All fixed seeds.

It consumes ``iter_simulate`` chunks without keeping them and prints the wall and CPU
time, the floor (drawing the same number R*T*K of standard gamma variates with the
stationary shapes theta*p, in blocks of the same size, interleaved chunk by chunk with
the simulation so that both see the same machine load), their ratio (of CPU times, which
a busy machine disturbs least), the peak memory (process ``ru_maxrss`` and the
``tracemalloc`` peak of numpy arrays), a breakdown of the three random draws each step
needs, and whether the targets (ratio <= 3, peak <= 1 GiB) are met.

Usage: python bench/bench_simulate.py [--replicates R] [--chunk-size C]
Run e.g. ``--replicates 250`` and ``--replicates 4000`` to see that memory stays flat.
"""

from __future__ import annotations

import argparse
import resource
import time
import tracemalloc

import numpy as np

from driftscreen.dataset import Design
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.dirichlet import dirichlet_rows
from driftscreen.neutral.lines_of_descent import LinesOfDescentSampler
from driftscreen.neutral.simulate import (
    default_chunk_size,
    diffusion_intervals,
    iter_simulate,
    replicates_per_block,
)

N_TAXA = 200
N_SAMPLES = 365
THETA = 100.0
RATE = 0.3
TARGET_RATIO = 3.0
TARGET_PEAK_BYTES = 2**30


def scenario(seed: int = 20240601) -> tuple[NeutralModel, Design]:
    """The benchmark community and design (invented, fixed seed)."""
    rng = np.random.default_rng(seed)
    p = rng.lognormal(0.0, 2.0, N_TAXA)
    times = np.concatenate([[0.0], np.cumsum(rng.gamma(2.0, 0.5, N_SAMPLES - 1))])
    depths = np.rint(rng.lognormal(np.log(1e4), 0.3, N_SAMPLES)).astype(np.int64)
    return NeutralModel(p / p.sum(), THETA, RATE), Design(depths=depths, times=times)


class Stopwatch:
    """Accumulates wall time and this process's CPU time over timed sections."""

    def __init__(self) -> None:
        self.wall = 0.0
        self.cpu = 0.0

    def __enter__(self) -> Stopwatch:
        self._wall, self._cpu = time.perf_counter(), time.process_time()
        return self

    def __exit__(self, *exc: object) -> None:
        self.wall += time.perf_counter() - self._wall
        self.cpu += time.process_time() - self._cpu


def gamma_floor(model: NeutralModel, n_rows: int, n_samples: int,
                rng: np.random.Generator) -> None:
    """R*T*K standard gamma variates with the stationary shapes, in simulator-sized blocks."""
    block = replicates_per_block(model.n_taxa, n_samples)
    for first in range(0, n_rows, block):
        shapes = np.tile(model.theta * model.p, (min(block, n_rows - first), 1))
        for _ in range(n_samples):
            rng.standard_gamma(shapes)


def run(model: NeutralModel, design: Design, n_replicates: int, chunk_size: int | None
        ) -> tuple[Stopwatch, Stopwatch, int]:
    """Time the simulation chunk by chunk, each chunk followed by its floor.

    Interleaving keeps both measurements under the same machine load. Returns the
    simulation and floor stopwatches and the tracemalloc peak (bytes) of the simulation.
    """
    simulation, floor = Stopwatch(), Stopwatch()
    floor_rng = np.random.default_rng(2)
    tracemalloc.start()
    chunks = iter_simulate(model, design, n_replicates, np.random.default_rng(1),
                           chunk_size=chunk_size)
    while True:
        with simulation:
            chunk = next(chunks, None)
        if chunk is None:
            break
        n_rows = chunk.shape[0]
        del chunk
        with floor:
            gamma_floor(model, n_rows, design.n_samples, floor_rng)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return simulation, floor, peak


def draw_breakdown(model: NeutralModel, design: Design) -> dict[str, float]:
    """CPU ns per replicate x sample x taxon of each random draw of one step, on one block.

    The three draws every step needs: lines L ~ Multinomial(A, x), gamma variates of
    shape theta p + L, and the sequencing Multinomial(depth, x); at stationarity, in the
    simulator's taxon order (decreasing p).
    """
    rng = np.random.default_rng(3)
    rows = replicates_per_block(model.n_taxa, design.n_samples)
    theta_p = model.theta * np.sort(model.p)[::-1]
    x = dirichlet_rows(np.tile(theta_p, (rows, 1)), rng)
    sampler = LinesOfDescentSampler(model.theta, diffusion_intervals(model, design.times))
    lines = [sampler.draw(j, rows, rng) for j in range(design.n_samples - 1)]
    watches = {name: Stopwatch() for name in ("lines", "gamma", "sequencing", "floor")}
    for j, a in enumerate(lines):
        with watches["lines"]:
            surviving = rng.multinomial(a, x)
        shapes = theta_p + surviving
        with watches["gamma"]:
            rng.standard_gamma(shapes)
        with watches["sequencing"]:
            rng.multinomial(design.depths[j], x)
        with watches["floor"]:
            rng.standard_gamma(np.broadcast_to(theta_p, x.shape))
    cells = len(lines) * x.size
    return {name: watch.cpu / cells * 1e9 for name, watch in watches.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--replicates", type=int, default=999)
    parser.add_argument("--chunk-size", type=int, default=None)
    args = parser.parse_args()
    model, design = scenario()
    n_replicates = args.replicates
    cells = n_replicates * design.n_samples * model.n_taxa
    chunk = args.chunk_size or default_chunk_size(model.n_taxa, design.n_samples)
    print(f"K={model.n_taxa} taxa, T={design.n_samples} samples, R={n_replicates} replicates; "
          f"theta={model.theta:g}, rate={model.rate:g}/day, span {design.times[-1]:.0f} days, "
          f"median depth {np.median(design.depths):.0f}")
    print(f"block {replicates_per_block(model.n_taxa, design.n_samples)} replicates, "
          f"chunk {chunk} replicates")
    simulation, floor, traced_peak = run(model, design, n_replicates, args.chunk_size)
    ratio = simulation.cpu / floor.cpu
    rss_peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(f"simulation: {simulation.wall:.2f} s wall, {simulation.cpu:.2f} s CPU "
          f"({simulation.cpu / cells * 1e9:.0f} ns per replicate x sample x taxon)")
    print(f"floor (standard_gamma, same count and blocks): {floor.wall:.2f} s wall, "
          f"{floor.cpu:.2f} s CPU ({floor.cpu / cells * 1e9:.0f} ns per variate)")
    print(f"ratio (CPU time): {ratio:.2f}   (wall time: {simulation.wall / floor.wall:.2f})")
    print(f"peak memory: tracemalloc {traced_peak / 2**20:.0f} MiB, "
          f"ru_maxrss {rss_peak / 2**20:.0f} MiB")
    parts = draw_breakdown(model, design)
    print("per-step draws alone (CPU ns per cell): "
          + ", ".join(f"{name} {value:.0f}" for name, value in parts.items())
          + f"; their sum / floor = "
          f"{(parts['lines'] + parts['gamma'] + parts['sequencing']) / parts['floor']:.2f}")
    ratio_ok = "met" if ratio <= TARGET_RATIO else "NOT met"
    memory_ok = "met" if max(rss_peak, traced_peak) <= TARGET_PEAK_BYTES else "NOT met"
    print(f"targets: ratio <= {TARGET_RATIO:g} {ratio_ok}; peak <= 1 GiB {memory_ok}")


if __name__ == "__main__":
    main()
