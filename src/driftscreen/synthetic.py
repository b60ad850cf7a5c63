"""Synthetic study designs and communities, for `driftscreen simulate`, the demo,
the calibration study, power analysis and the tests.

Designs mimic what microbial ecologists sample: daily or irregular time series with
sequencing depths that vary from sample to sample, or snapshot collections of replicate
communities. Metacommunities follow a log-normal abundance distribution, a common model of
species abundance distributions (Preston 1948, Ecology 29:254).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from driftscreen import seeds
from driftscreen.dataset import Dataset, Design
from driftscreen.errors import InputError
from driftscreen.intake import write_tables
from driftscreen.limits import (COMPETITION, DEPTH_SPREAD, INTERVAL, MAX_READS, MAX_SPAN_DAYS,
                               MAX_SPAN_YEARS, SIGMA)
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.niche import NoisyLotkaVolterra, StochasticLogistic

COUNTS_FILE = "counts.tsv"
METADATA_FILE = "metadata.tsv"
TRUTH_FILE = "truth.tsv"
#: The models :func:`simulated_dataset` simulates: the neutral null and two niche models.
MODELS = ("neutral", "logistic", "lotka-volterra")


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


def simulated_dataset(name: str, spec: DesignSpec, n_taxa: int, seed: int, *,
                      model: str = "neutral", theta: float = 50.0, rate: float = 0.2,
                      strength: float | None = None) -> tuple[Dataset, list[dict]]:
    """One simulated dataset from its own stream (keyed by ``seed`` and ``name``), and the
    truth behind it: one row per taxon (the metacommunity composition of a neutral dataset).

    ``model`` is ``"neutral"`` (theta, rate) or a niche model of :mod:`driftscreen.niche`
    with its default parameters and, if given, its ``strength``.
    """
    rng = seeds.generator(seeds.dataset_stream(seed, name))
    design = spec.draw(rng)
    if model == "neutral":
        null = NeutralModel(metacommunity(n_taxa, rng), theta,
                            rate if design.is_time_series else None)
        counts = simulate(null, design, 1, rng)[0]
        note = (f"simulated neutral community: theta {theta:g}"
                + (f", rate {rate:g} per day" if design.is_time_series else ""))
        truth = [{"dataset": name, "model": model, "taxon": f"taxon_{i + 1:0{len(str(n_taxa))}d}",
                  "p": repr(float(p_i)), "theta": repr(theta),
                  "rate": repr(rate) if design.is_time_series else "", "strength": ""}
                 for i, p_i in enumerate(null.p)]
    else:
        niche = niche_model(model, n_taxa, strength)
        counts = niche.simulate(design, 1, rng)[0]
        note = f"simulated {model} niche community: strength {niche.strength:g}"
        truth = [{"dataset": name, "model": model, "taxon": "", "p": "", "theta": "",
                  "rate": "", "strength": repr(float(niche.strength))}]
    return as_dataset(name, counts, design, (note + f", seed {seed}",)), truth


def niche_model(model: str, n_taxa: int,
                strength: float | None) -> StochasticLogistic | NoisyLotkaVolterra:
    """The niche model ``model`` of :mod:`driftscreen.niche` with its default parameters and,
    if given, ``strength``; an out-of-range strength is an input error."""
    niche_class = StochasticLogistic if model == "logistic" else NoisyLotkaVolterra
    try:
        return niche_class(n_taxa) if strength is None else niche_class(n_taxa, strength=strength)
    except ValueError as error:
        raise InputError(str(error), parameter="strength",
                         fix=f"logistic strengths (sigma) lie in {SIGMA.interval()}; "
                             f"Lotka-Volterra strengths are >= {COMPETITION.minimum:g}") from None


def neutral_collection(n_datasets: int, spec: DesignSpec, n_taxa: int, theta: float,
                       rate: float, seed: int, prefix: str = "community") -> list[Dataset]:
    """``n_datasets`` independent neutral datasets, each from its own seeded stream."""
    width = len(str(n_datasets))
    return [simulated_dataset(f"{prefix}_{index + 1:0{width}d}", spec, n_taxa, seed,
                              theta=theta, rate=rate)[0] for index in range(n_datasets)]


def write_collection(datasets: Sequence[Dataset], out: Path) -> tuple[Path, Path]:
    """Write datasets as one counts table and one metadata table in ``out``."""
    out.mkdir(parents=True, exist_ok=True)
    counts_path, metadata_path = out / COUNTS_FILE, out / METADATA_FILE
    write_tables(datasets, counts_path, metadata_path)
    return counts_path, metadata_path


def truth_tsv(rows: Sequence[dict[str, str]]) -> str:
    """The truth behind simulated datasets (rows of :func:`simulated_dataset`) as TSV text."""
    columns = list(rows[0])
    return "\t".join(columns) + "\n" + "".join(
        "\t".join(row[c] for c in columns) + "\n" for row in rows)


def check_design_span(n_samples: int, interval: float | None) -> None:
    """A synthetic time series spans at most :data:`driftscreen.limits.MAX_SPAN_DAYS`, the
    longest span intake accepts."""
    if interval is not None and interval * (n_samples - 1) > MAX_SPAN_DAYS:
        raise InputError(f"{n_samples} samples every {interval:g} days span "
                         f"{interval * (n_samples - 1) / 365.25:.0f} years, more than a "
                         f"sampling campaign of {MAX_SPAN_YEARS} years",
                         parameter="interval", fix="give fewer samples or a shorter interval")
