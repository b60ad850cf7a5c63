"""Validation study: false-positive rate on neutral data, power on niche data.

A neutrality test that rejects neutral data too often, or never rejects niche data, is worse
than none. This module simulates collections of datasets with known truth and runs the full
calibrated test on every one of them. Neutral collections:

- **stationary**: a grid of designs (15 to 150 taxa, 30 to 300 samples, fixed and varying
  depth, regular and irregular intervals, strong and weak immigration, fast and slow
  dynamics, snapshots) started at stationarity and sequenced multinomially, drawn from the
  exact simulator and from the discrete Wright-Fisher simulator;
- **disturbed**: discrete Wright-Fisher communities disturbed just before the first sample
  (the three most abundant taxa cut to a tenth or a third, one random taxon blooming to 30%
  or 50% of the community, or a colonisation-like start from a stationary draw around
  another composition), relaxing towards the metacommunity while they are sampled;
- **noise100**, **noise300**, **noise1000**: stationary Wright-Fisher communities with
  Dirichlet-multinomial reads at precision C = 100, 300, 1000 (technical noise);
- **lognormal-noise**: stationary Wright-Fisher communities whose composition is multiplied
  by independent log-normal noise per taxon and sample (log-sd 0.2 to 0.5) before
  multinomial sequencing (a second form of technical noise; a smaller collection);
- **short**: stationary Wright-Fisher series of 10 to 25 daily or irregular samples.

Every Wright-Fisher community of the new collections has 10^4 to 10^6 individuals, theta =
2 N m from 10 to 1000 and relaxation rate lambda = m x (generations per day) from 0.05 to 1
per day, 10 to 200 generations per day; 15 to 100 taxa, depths 2,000 to 20,000 with and
without a spread. Niche collections (power): the stochastic logistic model (Grilli 2020) and
the noisy generalised Lotka-Volterra model, 40 taxa, 100 daily samples, depth 10^4, with
multinomial reads and with Dirichlet-multinomial reads at C = 300; and **tracking**, a neutral
community in which five taxa of known strengths also track a fluctuating environment
(:class:`driftscreen.niche.EnvironmentalTracking`), the planted truth of the per-taxon scan.

It reports, per statistic and collection, the rejection rate at a level alpha with a Wilson
95% interval (Wilson 1927, JASA 22:209), and for the per-taxon scan
(:mod:`driftscreen.taxon_scan`) the share of neutral datasets with any taxon at q <= 0.05,
a Kolmogorov-Smirnov check that per-taxon p-values of neutral data are uniform (one taxon
per dataset, drawn at random, so that the p-values are independent) and, on niche data,
the recall of the five taxa with the largest true departures (the ``departures`` of the
niche models: the responding taxa of the tracking collection, the largest carrying
capacities of the others). Run the whole study with
``python -m driftscreen.calibration_study`` (see ``--help``); a small version runs in the test suite.
"""

from __future__ import annotations

import argparse
import itertools
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass
from functools import partial

import numpy as np
import pandas as pd
from joblib import Parallel, delayed
from scipy.stats import binomtest, kstest

from driftscreen import seeds
from driftscreen.calibrate import correlation_times, neutrality_test
from driftscreen.cli import Parser
from driftscreen.dataset import Dataset, Design
from driftscreen.files import atomic_write_text
from driftscreen.neutral.dirichlet import dirichlet_rows
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.neutral.wright_fisher import (
    Disturbance,
    dirichlet_multinomial_reads,
    simulate_wright_fisher,
    wright_fisher_compositions,
    wright_fisher_for,
)
from driftscreen.niche import EnvironmentalTracking, NoisyLotkaVolterra, StochasticLogistic
from driftscreen.results import NeutralityResult
from driftscreen.synthetic import DesignSpec, as_dataset, metacommunity
from driftscreen.taxon_scan import LEVEL as TAXON_LEVEL
from driftscreen.version import __version__

#: Individuals in the stationary collection's discrete Wright-Fisher community (at least).
WRIGHT_FISHER_SIZE = 2000
#: Generations in the shortest sampling interval of the stationary collection (at least):
#: its sampling times are rounded to whole generations, so fewer would jitter the times
#: the test is told about.
WRIGHT_FISHER_GENERATIONS = 50
#: Largest Wright-Fisher community the study will simulate.
WRIGHT_FISHER_MAX_SIZE = 1_000_000
#: Smallest Wright-Fisher community of the new collections (the diffusion's domain).
MIN_POPULATION = 10_000
#: Generations per day of the new collections' communities: at least this many, so that
#: sampling times on the generation grid stay close to the drawn design...
MIN_GENERATIONS_PER_DAY = 10.0
#: ... and at most this many, which with at most MAX_GENERATIONS keeps a dataset's
#: simulation under about a second (one generation costs 15-30 microseconds for 100 taxa).
MAX_GENERATIONS_PER_DAY = 200.0
MAX_GENERATIONS = 100_000

NEUTRAL_GENERATORS = ("exact", "wright-fisher")
NICHE_GENERATORS = ("logistic", "lotka-volterra", "tracking")
NOISE_PRECISIONS = {"noise100": 100.0, "noise300": 300.0, "noise1000": 1000.0}
NICHE_NOISE_PRECISION = 300.0
NEUTRAL_COLLECTIONS = ("stationary", "disturbed", *NOISE_PRECISIONS, "lognormal-noise",
                       "short")
NICHE_COLLECTIONS = ("logistic", "lotka-volterra", "logistic-noise300",
                     "lotka-volterra-noise300", "tracking")
COLLECTIONS = NEUTRAL_COLLECTIONS + NICHE_COLLECTIONS
#: Neutral collections whose data the null describes; lognormal-noise (noise of another form
#: than Dirichlet-multinomial reads) lies outside it and is kept out of the pooled tables.
OUTSIDE_NULL = ("lognormal-noise",)
#: Relative size of the lognormal-noise collection (a second, optional noise form).
LOGNORMAL_SHARE = 0.5


