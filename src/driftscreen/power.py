"""Power of the calibrated neutrality test against niche alternatives, and the minimum
detectable niche strength of a design.

For every strength of a niche alternative (:mod:`driftscreen.niche`), ``n_datasets``
communities are simulated with the design and each goes through the full calibrated test
(:func:`driftscreen.calibrate.neutrality_test`, the same settings a user would run). The
share of datasets in which a statistic rejects neutrality at ``alpha`` is the Monte Carlo
estimate of its power, with a Wilson score interval (Wilson 1927, J. Am. Stat. Assoc.
22:209). The minimum detectable strength is where the power of ``combined`` first reaches
80%, interpolated between the two grid strengths around that crossing.

Every dataset draws from its own stream keyed by the master seed, the alternative, the
strength and the dataset's index (:func:`simulation_stream`), so results do not depend on
the number of jobs nor on the other strengths of the grid.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import TextIO

import numpy as np
import pandas as pd
from joblib import Parallel, delayed
from scipy import stats

from driftscreen import seeds
from driftscreen.calibrate import COMBINED, CalibrationSettings, run_calibration
from driftscreen.dataset import Dataset, Design
from driftscreen.errors import InputError
from driftscreen.limits import COMPETITION, SIGMA, shortfall, unanalysable_reason
from driftscreen.niche import LotkaVolterraParameters, NoisyLotkaVolterra, StochasticLogistic
from driftscreen.progress import PowerProgress
from driftscreen.statistics.registry import default_statistics
from driftscreen.synthetic import DesignSpec, as_dataset

ALTERNATIVES = ("logistic", "lotka-volterra")
#: Power at which a strength counts as detectable.
TARGET_POWER = 0.8
CONFIDENCE = 0.95
#: Default grids (also bisected by :func:`detectable_line`). The test is very sensitive to
#: environmental noise (sigma = 1e-3 was detected in 9 of 10 series of 40 taxa x 100 samples
#: at depth 1e4), so the logistic grid is geometric from 1e-4. The neutral limit 0 is left
#: out: a constant community fits theta at its upper clip, where the neutral replicates
#: are slow and memory-hungry to simulate (up to ~40 s and ~6 GB per dataset measured).
DEFAULT_STRENGTHS = {
    "logistic": (1e-4, 3e-4, 1e-3, 3e-3, 0.01, 0.03, 0.1, 0.3, 1.0),
    "lotka-volterra": (0.01, 0.03, 0.1, 0.2, 0.3, 0.5, 1.0),
}
#: How to give a strength each alternative allows.
STRENGTHS_FIX = (f"for logistic, sigma must be in {SIGMA.interval()}; for lotka-volterra, "
                 f"the competition must be >= {COMPETITION.minimum:g}")
#: Settings of the quick power run behind :func:`detectable_line`.
QUICK_DATASETS = 12
QUICK_REPLICATES = 99
#: Start of every detectable line (used to recognise a result that already has one).
DETECTABLE_PREFIX = "With this design ("


# ----------------------------------------------------------------------------- binomial interval
def wilson_interval(successes: np.ndarray | int, trials: np.ndarray | int,
                    confidence: float = CONFIDENCE) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval for a binomial proportion (Wilson 1927, JASA 22:209).

    The set of proportions p for which |k/n - p| / sqrt(p (1 - p) / n) <= z, z the normal
    quantile of (1 + confidence) / 2; it stays inside [0, 1] and keeps close to nominal
    coverage for small n (Newcombe 1998, Stat. Med. 17:857). NaN where ``trials`` is 0.
    """
    k = np.asarray(successes, dtype=np.float64)
    n = np.asarray(trials, dtype=np.float64)
    z = stats.norm.ppf(0.5 + confidence / 2.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        share = k / n
        shrink = 1.0 + z * z / n
        center = (share + z * z / (2.0 * n)) / shrink
        half = z / shrink * np.sqrt(share * (1.0 - share) / n + z * z / (4.0 * n * n))
    return np.clip(center - half, 0.0, 1.0), np.clip(center + half, 0.0, 1.0)


# ----------------------------------------------------------------------------- minimum detectable
def minimum_detectable_strength(strengths: Sequence[float], power: Sequence[float],
                                target: float = TARGET_POWER) -> float:
    """Smallest strength at which the power curve first reaches ``target``.

    Scanning the grid upwards, the first strength with power >= target and the one before
    it bracket the crossing; between them the strength is interpolated linearly in
    log(strength) against power (linearly in strength when the lower end is 0, which has
    no logarithm). Returns the first grid strength if it already reaches the target (read:
    "at or below it"), and ``inf`` if no grid strength does.
    """
    s = np.asarray(strengths, dtype=np.float64)
    p = np.asarray(power, dtype=np.float64)
    if s.ndim != 1 or s.shape != p.shape or s.size == 0 or np.any(np.diff(s) <= 0):
        raise ValueError("strengths must be increasing and match power in length")
    reached = np.flatnonzero(np.nan_to_num(p, nan=-np.inf) >= target)
    if reached.size == 0:
        return math.inf
    j = int(reached[0])
    if j == 0:
        return float(s[0])
    low, high = s[j - 1], s[j]
    p_low = p[j - 1] if np.isfinite(p[j - 1]) else 0.0
    fraction = (target - p_low) / (p[j] - p_low)
    if low > 0:
        return float(np.exp(np.log(low) + fraction * (np.log(high) - np.log(low))))
    return float(low + fraction * (high - low))


# ----------------------------------------------------------------------------- the design
@dataclass(frozen=True)
class PowerDesign:
    """The design to plan for: taxa, sample times and depths, optionally an abundance profile.

    Build it with :meth:`from_dataset` (the dataset's own times and depths, and its pooled
    relative abundances as the niche model's carrying capacities) or :meth:`from_numbers`
    (a :class:`~driftscreen.synthetic.DesignSpec`; irregular gaps and varying depths are
    drawn anew for every simulated dataset).

    Attributes
    ----------
    n_taxa:
        Number of taxa K.
    spec:
        Layout to draw a design from (numbers); ``None`` when ``fixed`` is given.
    fixed:
        The design of an existing dataset; ``None`` when ``spec`` is given.
    profile:
        Relative abundances ``(K,)`` used as carrying capacities of the niche model;
        ``None`` keeps the model's own log-uniform capacities.
    source:
        Name of the dataset the design comes from ("" for numbers).
    """

    n_taxa: int
    spec: DesignSpec | None = None
    fixed: Design | None = None
    profile: np.ndarray | None = None
    source: str = ""

    def __post_init__(self) -> None:
        if (self.spec is None) == (self.fixed is None):
            raise ValueError("give exactly one of spec and fixed")
        if self.n_taxa < 2:
            raise ValueError("a design needs at least 2 taxa")
        if self.profile is not None:
            profile = np.asarray(self.profile, dtype=np.float64)
            if profile.shape != (self.n_taxa,) or not np.all(profile > 0):
                raise ValueError("profile must hold one positive abundance per taxon")
            object.__setattr__(self, "profile", profile / profile.sum())

    @classmethod
    def from_dataset(cls, dataset: Dataset, *, use_profile: bool = True) -> PowerDesign:
        """The dataset's taxa, times and depths; its pooled read fractions (the fitted
        neutral p, design note section 5) as the abundance profile if ``use_profile``."""
        profile = dataset.counts.sum(axis=0) / dataset.counts.sum() if use_profile else None
        return cls(dataset.n_taxa, fixed=dataset.design, profile=profile, source=dataset.name)

    @classmethod
    def from_numbers(cls, *, n_taxa: int, n_samples: int, interval: float | None, depth: int,
                     irregular: bool = False, depth_spread: float = 0.0) -> PowerDesign:
        """A design from numbers; ``interval=None`` makes a snapshot design.

        Raises
        ------
        InputError
            A design too small to analyse (:func:`driftscreen.limits.shortfall`).
        """
        lacking = shortfall(interval is not None, n_samples, n_taxa)
        if lacking is not None:
            what, minimum = lacking
            count = n_samples if what == "samples" else n_taxa
            raise InputError(f"{count} {what} are too few to analyse", parameter=f"n_{what}",
                             fix=f"give at least {minimum}")
        spec = DesignSpec(n_samples=n_samples, interval=interval, irregular=irregular,
                          depth=depth, depth_spread=depth_spread)
        return cls(n_taxa, spec=spec)

    @property
    def is_time_series(self) -> bool:
        if self.fixed is not None:
            return self.fixed.is_time_series
        return self.spec.interval is not None

    @property
    def n_samples(self) -> int:
        return self.fixed.n_samples if self.fixed is not None else self.spec.n_samples

    @property
    def median_depth(self) -> float:
        return float(np.median(self.fixed.depths)) if self.fixed is not None else self.spec.depth

    def draw(self, rng: np.random.Generator) -> Design:
        """The design of one simulated dataset."""
        return self.fixed if self.fixed is not None else self.spec.draw(rng)

    def short_text(self) -> str:
        """``40 taxa, 100 samples, median depth 10,000 reads``."""
        kind = "samples" if self.is_time_series else "replicate communities"
        return (f"{self.n_taxa} taxa, {self.n_samples} {kind}, median depth "
                f"{self.median_depth:,.0f} reads")


# ----------------------------------------------------------------------------- alternatives
@dataclass(frozen=True)
class ProfiledLogistic(StochasticLogistic):
    """:class:`~driftscreen.niche.StochasticLogistic` with carrying capacities set to a
    given relative-abundance profile instead of log-uniform draws. Only relative abundances
    are observed and the model is invariant to a common scale of the capacities, so the
    mean abundances are proportional to the profile."""

    profile: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        super().__post_init__()
        if len(self.profile) != self.n_taxa:
            raise ValueError("profile must have one entry per taxon")

    def draw_capacities(self, n_replicates: int, rng: np.random.Generator) -> np.ndarray:
        return np.tile(np.asarray(self.profile), (n_replicates, 1))


@dataclass(frozen=True)
class ProfiledLotkaVolterra(NoisyLotkaVolterra):
    """:class:`~driftscreen.niche.NoisyLotkaVolterra` with carrying capacities set to a
    given relative-abundance profile; growth rates and competition are drawn as usual."""

    profile: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        super().__post_init__()
        if len(self.profile) != self.n_taxa:
            raise ValueError("profile must have one entry per taxon")

    def draw_parameters(self, n_replicates: int,
                        rng: np.random.Generator) -> LotkaVolterraParameters:
        drawn = super().draw_parameters(n_replicates, rng)
        return replace(drawn, capacity=np.tile(np.asarray(self.profile), (n_replicates, 1)))


NicheModel = StochasticLogistic | NoisyLotkaVolterra


@dataclass(frozen=True)
class NicheAlternative:
    """A niche alternative whose ``strength`` is varied for power analysis.

    Attributes
    ----------
    name:
        ``"logistic"``: independent stochastic logistic taxa (Grilli 2020, Nat. Commun.
        11:4743), strength = sigma, the environmental noise; sigma = 0 is a constant
        community, the neutral limit (theta -> infinity). ``"lotka-volterra"``: competitive
        generalised Lotka-Volterra community (Stein et al. 2013, PLoS Comput. Biol.
        9:e1003388), strength = mean competition coefficient C_ij.
    timescale:
        Generation time of the niche dynamics in days.
    noise:
        Environmental noise of the Lotka-Volterra community (sigma of its taxa). The default
        0 makes every fluctuation beyond sampling come from competition, and strength 0 a
        constant community (the neutral limit). Must be 0 for ``"logistic"``.
    """

    name: str = "logistic"
    timescale: float = 1.0
    noise: float = 0.0

    def __post_init__(self) -> None:
        if self.name not in ALTERNATIVES:
            raise ValueError(f"alternative must be one of {ALTERNATIVES}, got {self.name!r}")
        if not self.timescale > 0:
            raise ValueError("timescale must be positive")
        if self.noise not in SIGMA:
            raise ValueError(f"noise must be in {SIGMA.interval()}")
        if self.name == "logistic" and self.noise != 0.0:
            raise ValueError("noise is a setting of the lotka-volterra alternative only")

    @property
    def strength_name(self) -> str:
        return "sigma" if self.name == "logistic" else "competition"

    @property
    def spread_decades(self) -> float:
        """Default spread of the model's carrying capacities, in orders of magnitude."""
        model = StochasticLogistic if self.name == "logistic" else NoisyLotkaVolterra
        return float(model.spread_decades)

    def strength_meaning(self, strength: float) -> str:
        """What a strength means, e.g. ``sigma; abundances vary with a CV of 3.4%``."""
        if self.name == "logistic":
            cv = math.sqrt(strength / (2.0 - strength))
            return f"sigma; each taxon's abundance varies with a CV of {100 * cv:.2g}%"
        return "mean competition coefficient"

    @property
    def label(self) -> str:
        return "logistic" if self.name == "logistic" else "Lotka-Volterra"

    def default_strengths(self) -> tuple[float, ...]:
        return DEFAULT_STRENGTHS[self.name]

    def strength_problem(self, strength: float) -> str:
        """Why ``strength`` is not allowed for this alternative, or ``""``."""
        if strength not in COMPETITION:
            return f"strength {strength:g} is not a non-negative number"
        if self.name == "logistic" and strength not in SIGMA:
            return f"strength (sigma) {strength:g} is not below {SIGMA.maximum:g}"
        return ""

    def is_neutral_limit(self, strength: float) -> bool:
        """True where the alternative is a constant community, i.e. neutral (theta = inf)."""
        return strength == 0.0 and self.noise == 0.0

    def model(self, n_taxa: int, strength: float, profile: np.ndarray | None) -> NicheModel:
        """The niche simulator at ``strength`` (with carrying capacities from ``profile``)."""
        if self.name == "logistic":
            if profile is None:
                return StochasticLogistic(n_taxa, strength=strength, timescale=self.timescale)
            return ProfiledLogistic(n_taxa, strength=strength, timescale=self.timescale,
                                    profile=tuple(profile))
        options = dict(strength=strength, noise=self.noise, timescale=self.timescale)
        if profile is None:
            return NoisyLotkaVolterra(n_taxa, **options)
        return ProfiledLotkaVolterra(n_taxa, **options, profile=tuple(profile))


def niche_alternative(name: str, *, timescale: float = 1.0, noise: float | None = None
                      ) -> NicheAlternative:
    """The alternative ``name``; ``noise`` (default 0) only for ``"lotka-volterra"``.

    Raises
    ------
    InputError
        A noise for the logistic alternative, or one out of :data:`driftscreen.limits.SIGMA`.
    """
    if noise is not None and name != "lotka-volterra":
        raise InputError("noise is a setting of the lotka-volterra alternative",
                         parameter="noise", fix="drop it, or choose that alternative")
    if noise is not None and noise not in SIGMA:
        raise InputError(f"noise {noise:g} is not in {SIGMA.interval()}", parameter="noise",
                         fix="give a value such as 0.01")
    return NicheAlternative(name, timescale=timescale, noise=noise or 0.0)


def as_alternative(alternative: str | NicheAlternative) -> NicheAlternative:
    """A :class:`NicheAlternative` from its name (default settings), or as given."""
    if isinstance(alternative, NicheAlternative):
        return alternative
    return NicheAlternative(alternative)


def checked_strengths(strengths: Sequence[float] | None,
                      alternative: NicheAlternative) -> tuple[float, ...]:
    """The grid sorted and without repeats; the alternative's default if ``None``.

    Raises ValueError for an empty grid or a strength the alternative does not allow.
    """
    if strengths is None:
        return alternative.default_strengths()
    grid = tuple(sorted({float(s) for s in strengths}))
    if not grid:
        raise ValueError("give at least one strength")
    problems = [alternative.strength_problem(s) for s in grid]
    if any(problems):
        raise ValueError(next(p for p in problems if p))
    return grid


def parse_strengths(text: str, alternative: NicheAlternative) -> tuple[float, ...]:
    """``"0,0.1,0.2"`` as a sorted grid of strengths.

    Raises
    ------
    InputError
        For an entry that is not a number, an empty list, or a strength out of range.
    """
    fix = ("give comma-separated numbers, e.g. "
           + ",".join(f"{s:g}" for s in alternative.default_strengths()[:4]))
    entries = [entry.strip() for entry in text.split(",") if entry.strip()]
    if not entries:
        raise InputError("no strengths given", parameter="strengths", fix=fix)
    values = []
    for entry in entries:
        try:
            values.append(float(entry))
        except ValueError:
            raise InputError(f"'{entry}' is not a number", parameter="strengths",
                             fix=fix) from None
        problem = alternative.strength_problem(values[-1])
        if problem:
            raise InputError(problem, parameter="strengths", fix=STRENGTHS_FIX)
    return checked_strengths(values, alternative)


# ----------------------------------------------------------------------------- one dataset
@dataclass(frozen=True)
class PowerTask:
    """One simulated dataset of a power run; everything a worker needs, picklable."""

    design: PowerDesign
    alternative: NicheAlternative
    strength: float
    index: int
    settings: CalibrationSettings
    statistics: tuple[str, ...]


@dataclass(frozen=True)
class TaskOutput:
    """p-values of every statistic on one simulated dataset (NaN where undefined), or why
    the dataset could not be tested."""

    pvalues: np.ndarray
    failure: str = ""


def dataset_name(alternative: NicheAlternative, strength: float, index: int) -> str:
    """Name of a simulated dataset; it keys the dataset's calibration streams."""
    return f"power:{alternative.name}:{float(strength)!r}:{index}"


def simulation_stream(seed: int, alternative: NicheAlternative, strength: float,
                      index: int) -> np.random.SeedSequence:
    """Stream of the design and niche draws of one dataset, keyed by what it is for."""
    return seeds.dataset_stream(seed, "simulate:" + dataset_name(alternative, strength, index))


def simulated_dataset(task: PowerTask) -> Dataset:
    """The niche community of ``task``, sampled with (a draw of) the design."""
    rng = seeds.generator(simulation_stream(task.settings.seed, task.alternative,
                                            task.strength, task.index))
    design = task.design.draw(rng)
    model = task.alternative.model(task.design.n_taxa, task.strength, task.design.profile)
    counts = model.simulate(design, 1, rng)[0]
    return as_dataset(dataset_name(task.alternative, task.strength, task.index), counts, design)


def run_power_task(task: PowerTask) -> TaskOutput:
    """Simulate one dataset and run the full calibrated test on it.

    A dataset that cannot be analysed or whose test fails gets NaN p-values (it counts as
    not rejected) and the reason.
    """
    missing = np.full(len(task.statistics), np.nan)
    try:
        dataset = simulated_dataset(task)
        reason = unanalysable_reason(dataset)
        if reason:
            return TaskOutput(missing, reason)
        result = run_calibration(dataset, task.settings)
    except Exception as error:  # noqa: BLE001 - one dataset's failure must not stop the run
        return TaskOutput(missing, f"{type(error).__name__}: {error}")
    return TaskOutput(np.array([result.statistics[name].pvalue if name in result.statistics
                                else np.nan for name in task.statistics]))


def statistic_names(design: PowerDesign, groupings: int) -> tuple[str, ...]:
    """Statistics the design allows, then ``combined``."""
    allowed = default_statistics(time_series=design.is_time_series, n_groupings=groupings)
    return tuple(s.name for s in allowed) + (COMBINED,)


# ----------------------------------------------------------------------------- the result
@dataclass(frozen=True)
class PowerResult:
    """Outcome of :func:`power_curve`.

    Attributes
    ----------
    design, alternative:
        What was simulated.
    strengths:
        The grid, increasing, shape ``(S,)``.
    statistics:
        Statistic names, ``combined`` last.
    pvalues:
        Shape ``(S, n_datasets, len(statistics))``: each dataset's calibrated p-values
        (NaN where undefined or failed).
    failures:
        One message per dataset that could not be tested (counted as not rejected).
    alpha:
        Level of the tests.
    settings:
        Replicates B, groupings R and master seed of the calibrations.
    """

    design: PowerDesign
    alternative: NicheAlternative
    strengths: np.ndarray
    statistics: tuple[str, ...]
    pvalues: np.ndarray
    failures: tuple[str, ...]
    alpha: float
    settings: CalibrationSettings

    @property
    def n_datasets(self) -> int:
        return int(self.pvalues.shape[1])

    @property
    def rejections(self) -> np.ndarray:
        """Datasets rejected at alpha, shape ``(S, statistics)``; NaN p-values do not reject."""
        return np.count_nonzero(np.nan_to_num(self.pvalues, nan=np.inf) <= self.alpha, axis=1)

    @property
    def power(self) -> np.ndarray:
        """Rejection rates, shape ``(S, statistics)``."""
        return self.rejections / self.n_datasets

    def interval(self, confidence: float = CONFIDENCE) -> tuple[np.ndarray, np.ndarray]:
        """Wilson score interval of every power, each of shape ``(S, statistics)``."""
        return wilson_interval(self.rejections, self.n_datasets, confidence)

    def combined_power(self) -> np.ndarray:
        """Rejection rates of ``combined``, shape ``(S,)``."""
        return self.power[:, self.statistics.index(COMBINED)]

    def minimum_detectable(self) -> tuple[float, float, float]:
        """Minimum detectable strength of ``combined`` and its range.

        The range applies :func:`minimum_detectable_strength` to the upper and to the
        lower bounds of the pointwise 95% intervals of the power.
        """
        column = self.statistics.index(COMBINED)
        low, high = self.interval()
        return tuple(minimum_detectable_strength(self.strengths, curve[:, column])
                     for curve in (self.power, high, low))

    def to_frame(self) -> pd.DataFrame:
        """One row per strength and statistic: datasets, rejected, undefined, power, interval."""
        low, high = self.interval()
        undefined = np.count_nonzero(np.isnan(self.pvalues), axis=1)
        rows = [{"alternative": self.alternative.name, "strength": float(s),
                 "statistic": name, "datasets": self.n_datasets,
                 "rejected": int(self.rejections[i, j]), "undefined": int(undefined[i, j]),
                 "power": float(self.power[i, j]), "power_low": float(low[i, j]),
                 "power_high": float(high[i, j]), "alpha": self.alpha}
                for i, s in enumerate(self.strengths) for j, name in enumerate(self.statistics)]
        return pd.DataFrame(rows)

    def to_tsv(self) -> str:
        """:meth:`to_frame` as tab-separated text (numbers with 6 significant digits)."""
        return self.to_frame().to_csv(sep="\t", index=False, float_format="%.6g",
                                      lineterminator="\n")

    def summary(self) -> str:
        """Fixed-width plain-text report (at most 78 columns)."""
        from driftscreen.report.power import power_report

        return power_report(self)


# ----------------------------------------------------------------------------- running


def power_curve(design: PowerDesign, alternative: str | NicheAlternative = "logistic",
                strengths: Sequence[float] | None = None, n_datasets: int = 50,
                replicates: int = 199, groupings: int = 200, seed: int = 0, jobs: int = 1,
                alpha: float = 0.05, *, messages: TextIO | None = None) -> PowerResult:
    """Power of every statistic (and ``combined``) against a niche alternative.

    Parameters
    ----------
    design:
        The design to plan for (:class:`PowerDesign`).
    alternative:
        ``"logistic"``, ``"lotka-volterra"`` or a :class:`NicheAlternative`.
    strengths:
        Grid of niche strengths (sorted, repeats dropped); default: the alternative's grid.
    n_datasets:
        Simulated datasets per strength; the Monte Carlo precision of each power.
    replicates, groupings, seed:
        Calibration settings of every test, as in :func:`driftscreen.calibrate.neutrality_test`.
    jobs:
        Worker processes for ONE joblib run over all (strength, dataset) pairs; results do
        not depend on it.
    alpha:
        Level at which a dataset counts as rejected (p-value <= alpha).
    messages:
        Stream for progress lines; ``None`` is silent.

    Returns
    -------
    PowerResult
        Rejection rates with Wilson intervals, the minimum detectable strength, ``summary()``.
    """
    settings = CalibrationSettings(replicates=replicates, groupings=groupings, seed=seed)
    return power_with(design, alternative, strengths, n_datasets, settings, jobs=jobs,
                      alpha=alpha, messages=messages)


def power_with(design: PowerDesign, alternative: str | NicheAlternative,
               strengths: Sequence[float] | None, n_datasets: int,
               settings: CalibrationSettings, *, jobs: int = 1, alpha: float = 0.05,
               messages: TextIO | None = None) -> PowerResult:
    """:func:`power_curve` with its calibration settings as one record (the null's options
    included)."""
    alternative = as_alternative(alternative)
    grid = checked_strengths(strengths, alternative)
    check_power_input(n_datasets, alpha)
    names = statistic_names(design, settings.groupings)
    tasks = [PowerTask(design, alternative, strength, index, settings, names)
             for strength in grid for index in range(n_datasets)]
    progress = PowerProgress(len(tasks), messages)
    outputs = []
    for output in Parallel(n_jobs=jobs, return_as="generator")(
            delayed(run_power_task)(task) for task in tasks):
        outputs.append(output)
        progress.dataset_finished()
    pvalues = np.array([out.pvalues for out in outputs]).reshape(len(grid), n_datasets,
                                                                  len(names))
    failures = tuple(f"strength {task.strength:g}, dataset {task.index + 1}: {out.failure}"
                     for task, out in zip(tasks, outputs) if out.failure)
    return PowerResult(design, alternative, np.array(grid), names, pvalues, failures, alpha,
                       settings)


def check_power_input(n_datasets: int, alpha: float) -> None:
    """The input check of :func:`power_curve` besides the grid and the calibration settings.

    Raises
    ------
    InputError
        ``n_datasets`` below 1 or ``alpha`` outside (0, 1).
    """
    if n_datasets < 1:
        raise InputError(f"{n_datasets} datasets per strength are too few",
                         parameter="n_datasets", fix="give at least 1")
    if not 0.0 < alpha < 1.0:
        raise InputError(f"alpha {alpha:g} is not between 0 and 1", parameter="alpha",
                         fix="give a level such as 0.05")


# ----------------------------------------------------------------------------- detectable line
def bisect_detectable(design: PowerDesign, alternative: NicheAlternative,
                      grid: Sequence[float], n_datasets: int, settings: CalibrationSettings,
                      jobs: int, alpha: float) -> float:
    """Minimum detectable strength by bisection over an increasing ``grid``.

    Evaluates the power of ``combined`` at about log2(len(grid)) strengths: assuming power
    grows with strength, the first grid strength reaching the target lies above every
    evaluated strength below it and at or below every evaluated strength that reaches it.
    The answer interpolates between the two bracketing strengths as
    :func:`minimum_detectable_strength` does.
    """
    below, above = -1, len(grid)
    evaluated: dict[float, float] = {}
    while above - below > 1:
        middle = (below + above) // 2
        run = power_with(design, alternative, [grid[middle]], n_datasets, settings,
                         jobs=jobs, alpha=alpha)
        evaluated[grid[middle]] = float(run.combined_power()[0])
        if evaluated[grid[middle]] >= TARGET_POWER:
            above = middle
        else:
            below = middle
    points = sorted(evaluated)
    return minimum_detectable_strength(points, [evaluated[s] for s in points])


def detectable_line(dataset: Dataset, settings: CalibrationSettings, *,
                    alternative: str | NicheAlternative = "logistic",
                    n_datasets: int = QUICK_DATASETS, replicates: int = QUICK_REPLICATES,
                    jobs: int = 1, alpha: float = 0.05) -> str:
    """One sentence on what this dataset's design could have detected.

    A quick power run on the dataset's own design (times, depths, abundance profile):
    ``n_datasets`` per strength, B = ``replicates``, bisection over a short grid
    (:func:`bisect_detectable`); ``settings`` gives the groupings, the seed and the null's
    options.
    """
    alt = as_alternative(alternative)
    grid = DEFAULT_STRENGTHS[alt.name]
    quick = replace(settings, replicates=replicates)
    design = PowerDesign.from_dataset(dataset)
    mde = bisect_detectable(design, alt, grid, n_datasets, quick, jobs, alpha)
    head = f"{DETECTABLE_PREFIX}{design.short_text()}), the {alt.label} niche alternative"
    how = (f"(quick estimate: {n_datasets} simulated datasets per strength, B = {replicates}; "
           "see `driftscreen power`)")
    if math.isinf(mde):
        return (f"{head} is not detected with {TARGET_POWER:.0%} power at any strength up to "
                f"{grid[-1]:g} ({alt.strength_name}); niche structure of that kind could go "
                f"unnoticed {how}.")
    bound = " or less" if mde == grid[0] else ""
    return (f"{head} is detected with {TARGET_POWER:.0%} power from strength "
            f"{mde:.2g}{bound} ({alt.strength_meaning(mde)}); weaker niche structure "
            f"could go unnoticed {how}.")


def detectable_settings(alternative: str = "logistic") -> str:
    """Everything besides the calibration settings that determines a detectable line
    (for a screen's settings fingerprint)."""
    grid = ",".join(f"{s:g}" for s in DEFAULT_STRENGTHS[alternative])
    return (f"{alternative} alternative, {QUICK_DATASETS} datasets per strength, B = "
            f"{QUICK_REPLICATES}, alpha 0.05, {TARGET_POWER:.0%} power, bisection over {grid}")


__all__ = ["ALTERNATIVES", "NicheAlternative", "PowerDesign", "PowerResult", "detectable_line",
           "minimum_detectable_strength", "parse_strengths", "power_curve", "wilson_interval"]
