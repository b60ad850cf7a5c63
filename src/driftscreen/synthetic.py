"""Synthetic study designs and communities, for `driftscreen simulate`, the demo,
the validation study and power analysis.

Designs mimic what microbial ecologists sample: daily or irregular time series with
sequencing depths that vary from sample to sample, or snapshot collections of replicate
communities. Metacommunities follow a log-normal abundance distribution, a common model of
species abundance distributions (Preston 1948, Ecology 29:254).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from driftscreen.dataset import Dataset, Design
from driftscreen.limits import DEPTH_SPREAD, INTERVAL, MAX_READS, MAX_SPAN_DAYS


@dataclass(frozen=True)
class DesignSpec:
    """How to lay out the samples of one synthetic dataset.

    Attributes
    ----------
    n_samples:
        Number of samples T.
    interval:
        Mean days between samples; ``None`` makes a snapshot design (no times).
    irregular:
        Draw gaps from a Gamma(2) distribution with mean ``interval`` instead of a fixed step.
    depth:
        Median sequencing depth (reads per sample).
    depth_spread:
        Standard deviation of log depth (0: every sample has ``depth`` reads).
    """

    n_samples: int = 100
    interval: float | None = 1.0
    irregular: bool = False
    depth: int = 10_000
    depth_spread: float = 0.0

    def __post_init__(self) -> None:
        if self.interval is not None:
            INTERVAL.check("interval", self.interval)
            if self.interval * (self.n_samples - 1) > MAX_SPAN_DAYS:
                raise ValueError(f"{self.n_samples} samples every {self.interval:g} days span "
                                 f"more than {MAX_SPAN_DAYS:g} days")
        DEPTH_SPREAD.check("depth_spread", self.depth_spread)

    def draw(self, rng: np.random.Generator) -> Design:
        """A concrete design: times in days from 0 and per-sample depths."""
        if self.n_samples < 2:
            raise ValueError("a design needs at least 2 samples")
        depths = np.full(self.n_samples, float(self.depth))
        if self.depth_spread > 0:
            depths *= np.exp(rng.normal(0.0, self.depth_spread, self.n_samples))
        depths = np.clip(np.rint(depths), 10, MAX_READS).astype(np.int64)
        if self.interval is None:
            return Design(depths=depths)
        if self.irregular:
            gaps = rng.gamma(2.0, self.interval / 2.0, self.n_samples - 1)
            gaps = np.maximum(gaps, self.interval * 1e-3)
        else:
            gaps = np.full(self.n_samples - 1, float(self.interval))
        times = np.concatenate([[0.0], np.cumsum(gaps)])
        return Design(depths=depths, times=np.round(times, 6))


def metacommunity(n_taxa: int, rng: np.random.Generator, spread: float = 1.5) -> np.ndarray:
    """A metacommunity composition p: log-normal abundances (log-sd ``spread``), sorted."""
    if n_taxa < 2:
        raise ValueError("a community needs at least 2 taxa")
    weights = np.exp(rng.normal(0.0, spread, n_taxa))
    return np.sort(weights / weights.sum())[::-1]


def as_dataset(name: str, counts: np.ndarray, design: Design, notes: tuple[str, ...] = ()
               ) -> Dataset:
    """A Dataset from simulated counts (T, K), dropping taxa that drew no reads."""
    present = counts.sum(axis=0) > 0
    kept = counts[:, present]
    width = len(str(counts.shape[1]))
    taxa = tuple(f"taxon_{i + 1:0{width}d}" for i in np.flatnonzero(present))
    width_s = len(str(counts.shape[0]))
    samples = tuple(f"{name}_s{t + 1:0{width_s}d}" for t in range(counts.shape[0]))
    design = Design(depths=kept.sum(axis=1), times=design.times)
    return Dataset(name=name, counts=kept, taxa=taxa, samples=samples, design=design,
                   notes=notes, dropped_taxa=int(np.count_nonzero(~present)))