@dataclass(frozen=True)
class Scenario:
    """One simulated dataset's recipe (everything but the random stream).

    ``generator`` is ``"exact"`` or ``"wright-fisher"`` (neutral), or ``"logistic"`` or
    ``"lotka-volterra"`` (niche, with the models' default parameters). ``interval`` None
    makes a snapshot design. ``rate`` is the relaxation rate lambda per day.

    Wright-Fisher communities of the new collections have ``population_size`` N > 0
    individuals and ``generations_per_day`` g, so that ``theta = 2 N m`` and
    ``rate = m g`` (design note, section 1); sampling times are put on the generation
    grid. ``population_size`` 0 sizes the community from theta and rate (the stationary
    collection). ``disturbance`` is ``"none"``, ``"cut-top3"`` (strength: the factor the
    three most abundant taxa are cut by), ``"bloom"`` (strength: the bloomer's share) or
    ``"colonisation"`` (strength: the share of the start composition drawn from another
    metacommunity). ``read_precision`` C < inf gives Dirichlet-multinomial reads;
    ``lognormal_sd`` > 0 multiplies every composition by log-normal noise before reads.
    """

    name: str
    generator: str
    n_taxa: int
    n_samples: int
    interval: float | None
    irregular: bool
    depth: int
    depth_spread: float
    theta: float = np.nan
    rate: float = np.nan
    collection: str = "stationary"
    population_size: int = 0
    generations_per_day: float = np.nan
    disturbance: str = "none"
    disturbance_strength: float = np.nan
    read_precision: float = np.inf
    lognormal_sd: float = 0.0

    @property
    def neutral(self) -> bool:
        return self.generator in NEUTRAL_GENERATORS

    @property
    def design_spec(self) -> DesignSpec:
        return DesignSpec(self.n_samples, self.interval, self.irregular, self.depth,
                          self.depth_spread)

    @property
    def immigration(self) -> float:
        """m = theta / (2 N) of a sized Wright-Fisher community."""
        return self.theta / (2.0 * self.population_size)


NEUTRAL_LEVELS = {
    "n_taxa": (15, 40, 150),
    "n_samples": (30, 100, 300),
    "depth": (2_000, 20_000),
    "depth_spread": (0.0, 0.5),
    "irregular": (False, True),
    "theta": (10.0, 300.0),
    "rate": (0.1, 0.5),
}


def neutral_scenarios(n_datasets: int, seed: int = 0, wright_fisher_share: float = 0.25,
                      snapshot_share: float = 0.15) -> list[Scenario]:
    """The stationary collection: a balanced sample of ``n_datasets`` scenarios of a grid.

    The grid crosses :data:`NEUTRAL_LEVELS` (taxa, samples, depth, depth spread, regular or
    irregular intervals, weak (theta 10) or strong (theta 300) immigration, slow or fast
    dynamics); scenarios are taken round-robin from a seeded permutation of it, so every
    level appears about equally often. A share are drawn from the discrete Wright-Fisher
    simulator and a share are snapshot designs.
    """
    grid = list(itertools.product(*NEUTRAL_LEVELS.values()))
    order = np.random.default_rng(seed).permutation(len(grid))
    scenarios = []
    for index in range(n_datasets):
        levels = dict(zip(NEUTRAL_LEVELS, grid[order[index % len(grid)]]))
        kind = index % 20
        snapshot = kind < round(20 * snapshot_share)
        wright_fisher = not snapshot and kind >= 20 - round(20 * wright_fisher_share)
        scenarios.append(Scenario(
            name=f"neutral_{index + 1:04d}",
            generator="wright-fisher" if wright_fisher else "exact",
            n_taxa=levels["n_taxa"], n_samples=levels["n_samples"],
            interval=None if snapshot else 1.0, irregular=levels["irregular"],
            depth=levels["depth"], depth_spread=levels["depth_spread"], theta=levels["theta"],
            rate=levels["rate"]))
    return scenarios


def niche_scenarios(n_datasets: int, generator: str,
                    read_precision: float = np.inf) -> list[Scenario]:
    """``n_datasets`` niche scenarios: 40 taxa, 100 daily samples, depth 10^4.

    A finite ``read_precision`` C gives Dirichlet-multinomial reads (collection
    ``"<generator>-noise<C>"``).
    """
    collection = generator if np.isinf(read_precision) else f"{generator}-noise{read_precision:g}"
    return [Scenario(name=f"{collection}_{index + 1:04d}", generator=generator, n_taxa=40,
                     n_samples=100, interval=1.0, irregular=False, depth=10_000,
                     depth_spread=0.0, collection=collection, read_precision=read_precision)
            for index in range(n_datasets)]


#: Design levels of the new Wright-Fisher collections (short series: SHORT_SAMPLES).
WRIGHT_FISHER_LEVELS = {
    "n_taxa": (15, 30, 60, 100),
    "n_samples": (20, 50, 100, 200),
    "depth": (2_000, 5_000, 20_000),
    "depth_spread": (0.0, 0.5),
    "irregular": (False, True),
}
SHORT_SAMPLES = (10, 15, 20, 25)
THETA_LEVELS = (10.0, 30.0, 100.0, 300.0, 1000.0)
RATE_LEVELS = (0.05, 0.1, 0.3, 1.0)
#: (form, strength) of the disturbed collection, used round-robin (any three in a row
#: cover the three forms).
DISTURBANCES = (("cut-top3", 0.1), ("bloom", 0.5), ("colonisation", 1.0),
                ("cut-top3", 1.0 / 3.0), ("bloom", 0.3), ("colonisation", 0.5))
LOGNORMAL_SDS = (0.2, 0.35, 0.5)


def population_bounds(theta: float, rate: float, n_samples: int) -> tuple[float, float]:
    """Smallest and largest N for which g = 2 N rate / theta respects the generation caps.

    The span of a series is taken as at most 1.5 n_samples days (irregular gaps have mean
    one day).
    """
    most_per_day = min(MAX_GENERATIONS_PER_DAY, MAX_GENERATIONS / (1.5 * n_samples))
    low = max(MIN_POPULATION, MIN_GENERATIONS_PER_DAY * theta / (2.0 * rate))
    high = min(WRIGHT_FISHER_MAX_SIZE, most_per_day * theta / (2.0 * rate))
    return low, high


def feasible_dynamics(n_samples: int) -> list[tuple[float, float]]:
    """(theta, rate) pairs of the level grids that a community of N >= 10^4 can realise."""
    pairs = []
    for theta, rate in itertools.product(THETA_LEVELS, RATE_LEVELS):
        low, high = population_bounds(theta, rate, n_samples)
        if low <= high:
            pairs.append((theta, rate))
    return pairs


def balanced(levels: Sequence, n: int, rng: np.random.Generator) -> list:
    """``n`` values: fresh seeded permutations of ``levels`` one after the other.

    Every level appears equally often up to one, and fewer than ``len(levels)`` values
    are a random subset.
    """
    blocks = -(-n // len(levels))
    order = np.argsort(rng.random((blocks, len(levels))), axis=1).ravel()[:n]
    return [levels[i] for i in order]


def wright_fisher_scenarios(collection: str, n_datasets: int, seed: int,
                            extras: Callable[[int], dict] | None = None,
                            samples: Sequence[int] = WRIGHT_FISHER_LEVELS["n_samples"]
                            ) -> list[Scenario]:
    """``n_datasets`` sized Wright-Fisher scenarios with balanced design levels.

    Each design factor of :data:`WRIGHT_FISHER_LEVELS` (samples from ``samples``) and the
    feasible (theta, rate) pairs are balanced independently in a seeded order; N is
    log-uniform between :func:`population_bounds`. ``extras(index)`` adds the
    collection's own fields. Deterministic given ``seed`` and the collection.
    """
    rng = seeds.generator(seeds.dataset_stream(seed, f"scenarios/{collection}"))
    factors = {name: balanced(levels, n_datasets, rng)
               for name, levels in WRIGHT_FISHER_LEVELS.items() if name != "n_samples"}
    factors["n_samples"] = balanced(tuple(samples), n_datasets, rng)
    dynamics = balanced(feasible_dynamics(max(samples)), n_datasets, rng)
    scenarios = []
    for index, (theta, rate) in enumerate(dynamics):
        n_samples = factors["n_samples"][index]
        low, high = population_bounds(theta, rate, n_samples)
        size = int(round(np.exp(rng.uniform(np.log(low), np.log(high)))))
        scenarios.append(Scenario(
            name=f"{collection}_{index + 1:04d}", generator="wright-fisher",
            n_taxa=factors["n_taxa"][index], n_samples=n_samples, interval=1.0,
            irregular=bool(factors["irregular"][index]), depth=factors["depth"][index],
            depth_spread=factors["depth_spread"][index], theta=theta, rate=rate,
            collection=collection, population_size=size,
            generations_per_day=2.0 * size * rate / theta,
            **(extras(index) if extras else {})))
    return scenarios


def disturbed_scenarios(n_datasets: int, seed: int) -> list[Scenario]:
    """The disturbed collection: every form and strength of :data:`DISTURBANCES` in turn."""
    def extras(index: int) -> dict:
        form, strength = DISTURBANCES[index % len(DISTURBANCES)]
        return {"disturbance": form, "disturbance_strength": strength}
    return wright_fisher_scenarios("disturbed", n_datasets, seed, extras)


def noise_scenarios(collection: str, n_datasets: int, seed: int) -> list[Scenario]:
    """A noise collection: Dirichlet-multinomial reads at the collection's precision."""
    precision = NOISE_PRECISIONS[collection]
    return wright_fisher_scenarios(collection, n_datasets, seed,
                                   lambda index: {"read_precision": precision})


def lognormal_noise_scenarios(n_datasets: int, seed: int) -> list[Scenario]:
    """The lognormal-noise collection: log-sd 0.2, 0.35 and 0.5 in turn."""
    return wright_fisher_scenarios(
        "lognormal-noise", n_datasets, seed,
        lambda index: {"lognormal_sd": LOGNORMAL_SDS[index % len(LOGNORMAL_SDS)]})


def short_scenarios(n_datasets: int, seed: int) -> list[Scenario]:
    """The short collection: 10 to 25 samples, stationary start, multinomial reads."""
    return wright_fisher_scenarios("short", n_datasets, seed, samples=SHORT_SAMPLES)


def collection_scenarios(collection: str, n_datasets: int, seed: int) -> list[Scenario]:
    """The scenarios of one collection (``n_datasets`` of them; half for lognormal-noise)."""
    if collection == "stationary":
        return neutral_scenarios(n_datasets, seed)
    if collection == "disturbed":
        return disturbed_scenarios(n_datasets, seed)
    if collection in NOISE_PRECISIONS:
        return noise_scenarios(collection, n_datasets, seed)
    if collection == "lognormal-noise":
        return lognormal_noise_scenarios(int(np.ceil(LOGNORMAL_SHARE * n_datasets)), seed)
    if collection == "short":
        return short_scenarios(n_datasets, seed)
    if collection in NICHE_GENERATORS:
        return niche_scenarios(n_datasets, collection)
    generator = collection.removesuffix(f"-noise{NICHE_NOISE_PRECISION:g}")
    if collection in NICHE_COLLECTIONS and generator in NICHE_GENERATORS:
        return niche_scenarios(n_datasets, generator, NICHE_NOISE_PRECISION)
    raise ValueError(f"unknown collection {collection!r}")


def study_scenarios(collections: Sequence[str], neutral: int, niche: int,
                    seed: int) -> list[Scenario]:
    """Every scenario of the study: ``neutral`` per neutral collection, ``niche`` per niche."""
    scenarios = []
    for collection in collections:
        size = neutral if collection in NEUTRAL_COLLECTIONS else niche
        scenarios += collection_scenarios(collection, size, seed)
    return scenarios


def cut_top_taxa(composition: np.ndarray, rng: np.random.Generator, *,
                 factor: float, n_top: int = 3) -> np.ndarray:
    """The ``n_top`` most abundant taxa of each community multiplied by ``factor``."""
    top = np.argsort(composition, axis=1, kind="stable")[:, -n_top:]
    cut = composition.copy()
    np.put_along_axis(cut, top, factor * np.take_along_axis(composition, top, axis=1), axis=1)
    return cut / cut.sum(axis=1, keepdims=True)


def bloom(composition: np.ndarray, rng: np.random.Generator, *, share: float) -> np.ndarray:
    """One uniformly chosen taxon per community grows to ``share``; the rest keep ratios."""
    rows = np.arange(composition.shape[0])
    bloomer = rng.integers(composition.shape[1], size=rows.size)
    rest = 1.0 - composition[rows, bloomer]
    scale = np.divide(1.0 - share, rest, out=np.zeros_like(rest), where=rest > 0)
    bloomed = composition * scale[:, None]
    bloomed[rows, bloomer] = share
    return bloomed


def colonisation(composition: np.ndarray, rng: np.random.Generator, *,
                 shape: np.ndarray) -> np.ndarray:
    """A fresh community per row: Dirichlet(``shape``), whatever was there before."""
    return dirichlet_rows(np.broadcast_to(shape, composition.shape), rng)


def disturbance_for(scenario: Scenario, p: np.ndarray,
                    rng: np.random.Generator) -> Disturbance | None:
    """The scenario's disturbance as a callable for the Wright-Fisher simulator.

    A colonisation starts from Dirichlet(theta q), q = (1 - s) p + s q' with q' a second
    log-normal metacommunity over the same taxa in random order and s the strength.
    """
    strength = scenario.disturbance_strength
    if scenario.disturbance == "none":
        return None
    if scenario.disturbance == "cut-top3":
        return partial(cut_top_taxa, factor=strength)
    if scenario.disturbance == "bloom":
        return partial(bloom, share=strength)
    if scenario.disturbance == "colonisation":
        other = rng.permutation(metacommunity(p.size, rng))
        start = (1.0 - strength) * p + strength * other
        return partial(colonisation, shape=scenario.theta * start)
    raise ValueError(f"unknown disturbance {scenario.disturbance!r}")


def lognormal_noise(composition: np.ndarray, sd: float, rng: np.random.Generator) -> np.ndarray:
    """Compositions times independent log-normal factors exp(sd Z), renormalised."""
    noisy = composition * np.exp(sd * rng.standard_normal(composition.shape))
    return noisy / noisy.sum(axis=-1, keepdims=True)


def on_generation_grid(design: Design, generations_per_day: float
                       ) -> tuple[Design, np.ndarray]:
    """The design with its times moved to the generation grid, and the generations.

    Generations are the rounded ``times * g``, pushed up where needed so that every
    sample has its own generation; the returned times are ``generations / g``, so the test
    is told the times the community was actually sampled at.
    """
    steps = np.arange(design.n_samples)
    generations = np.rint(design.times * generations_per_day).astype(np.int64)
    generations = np.maximum.accumulate(generations - steps) + steps
    return Design(depths=design.depths, times=generations / generations_per_day), generations


def wright_fisher_community(scenario: Scenario, design: Design, rng: np.random.Generator
                            ) -> tuple[Design, np.ndarray]:
    """Counts (T, K) of one sized Wright-Fisher scenario and its design on the generation grid.

    Draws the metacommunity, the disturbance, the community and its reads from ``rng``.
    """
    design, generations = on_generation_grid(design, scenario.generations_per_day)
    p = metacommunity(scenario.n_taxa, rng)
    community = dict(p=p, population_size=scenario.population_size,
                     immigration=scenario.immigration, generations_at=generations,
                     n_replicates=1, rng=rng, disturb=disturbance_for(scenario, p, rng))
    if scenario.lognormal_sd > 0:
        composition = wright_fisher_compositions(**community)[0]
        noisy = lognormal_noise(composition, scenario.lognormal_sd, rng)
        return design, dirichlet_multinomial_reads(noisy, design.depths, np.inf, rng)
    counts = simulate_wright_fisher(**community, depths=design.depths,
                                    read_precision=scenario.read_precision)
    return design, counts[0]


def wright_fisher_counts(model: NeutralModel, design: Design,
                         rng: np.random.Generator) -> np.ndarray:
    """One Wright-Fisher dataset matching (theta, rate, times): counts (T, K).

    The stationary collection's community: N from :data:`WRIGHT_FISHER_SIZE`, enough
    generations per interval and at least theta / 2.
    """
    shortest = float(np.min(np.diff(design.times)))
    needed = int(np.ceil(WRIGHT_FISHER_GENERATIONS / (model.kappa * shortest)))
    size = int(min(max(WRIGHT_FISHER_SIZE, needed, 2 * model.theta), WRIGHT_FISHER_MAX_SIZE))
    settings = wright_fisher_for(model, design, size)
    return simulate_wright_fisher(**settings, n_replicates=1, rng=rng)[0]


def niche_reads(community: StochasticLogistic | NoisyLotkaVolterra | EnvironmentalTracking,
                design: Design,
                read_precision: float, rng: np.random.Generator) -> np.ndarray:
    """Counts (T, K) of one niche community, Dirichlet-multinomial at finite precision."""
    if np.isinf(read_precision):
        return community.simulate(design, 1, rng)[0]
    abundance = community.abundances(design, 1, rng)[0]
    composition = abundance / abundance.sum(axis=1, keepdims=True)
    return dirichlet_multinomial_reads(composition, design.depths, read_precision, rng)


def simulate_scenario(scenario: Scenario, seed: int) -> Dataset:
    """The dataset of one scenario, from the stream keyed by ``seed`` and its name."""
    rng = seeds.generator(seeds.dataset_stream(seed, scenario.name))
    design = scenario.design_spec.draw(rng)
    if scenario.generator == "logistic":
        counts = niche_reads(StochasticLogistic(scenario.n_taxa), design,
                             scenario.read_precision, rng)
    elif scenario.generator == "lotka-volterra":
        counts = niche_reads(NoisyLotkaVolterra(scenario.n_taxa), design,
                             scenario.read_precision, rng)
    elif scenario.generator == "tracking":
        counts = niche_reads(EnvironmentalTracking(scenario.n_taxa), design,
                             scenario.read_precision, rng)
    elif scenario.population_size > 0:
        design, counts = wright_fisher_community(scenario, design, rng)
    else:
        rate = scenario.rate if design.is_time_series else None
        model = NeutralModel(metacommunity(scenario.n_taxa, rng), scenario.theta, rate)
        if scenario.generator == "wright-fisher":
            counts = wright_fisher_counts(model, design, rng)
        else:
            counts = simulate(model, design, 1, rng)[0]
    return as_dataset(scenario.name, counts, design)


#: Stream purpose of the random taxon whose p-values enter the uniformity check.
TAXON_PICK = 101
#: How many of the largest true departures the niche recall counts.
TOP_DEPARTURES = 5
#: Per-taxon p-value columns of the scan, and their names in the study's table.
TAXON_PVALUES = {"occupancy_p": "taxon_p_occupancy", "variability_p": "taxon_p_variability",
                 "persistence_p": "taxon_p_persistence", "combined_p": "taxon_p_combined"}
NICHE_MODELS = {"logistic": StochasticLogistic, "lotka-volterra": NoisyLotkaVolterra,
                "tracking": EnvironmentalTracking}


def niche_departures(scenario: Scenario, seed: int) -> np.ndarray | None:
    """The true departure of every simulated taxon of a niche scenario, ``(K,)``; None if
    neutral. Drawn from the state :func:`simulate_scenario` simulates the community from."""
    if scenario.generator not in NICHE_MODELS:
        return None
    rng = seeds.generator(seeds.dataset_stream(seed, scenario.name))
    scenario.design_spec.draw(rng)
    return NICHE_MODELS[scenario.generator](scenario.n_taxa).departures(1, rng)[0]


def lead_taxon(label: str) -> str:
    """The taxon id a scan row is named by ('taxon_07 +3 rare' -> 'taxon_07')."""
    return label.split(" ")[0]


def random_informative(scan: pd.DataFrame, column: str, rng: np.random.Generator) -> float:
    """The p-value in ``column`` of a taxon drawn at random among those it informs on.

    A taxon detected in every sample of nearly every replicate (95% band of occupancy
    [1, 1]) has no information in its occupancy (ties give p near 1); it is left out of
    the occupancy draw, which depends on the replicates only, not on the observed value.
    """
    if column not in scan:
        return np.nan
    values = scan[column].to_numpy(dtype=float)
    eligible = np.isfinite(values)
    if column == "occupancy_p":
        eligible &= scan["occupancy_low"].to_numpy(dtype=float) < scan["occupancy_high"]
    return float(rng.choice(values[eligible])) if eligible.any() else np.nan


def taxon_columns(result: NeutralityResult, scenario: Scenario, seed: int) -> dict:
    """The per-taxon scan's measures for the study's table (see the module docstring)."""
    scan = result.taxa
    q = scan["q_value"].to_numpy(dtype=float)
    rng = seeds.generator(seeds.substream(seeds.dataset_stream(seed, scenario.name),
                                          TAXON_PICK))
    row = {"taxa_units": len(scan), "taxa_flagged": int(np.sum(q <= TAXON_LEVEL)),
           "taxa_min_q": float(np.nanmin(q)) if np.isfinite(q).any() else np.nan}
    row.update({name: random_informative(scan, column, rng)
                for column, name in TAXON_PVALUES.items()})
    departures = niche_departures(scenario, seed)
    if departures is not None:
        width = len(str(scenario.n_taxa))
        top = {f"taxon_{i + 1:0{width}d}" for i in np.argsort(-departures)[:TOP_DEPARTURES]}
        leads = [lead_taxon(label) for label in scan["taxon"]]
        flagged = {taxon for taxon, value in zip(leads, q) if value <= TAXON_LEVEL}
        first = {leads[i] for i in np.argsort(q, kind="stable")[:TOP_DEPARTURES]}
        row.update(top_recall=len(top & flagged) / TOP_DEPARTURES,
                   top_overlap=len(top & first) / TOP_DEPARTURES)
    return row


def run_scenario(scenario: Scenario, seed: int, replicates: int, groupings: int) -> dict:
    """Simulate one scenario and test it: one row of the study's table."""
    dataset = simulate_scenario(scenario, seed)
    result = neutrality_test(dataset, replicates=replicates, groupings=groupings, seed=seed)
    precision = result.parameters.get("precision")
    row = asdict(scenario)
    row.update(kept_taxa=dataset.n_taxa, theta_hat=result.model.theta,
               rate_hat=result.model.rate if result.model.rate is not None else np.nan,
               noise_precision_hat=precision.estimate if precision is not None else np.nan,
               correlation_times=correlation_times(result.model, dataset.design))
    row.update({f"p_{name}": stat.pvalue for name, stat in result.statistics.items()})
    if result.taxa is not None:
        row.update(taxon_columns(result, scenario, seed))
    return row


def run_study(scenarios: Sequence[Scenario], *, replicates: int = 199, groupings: int = 200,
              seed: int = 0, jobs: int = 1) -> pd.DataFrame:
    """Test every scenario's dataset; one row per dataset with its p-values."""
    rows = Parallel(n_jobs=jobs)(delayed(run_scenario)(s, seed, replicates, groupings)
                                 for s in scenarios)
    return pd.DataFrame(rows)


def pvalue_columns(frame: pd.DataFrame) -> list[str]:
    return [c for c in frame.columns if c.startswith("p_")]


def rejection_table(frame: pd.DataFrame, alpha: float = 0.05) -> pd.DataFrame:
    """Per statistic: datasets with a p-value, rejections at ``alpha``, rate and Wilson CI."""
    rows = []
    for column in pvalue_columns(frame):
        pvalues = frame[column].to_numpy(dtype=float)
        given = np.isfinite(pvalues)
        n, k = int(given.sum()), int(np.sum(pvalues[given] <= alpha))
        low, high = (binomtest(k, n).proportion_ci(method="wilson") if n else (np.nan, np.nan))
        rows.append({"statistic": column[2:], "datasets": n, "rejected": k,
                     "rate": k / n if n else np.nan, "ci_low": low, "ci_high": high})
    return pd.DataFrame(rows)


#: The false-positive target band, as multiples of alpha (0.03 - 0.07 at alpha = 0.05).
TARGET_BAND = (0.6, 1.4)


def band_verdict(rate: float, alpha: float) -> str:
    """Where a false-positive rate lies relative to the target band."""
    if not np.isfinite(rate):
        return "-"
    low, high = (factor * alpha for factor in TARGET_BAND)
    return "below" if rate < low else "above" if rate > high else "inside"


def markdown_table(table: pd.DataFrame, alpha: float | None = None) -> str:
    """A rejection table in Markdown; with ``alpha``, a column placing it in the band."""
    band = alpha is not None
    lines = ["| statistic | datasets with a p-value | rejected | rate | 95% interval |"
             + (" target band |" if band else ""),
             "|---|---|---|---|---|" + ("---|" if band else "")]
    for row in table.itertuples():
        line = (f"| {row.statistic} | {row.datasets} | {row.rejected} | {row.rate:.3f} | "
                f"{row.ci_low:.3f} - {row.ci_high:.3f} |")
        lines.append(line + (f" {band_verdict(row.rate, alpha)} |" if band else ""))
    return "\n".join(lines)


def breakdown(frame: pd.DataFrame, by: str, alpha: float) -> str:
    """Rejection rates of every statistic for each level of column ``by``."""
    columns = pvalue_columns(frame)
    lines = [f"| {by} | datasets | " + " | ".join(c[2:] for c in columns) + " |",
             "|---" * (len(columns) + 2) + "|"]
    for level, part in frame.groupby(by, dropna=False, observed=True):
        rates = []
        for column in columns:
            values = part[column].to_numpy(dtype=float)
            given = values[np.isfinite(values)]
            rates.append(f"{np.mean(given <= alpha):.3f} ({given.size})" if given.size else "-")
        lines.append(f"| {level} | {len(part)} | " + " | ".join(rates) + " |")
    return "\n".join(lines)


def with_factors(neutral: pd.DataFrame) -> pd.DataFrame:
    """The pooled neutral table with the binned factors the breakdowns split by."""
    return neutral.assign(
        collection=pd.Categorical(neutral["collection"], categories=NEUTRAL_COLLECTIONS),
        design=np.where(neutral["interval"].isna(), "snapshot", "time series"),
        coverage=pd.cut(neutral["correlation_times"], [0, 5, 15, 50, np.inf],
                        labels=["<5", "5-15", "15-50", ">=50"]),
        theta_range=pd.cut(neutral["theta"], [0, 30, 300, np.inf],
                           labels=["10-30", "31-300", ">300"]),
        taxa=pd.cut(neutral["n_taxa"], [0, 20, 60, np.inf], labels=["15-20", "21-60", ">60"]),
        samples=pd.cut(neutral["n_samples"], [0, 25, 60, 150, np.inf],
                       labels=["10-25", "26-60", "61-150", ">150"]),
        form=neutral["disturbance"] + " " + neutral["disturbance_strength"].map("{:.2g}".format))


def complete_pvalue_share(neutral: pd.DataFrame, min_samples: int = 25) -> tuple[int, int]:
    """Time series with >= ``min_samples`` samples: (with every statistic's p-value, all)."""
    long = neutral[neutral["interval"].notna() & (neutral["n_samples"] >= min_samples)]
    complete = np.isfinite(long[pvalue_columns(long)].to_numpy(dtype=float)).all(axis=1)
    return int(complete.sum()), len(long)


def completeness_table(neutral: pd.DataFrame, min_samples: int = 25) -> str:
    """Per collection and pooled: share of long time series with every p-value."""
    lines = [f"| collection | time series with >= {min_samples} samples | with every "
             "p-value | share |", "|---|---|---|---|"]
    parts = list(neutral.groupby("collection", observed=True))
    for label, part in parts + [("all neutral", neutral)]:
        complete, total = complete_pvalue_share(part, min_samples)
        share = f"{complete / total:.3f}" if total else "-"
        lines.append(f"| {label} | {total} | {complete} | {share} |")
    return "\n".join(lines)


def precision_table(frame: pd.DataFrame) -> str:
    """Fitted read precision against the truth, per collection (where it was estimated)."""
    lines = ["| collection | true precision | datasets with an estimate | median estimate | "
             "5% - 95% of estimates |", "|---|---|---|---|---|"]
    for collection, part in frame.groupby("collection", sort=False):
        estimates = part["noise_precision_hat"].to_numpy(dtype=float)
        estimates = estimates[~np.isnan(estimates)]
        if not estimates.size:
            continue
        truth = part["read_precision"].iloc[0]
        low, median, high = np.quantile(estimates, [0.05, 0.5, 0.95], method="inverted_cdf")
        lines.append(f"| {collection} | {truth:g} | {estimates.size} | {median:.4g} | "
                     f"{low:.4g} - {high:.4g} |")
    return "\n".join(lines)


COLLECTION_NOTES = {
    "stationary": "the original grid: stationary start, multinomial reads, exact and "
                  "discrete Wright-Fisher generators, 15% snapshots",
    "disturbed": "discrete Wright-Fisher communities disturbed just before the first sample "
                 "(top three taxa cut to 1/10 or 1/3; a random taxon blooming to 30% or "
                 "50%; colonisation-like start around a half or wholly different "
                 "composition), relaxing towards the metacommunity",
    "noise100": "stationary Wright-Fisher communities, Dirichlet-multinomial reads, C = 100",
    "noise300": "stationary Wright-Fisher communities, Dirichlet-multinomial reads, C = 300",
    "noise1000": "stationary Wright-Fisher communities, Dirichlet-multinomial reads, C = 1000",
    "lognormal-noise": "stationary Wright-Fisher communities times log-normal noise per taxon "
                       "and sample (log-sd 0.2, 0.35, 0.5), then multinomial reads; half "
                       "the size of the other collections",
    "short": "stationary Wright-Fisher series of 10-25 daily or irregular samples",
    "logistic": "stochastic logistic model, multinomial reads",
    "lotka-volterra": "noisy generalised Lotka-Volterra model, multinomial reads",
    "logistic-noise300": "stochastic logistic model, Dirichlet-multinomial reads, C = 300",
    "lotka-volterra-noise300": "noisy generalised Lotka-Volterra model, "
                               "Dirichlet-multinomial reads, C = 300",
    "tracking": "neutral community (theta 100, rate 0.3 per day) in which five of the more "
                "abundant taxa also track a fluctuating environment with strengths 0.3-1.1 "
                "(log-sd of their response), multinomial reads",
}


def false_positive_sections(neutral: pd.DataFrame, alpha: float) -> list[str]:
    """One false-positive table per neutral collection, then the pooled breakdowns."""
    low, high = (factor * alpha for factor in TARGET_BAND)
    parts = ["## False-positive rate on neutral data", "",
             f"The target band is {low:.2f} to {high:.2f} at alpha = {alpha:g}: a calibrated "
             "test rejects about alpha of neutral datasets, and the last column says whether "
             "each observed rate lies inside that band (small collections have wide "
             "intervals, so read it with the interval).", ""]
    for collection, part in neutral.groupby("collection", observed=True):
        parts += [f"### {collection} ({len(part)} datasets)", "",
                  f"{COLLECTION_NOTES[collection]}.", "",
                  markdown_table(rejection_table(part, alpha), alpha), ""]
    within = neutral[~neutral["collection"].isin(OUTSIDE_NULL)]
    parts += [f"### Neutral collections inside the null pooled (all but "
              f"{', '.join(OUTSIDE_NULL)})", "",
              markdown_table(rejection_table(within, alpha), alpha), "",
              "Replicates of a time series are conditioned on its first sample. The "
              "marginal statistics get no p-value only where the fit sits at the slowest "
              "admissible rate (one correlation time over the span: a series that barely "
              "leaves its start); `dispersion_heterogeneity` reports its p-value but is not "
              "part of `combined`.", "",
              "### By collection; then the collections inside the null, by generator, "
              "design, coverage (correlation times spanned), theta, taxa and samples "
              "(rate, with the number of p-values)", ""]
    parts += [breakdown(neutral, "collection", alpha), ""]
    for factor in ("generator", "design", "coverage", "theta_range", "taxa", "samples"):
        parts += [breakdown(within, factor, alpha), ""]
    disturbed = neutral[neutral["disturbance"] != "none"]
    if len(disturbed):
        parts += ["### Disturbed collection by disturbance form and strength", "",
                  breakdown(disturbed, "form", alpha), ""]
    complete, total = complete_pvalue_share(neutral)
    parts += ["### Time series that got a p-value for every statistic", "",
              f"{complete} of {total} neutral time series with at least 25 samples got a "
              "p-value from every statistic"
              + (f" ({complete / total:.1%})." if total else "."), "",
              completeness_table(neutral), ""]
    return parts


def power_sections(niche: pd.DataFrame, alpha: float) -> list[str]:
    """One power table per niche collection."""
    parts = ["## Power on niche data (40 taxa, 100 daily samples, depth 10^4)", ""]
    for collection, part in niche.groupby("collection", sort=False):
        parts += [f"### {collection} ({len(part)} datasets)", "",
                  f"{COLLECTION_NOTES[collection]}.", "",
                  markdown_table(rejection_table(part, alpha)), ""]
    return parts


def any_flag_row(label: str, part: pd.DataFrame) -> str:
    """A row of the per-taxon table: datasets with any taxon at q <= 0.05 and KS checks."""
    flagged = part["taxa_flagged"].to_numpy(dtype=float)
    n, k = int(np.isfinite(flagged).sum()), int(np.sum(flagged > 0))
    low, high = binomtest(k, n).proportion_ci(method="wilson") if n else (np.nan, np.nan)
    checks = []
    for column in TAXON_PVALUES.values():
        values = part[column].to_numpy(dtype=float) if column in part else np.array([])
        values = values[np.isfinite(values)]
        checks.append(f"{kstest(values, 'uniform').pvalue:.3f} ({values.size})"
                      if values.size >= 5 else "-")
    share = k / n if n else np.nan
    combined = part["taxon_p_combined"].to_numpy(dtype=float)
    combined = combined[np.isfinite(combined)]
    small = f"{np.mean(combined <= TAXON_LEVEL):.3f}" if combined.size else "-"
    return (f"| {label} | {n} | {k} | {share:.3f} | {low:.3f} - {high:.3f} | "
            + " | ".join(checks) + f" | {small} |")


def taxon_sections(neutral: pd.DataFrame, niche: pd.DataFrame) -> list[str]:
    """The per-taxon scan: familywise false flags and uniformity on neutral data, recall on
    niche data."""
    parts = ["## Per-taxon scan", "",
             f"Neutral data: datasets with at least one taxon (or pool of rare taxa) at "
             f"q <= {TAXON_LEVEL:g} (Benjamini-Hochberg across the dataset's taxa; under the "
             "global null this is the familywise error rate, target at most 0.06), and "
             "Kolmogorov-Smirnov p-values for the uniformity of per-taxon p-values (one "
             "taxon per dataset drawn at random, so that they are independent; the number "
             "of p-values in brackets; the scan's p-values are randomised, ties and the "
             "steps of 1/(B + 1) broken by uniform draws, so that they are exactly uniform "
             "when the data and the replicates are exchangeable, for the discrete "
             "occupancy too: a small KS p-value means the replicates' law differs from "
             "the data's, and the share of combined p-values at most 0.05 says on which "
             "side, below 0.05 conservative, above it over-flagging).", "",
             "| collection | datasets | with a flagged taxon | share | 95% interval | KS "
             "occupancy | KS variability | KS persistence | KS combined | combined p <= "
             f"{TAXON_LEVEL:g} |", "|---|---|---|---|---|---|---|---|---|---|"]
    if "taxa_flagged" in neutral:
        for collection, part in neutral.groupby("collection", observed=True):
            parts.append(any_flag_row(str(collection), part))
        parts.append(any_flag_row("inside the null",
                                  neutral[~neutral["collection"].isin(OUTSIDE_NULL)]))
    parts.append("")
    if len(niche) and "top_recall" in niche:
        parts += [f"Niche data: the {TOP_DEPARTURES} taxa with the largest true departures "
                  "(the `departures` of the niche models in `niche.py`: in the tracking "
                  "collection the five responding taxa; in the others, where every taxon "
                  "has the same environmental noise, the five largest carrying capacities): "
                  f"recall, the share of them at q <= {TAXON_LEVEL:g}, and overlap, their "
                  f"share among the {TOP_DEPARTURES} taxa of smallest q. Where every taxon "
                  "has the same noise, the fitted theta absorbs most of it, and the taxa that "
                  "stand out are the two ends of the abundance range, not the largest "
                  "capacities: there the recall measures that, not the scan's power.", "",
                  "| collection | datasets | with a flagged taxon | mean flagged taxa | "
                  "recall of the top 5 | overlap with the first 5 |", "|---|---|---|---|---|---|"]
        for collection, part in niche.groupby("collection", sort=False):
            parts.append(f"| {collection} | {len(part)} | {int((part['taxa_flagged'] > 0).sum())}"
                         f" | {part['taxa_flagged'].mean():.1f} | "
                         f"{part['top_recall'].mean():.3f} | {part['top_overlap'].mean():.3f} |")
        parts.append("")
    return parts


def reading_guide() -> list[str]:
    """How the tables were made and how to read them."""
    return [
        "## How to read these tables", "",
        "The breakdowns split the pooled neutral datasets by one factor at a time, so their "
        "cells are small (a cell of 50 datasets has a Wilson interval about 10 percentage "
        "points wide) and many cells are compared at once: a single cell outside the band "
        "is expected now and then. The stationary collection's grid crosses 15, 40 and 150 "
        "taxa; 30, 100 and 300 daily samples; depths of 2,000 and 20,000 reads with or "
        "without a spread between samples; regular or irregular intervals; weak (theta 10) "
        "or strong (theta 300) immigration; slow (0.1 per day) or fast (0.5 per day) "
        "dynamics. The other neutral collections are discrete Wright-Fisher communities of "
        f"{MIN_POPULATION:,} to {WRIGHT_FISHER_MAX_SIZE:,} individuals with theta = 2 N m "
        f"in {min(THETA_LEVELS):g}-{max(THETA_LEVELS):g} and relaxation rate m x "
        f"(generations per day) in {min(RATE_LEVELS):g}-{max(RATE_LEVELS):g} per day "
        "(the fastest rates only with theta >= 100, so that a community of at least "
        f"{MIN_POPULATION:,} needs no more than {MAX_GENERATIONS_PER_DAY:g} generations a "
        "day); 15 to 100 taxa, 20 to 200 samples (short: 10 to 25), depths 2,000 to "
        "20,000 with or without a spread, regular or irregular intervals; their sampling "
        "times lie on the generation grid.", ""]


def report(neutral: pd.DataFrame, niche: pd.DataFrame, alpha: float, command: str,
           seconds: float) -> str:
    """The study's results as Markdown, for docs/validation.md."""
    parts = ["# Validation study", "", f"Produced by driftscreen {__version__} with:", "",
             f"    {command}", "",
             f"({len(neutral)} neutral and {len(niche)} niche datasets; {seconds / 60:.1f} "
             f"minutes of wall time.) Rejection rates at alpha = {alpha:g}, with Wilson 95% "
             "intervals. The collections, their generators and the niche models are "
             "described in `src/driftscreen/calibration_study.py`.", ""]
    if len(neutral):
        parts += false_positive_sections(with_factors(neutral), alpha)
    if len(niche):
        parts += power_sections(niche, alpha)
    if "taxa_flagged" in pd.concat([neutral, niche]):
        parts += taxon_sections(neutral, niche)
    estimated = pd.concat([neutral, niche])
    if "noise_precision_hat" in estimated and estimated["noise_precision_hat"].notna().any():
        parts += ["## Estimated read precision", "",
                  "The null's Dirichlet-multinomial precision as fitted to each dataset "
                  "(inf: no technical noise found), against the precision the data were "
                  "made with (inf: multinomial reads).", "", precision_table(estimated), ""]
    parts += reading_guide()
    return "\n".join(parts) + "\n"


def collection_list(text: str) -> list[str]:
    """``--collections``: a comma-separated list of collection names."""
    names = [name.strip() for name in text.split(",") if name.strip()]
    unknown = [name for name in names if name not in COLLECTIONS]
    if unknown or not names:
        raise argparse.ArgumentTypeError(
            f"unknown collection {', '.join(unknown) or repr(text)}; choose from "
            + ",".join(COLLECTIONS))
    return list(dict.fromkeys(names))


def count(text: str) -> int:
    value = int(text)
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be a non-negative integer, got {text}")
    return value


def build_parser() -> argparse.ArgumentParser:
    parser = Parser(
        prog="python -m driftscreen.calibration_study",
        description="Run the validation study: false-positive rates on simulated neutral "
                    "datasets and power on simulated niche datasets.")
    parser.add_argument("--collections", type=collection_list, default=list(COLLECTIONS),
                        help="comma-separated collections (default all: "
                             + ",".join(COLLECTIONS) + ")")
    parser.add_argument("--neutral", type=count, default=240,
                        help="datasets per neutral collection (240; lognormal-noise half)")
    parser.add_argument("--niche", type=count, default=50,
                        help="datasets per niche collection (50)")
    parser.add_argument("--replicates", type=int, default=199, help="bootstrap replicates (199)")
    parser.add_argument("--groupings", type=int, default=200, help="random groupings (200)")
    parser.add_argument("--alpha", type=float, default=0.05, help="test level (0.05)")
    parser.add_argument("--seed", type=int, default=1, help="master seed (1)")
    parser.add_argument("--jobs", type=int, default=2, help="worker processes (2)")
    parser.add_argument("--out", default="docs/validation.md", help="Markdown report")
    parser.add_argument("--table", help="also write the per-dataset table (TSV)")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    scenarios = study_scenarios(args.collections, args.neutral, args.niche, args.seed)
    if not scenarios:
        parser.error("no datasets to simulate: raise --neutral or --niche, or choose "
                     "other --collections")
    start = time.perf_counter()
    frame = run_study(scenarios, replicates=args.replicates, groupings=args.groupings,
                      seed=args.seed, jobs=args.jobs)
    neutral = frame[frame["generator"].isin(NEUTRAL_GENERATORS)]
    niche = frame[~frame["generator"].isin(NEUTRAL_GENERATORS)]
    command = "python -m driftscreen.calibration_study " + " ".join(
        sys.argv[1:] if argv is None else argv)
    text = report(neutral, niche, args.alpha, command.strip(), time.perf_counter() - start)
    atomic_write_text(args.out, text)
    if args.table:
        atomic_write_text(args.table, frame.to_csv(sep="\t", index=False))
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
