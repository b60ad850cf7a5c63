"""Parametric-bootstrap calibration of neutrality statistics for one dataset.

Recipe (Davison & Hinkley 1997, "Bootstrap Methods and their Application", ch. 4):

1. fit the neutral null to the data (:func:`driftscreen.neutral.fit.fit_batch`);
2. simulate B neutral replicate datasets with the data's own taxa, times and depths
   (:func:`driftscreen.neutral.simulate.simulate`); a time series is by default
   conditioned on its observed first sample
   (:func:`driftscreen.neutral.simulate.simulate_conditioned`), so a community still
   relaxing from a disturbance is compared with neutral communities relaxing from the
   same start, and reads carry the technical noise estimated from the data (from its
   technical replicates where it has them: then every replicate dataset carries simulated
   technical replicates too, and its noise is re-estimated from them,
   :func:`fit_null`).
   The moment estimates of theta and rate are biased in short or strongly autocorrelated
   series, and the null distributions of several statistics depend on them; so a pilot
   of neutral replicates first measures the estimators' median bias on the log scale and
   the replicates are simulated at the bias-corrected values (bootstrap bias correction,
   Davison & Hinkley 1997, sec. 2.2.1);
3. re-fit the null on every replicate and recompute every statistic on it, so that the
   replicates go through the same estimation step as the data;
4. p-value = (1 + #replicates at least as extreme) / (B + 1); a studentised statistic
   measures "extreme" in units of each table's own standard error (studentised
   bootstrap), the others on their own scale;
5. ``combined``: the harmonic mean p-value (Wilson 2019) of the statistics' p-values,
   itself calibrated against the replicates' own leave-one-out p-values.

Replicates are simulated in chunks whose size depends only on the design; chunk ``i``
draws from its own stream of the dataset's seed, so results do not depend on the number
of jobs or on how chunks are scheduled.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from joblib import Parallel, delayed

from driftscreen import seeds
from driftscreen.dataset import Dataset, Design, TechnicalReplicates
from driftscreen.limits import JOBS, check_analysable
from driftscreen.neutral.fit import (
    CONDITIONED_MIN_SPAN,
    NOISE_GRID,
    fit_batch,
    fitted_model,
    noise_identifiable,
)
from driftscreen.neutral.model import (
    NeutralModel,
    NoiseOption,
    NullFit,
    NullOptions,
    StartOption,
)
from driftscreen.neutral.simulate import simulate_with_replicates
from driftscreen.neutral.technical import replicate_noise
from driftscreen.results import (
    CalibrationSettings,
    DatasetSummary,
    NeutralityResult,
    ParameterEstimate,
    StatisticResult,
    technical_source,
)
from driftscreen.statistics.base import Statistic, is_studentised
from driftscreen.statistics.combination import harmonic_mean_pvalue
from driftscreen.statistics.fluctuation_scaling import taylor_fit
from driftscreen.statistics.registry import COMBINED, default_statistics
from driftscreen.taxon_scan import TaxonScan, scan_table, taxon_scan_for

#: Neutral replicates in the pilot that measures the bias of the theta and rate estimators.
PILOT_REPLICATES = 64
#: Largest factor by which the bias correction may move an estimate.
MAX_BIAS_FACTOR = 4.0
#: Marginal statistics get a p-value only when a time series spans at least this many
#: correlation times (fitted rate x span). With replicates started from the stationary law
#: they kept their level from about 15 correlation times on and rejected neutral data far
#: too often below 5-10. Conditioned on the first sample, replicates share the data's
#: start, and the marginal statistics kept their level on series of a few correlation
#: times (bench/null_choices.py: rejection rates 0.03-0.07 at 0.05 on series below 15
#: correlation times); only a fit at the slowest admissible rate
#: (:data:`driftscreen.neutral.fit.CONDITIONED_MIN_SPAN`), a series that barely moves
#: from its start, withholds them.
MIN_CORRELATION_TIMES = {"stationary": 15.0, "first-sample": CONDITIONED_MIN_SPAN * 1.01}
#: The note of a statistic that reports a p-value but takes no part in ``combined``.
NOT_COMBINED_NOTE = "not part of the combined test"
#: Budget of count cells (replicates x samples x taxa) per chunk of replicates.
CHUNK_CELLS = 2_000_000
#: Significant digits of the numbers kept in the diagnostic tables of a result.
DIAGNOSTIC_DIGITS = 6


@dataclass(frozen=True)
class ChunkTask:
    """One chunk of bootstrap replicates: everything a worker needs, picklable."""

    model: NeutralModel
    design: Design
    n_replicates: int
    simulation_stream: np.random.SeedSequence
    statistics_stream: np.random.SeedSequence
    statistics: tuple[Statistic, ...]
    options: NullOptions = NullOptions()
    first_counts: np.ndarray | None = None
    taxon_scan: TaxonScan | None = None
    technical: TechnicalReplicates | None = None


@dataclass(frozen=True)
class ChunkOutput:
    """Statistics (n, S), re-fitted parameters and per-taxon measures (n, M, G) of one
    chunk of replicates."""

    values: np.ndarray
    theta: np.ndarray
    rate: np.ndarray | None
    noise: np.ndarray | None = None
    taxa: np.ndarray | None = None
    scales: np.ndarray | None = None


@dataclass(frozen=True)
class CalibrationPlan:
    """The observed side of a calibration and the replicate chunks still to run."""

    dataset: Dataset
    settings: CalibrationSettings
    fit: NullFit
    model: NeutralModel
    statistics: tuple[Statistic, ...]
    observed: np.ndarray
    tasks: tuple[ChunkTask, ...]
    taxon_scan: TaxonScan | None = None
    observed_taxa: np.ndarray | None = None
    observed_scales: np.ndarray | None = None

    @property
    def raw_model(self) -> NeutralModel:
        """The moment estimates before bias correction, with the fit's flags."""
        return fitted_model(self.fit, self.dataset.design, self.settings.null,
                            replicate_pairs=replicate_pairs(self.dataset))


def chunk_size_for(design: Design, n_taxa: int) -> int:
    """Replicates per chunk: a function of the design only, never of the number of jobs."""
    cells = design.n_samples * n_taxa
    return int(np.clip(CHUNK_CELLS // max(cells, 1), 4, 100))


def compute_statistics(statistics: tuple[Statistic, ...], counts: np.ndarray, design: Design,
                       fit: NullFit, stream: np.random.SeedSequence) -> np.ndarray:
    """All statistics on a batch, shape ``(R, S)``; each gets a fresh generator on ``stream``."""
    columns = [stat.compute(counts, design, fit, seeds.generator(seeds.substream(stream, j)))
               for j, stat in enumerate(statistics)]
    return np.column_stack(columns).astype(np.float64)


def compute_scales(statistics: tuple[Statistic, ...], counts: np.ndarray, design: Design,
                   fit: NullFit, stream: np.random.SeedSequence) -> np.ndarray:
    """Each table's standard error of every studentised statistic (1 for the others),
    shape ``(R, S)``; the same fresh generators as :func:`compute_statistics`."""
    columns = [stat.standard_error(counts, design, fit,
                                   seeds.generator(seeds.substream(stream, j)))
               if is_studentised(stat) else np.ones(counts.shape[0])
               for j, stat in enumerate(statistics)]
    return np.column_stack(columns).astype(np.float64)


def median_log_bias(estimate: float, replicates: np.ndarray) -> float:
    """log(median of re-fitted replicates) - log(the value they were simulated at)."""
    values = replicates[np.isfinite(replicates) & (replicates > 0)]
    if values.size == 0:
        return 0.0
    bias = float(np.median(np.log(values)) - np.log(estimate))
    return float(np.clip(bias, -np.log(MAX_BIAS_FACTOR), np.log(MAX_BIAS_FACTOR)))


def simulate_null(model: NeutralModel, design: Design, n_replicates: int,
                  rng: np.random.Generator, first_counts: np.ndarray | None,
                  technical: TechnicalReplicates | None = None
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Neutral replicates ``(R, T, K)`` and their technical replicates ``(R, E, K)``
    (E = 0 without ``technical``): conditioned on ``first_counts`` when given."""
    return simulate_with_replicates(model, design, n_replicates, technical, rng,
                                    first_counts=first_counts)


def noise_replicates(dataset: Dataset, options: NullOptions) -> TechnicalReplicates | None:
    """The technical replicates the read precision comes from: the dataset's, when the
    noise is estimated (a fixed or no noise leaves them unused)."""
    return dataset.technical if options.noise == "estimate" else None


def replicate_pairs(dataset: Dataset) -> int:
    """Pairs of technical replicates of the dataset (0 without)."""
    return 0 if dataset.technical is None else dataset.technical.n_pairs


def noise_pairs(dataset: Dataset, options: NullOptions) -> int:
    """Pairs of technical replicates the read precision comes from (0: none used)."""
    technical = noise_replicates(dataset, options)
    return 0 if technical is None else technical.n_pairs


def fit_null(counts: np.ndarray, design: Design, options: NullOptions,
             technical: TechnicalReplicates | None = None,
             extra: np.ndarray | None = None) -> NullFit:
    """:func:`fit_batch` of ``counts`` ``(R, T, K)``; with ``technical`` replicates and
    their reads ``extra`` ``(R, E, K)``, the noise of every table comes from its pairs
    (:func:`driftscreen.neutral.technical.replicate_noise`)."""
    if technical is None or extra is None:
        return fit_batch(counts, design, options)
    noise = replicate_noise(counts[:, technical.of], extra, design.depths[technical.of],
                            technical.depths)
    return fit_batch(counts, design, options, known_noise=noise)


def conditioning_sample(dataset: Dataset, options: NullOptions) -> np.ndarray | None:
    """The observed first sample that replicates are conditioned on (time series only)."""
    if not (options.conditioned and dataset.design.is_time_series):
        return None
    return dataset.counts[0]


def noise_bias_corrected(noise: float, replicates: np.ndarray) -> float:
    """g minus the median overshoot of its estimator, kept in the estimator's range.

    Additive, because g = 0 (no technical noise) is a value the estimator reaches.
    """
    values = replicates[np.isfinite(replicates)]
    if noise <= 0 or values.size == 0:
        return noise
    return float(np.clip(2.0 * noise - np.median(values), 0.0, NOISE_GRID[-1]))


def bias_corrected_model(model: NeutralModel, design: Design,
                         stream: np.random.SeedSequence, clipped: bool = False,
                         options: NullOptions = NullOptions(),
                         first_counts: np.ndarray | None = None,
                         technical: TechnicalReplicates | None = None) -> NeutralModel:
    """The model with theta, rate and noise corrected for the bias of their estimators.

    A pilot of :data:`PILOT_REPLICATES` replicates is simulated at ``model`` (conditioned
    on ``first_counts`` when given) and re-fitted; theta and the rate are divided by the
    factor by which the estimator overshot its median, an estimated noise is moved back by
    its median overshoot. A clipped fit (theta at the end of its range: no drift variance
    detectable) is left as it is: there is no bias to measure at a boundary. A noise from
    ``technical`` replicates (simulated with the pilot and re-estimated) is not moved: its
    estimator is unbiased (:mod:`driftscreen.neutral.technical`).
    """
    if clipped:
        return model
    counts, extra = simulate_null(model, design, PILOT_REPLICATES, seeds.generator(stream),
                                  first_counts, technical)
    pilot = fit_null(counts, design, options, technical, extra)
    theta = model.theta * np.exp(-median_log_bias(model.theta, pilot.theta))
    rate = None
    if model.rate is not None and pilot.rate is not None:
        rate = model.rate * np.exp(-median_log_bias(model.rate, pilot.rate))
    noise = model.noise
    if options.fixed_noise is None and technical is None:
        noise = noise_bias_corrected(model.noise, pilot.noise)
    note = (f"theta (and rate) bias-corrected by a pilot of {PILOT_REPLICATES} neutral "
            f"replicates: moment estimates theta {model.theta:.4g}"
            + (f", rate {model.rate:.4g} per day" if model.rate is not None else "")
            + (f", read precision {model.precision:.4g}" if model.noise > 0 else ""))
    return NeutralModel(model.p, theta, rate, noise, model.flags + (note,), model.conditioned)


def plan_calibration(dataset: Dataset, settings: CalibrationSettings,
                     statistics: tuple[Statistic, ...] | None = None) -> CalibrationPlan:
    """Fit the observed data, compute its statistics and lay out the replicate chunks."""
    design = dataset.design
    if statistics is None:
        statistics = tuple(default_statistics(time_series=design.is_time_series,
                                              n_groupings=settings.groupings))
    root = seeds.dataset_stream(settings.seed, dataset.name)
    statistics_stream = seeds.substream(root, seeds.STATISTICS)
    options = settings.null
    first_counts = conditioning_sample(dataset, options)
    technical = noise_replicates(dataset, options)
    observed_fit = fit_null(dataset.counts[None], design, options, technical,
                            None if technical is None else technical.counts[None])
    observed = compute_statistics(statistics, dataset.counts[None], design, observed_fit,
                                  statistics_stream)[0]
    observed_scales = compute_scales(statistics, dataset.counts[None], design, observed_fit,
                                     statistics_stream)[0]
    model = bias_corrected_model(fitted_model(observed_fit, design, options,
                                              replicate_pairs=replicate_pairs(dataset)),
                                 design, seeds.substream(root, seeds.PILOT),
                                 bool(observed_fit.clipped[0]), options, first_counts, technical)
    scan = taxon_scan_for(observed_fit.p[0], float(observed_fit.theta[0]), design)
    size = chunk_size_for(design, dataset.n_taxa)
    starts = range(0, settings.replicates, size)
    tasks = tuple(
        ChunkTask(model, design, min(size, settings.replicates - start),
                  seeds.substream(root, seeds.SIMULATION, index), statistics_stream, statistics,
                  options, first_counts, scan, technical)
        for index, start in enumerate(starts))
    return CalibrationPlan(dataset, settings, observed_fit, model, statistics, observed, tasks,
                           scan, scan.measure(dataset.counts[None], design, observed_fit)[0],
                           observed_scales)


def run_chunk(task: ChunkTask) -> ChunkOutput:
    """Simulate, re-fit and compute the statistics for one chunk of replicates."""
    counts, extra = simulate_null(task.model, task.design, task.n_replicates,
                                  seeds.generator(task.simulation_stream), task.first_counts,
                                  task.technical)
    refit = fit_null(counts, task.design, task.options, task.technical, extra)
    values = compute_statistics(task.statistics, counts, task.design, refit,
                                task.statistics_stream)
    scales = compute_scales(task.statistics, counts, task.design, refit,
                            task.statistics_stream)
    taxa = None if task.taxon_scan is None else task.taxon_scan.measure(counts, task.design,
                                                                         refit)
    return ChunkOutput(values, refit.theta, refit.rate, refit.noise, taxa, scales)


def extremeness(values: np.ndarray, center: np.ndarray, alternative: str,
                scales: np.ndarray | float | None = None) -> np.ndarray:
    """Larger means further from neutral: the value itself, or its distance from the center;
    with ``scales`` (a studentised statistic), the distance from the center in those units."""
    if scales is None:
        return values if alternative == "greater" else np.abs(values - center)
    distance = values - center if alternative == "greater" else np.abs(values - center)
    return distance / scales


def usable_replicates(null: np.ndarray, scales: np.ndarray | None) -> np.ndarray:
    """Replicates with a finite value (and, if studentised, a finite positive scale)."""
    finite = np.isfinite(null)
    if scales is not None:
        finite &= np.isfinite(scales) & (scales > 0)
    return finite


def bootstrap_pvalue(observed: float, null: np.ndarray, alternative: str,
                     observed_scale: float = 1.0, scales: np.ndarray | None = None) -> float:
    """(1 + #{null at least as extreme as observed}) / (B + 1), undefined replicates dropped.

    ``observed_scale`` and ``scales`` (the replicates' own) are the standard errors of a
    studentised statistic; ``None`` compares the values themselves.
    """
    usable = usable_replicates(null, scales)
    null = null[usable]
    if not np.isfinite(observed) or null.size == 0:
        return np.nan
    if scales is not None and not (np.isfinite(observed_scale) and observed_scale > 0):
        return np.nan
    center = np.median(null)
    own = None if scales is None else scales[usable]
    hits = np.count_nonzero(extremeness(null, center, alternative, own)
                            >= extremeness(np.asarray(observed), center, alternative,
                                           None if scales is None else observed_scale))
    return (1.0 + hits) / (null.size + 1.0)


def leave_one_out_pvalues(null: np.ndarray, alternative: str,
                          scales: np.ndarray | None = None) -> np.ndarray:
    """p-value of each replicate against the other B - 1: (1 + #others as extreme) / B.

    A replicate's p-value computed this way has the same law as the observed p-value under
    the null, which is what calibrating the combination against the replicates needs.
    Undefined replicates get NaN. ``scales`` as for :func:`bootstrap_pvalue`.
    """
    finite = usable_replicates(null, scales)
    out = np.full(null.shape, np.nan)
    n = np.count_nonzero(finite)
    if n < 2:
        return out
    center = np.median(null[finite])
    score = extremeness(null[finite], center, alternative,
                        None if scales is None else scales[finite])
    at_least = n - np.searchsorted(np.sort(score), score, side="left")
    out[finite] = at_least / n  # counts itself once: (1 + #others) / ((n - 1) + 1)
    return out


def _statistic_note(n_undefined: int, replicates: int) -> str:
    if n_undefined == 0:
        return ""
    return f"undefined on {n_undefined} of {replicates} replicates (dropped)"


def correlation_times(model: NeutralModel, design: Design) -> float:
    """How many correlation times (rate x span) a time series covers; inf for a snapshot."""
    if design.times is None or model.rate is None:
        return np.inf
    return model.rate * float(design.times[-1] - design.times[0])


def withheld_reason(stat: Statistic, model: NeutralModel, design: Design,
                    options: NullOptions = NullOptions()) -> str:
    """Why a statistic gets no p-value on this design ('' if it gets one)."""
    coverage = correlation_times(model, design)
    needed = MIN_CORRELATION_TIMES[options.start]
    if not stat.marginal or coverage >= needed:
        return ""
    return (f"no p-value: the series spans {coverage:.1f} correlation times (rate x span), "
            f"fewer than the {needed:.3g} needed to calibrate a comparison with the stationary "
            "distribution; left out of the combined test")


def calibrate_statistics(plan: CalibrationPlan, null: np.ndarray,
                         null_scales: np.ndarray) -> dict[str, StatisticResult]:
    """StatisticResults for every statistic and for their calibrated combination.

    ``null`` and ``null_scales`` are the replicates' values and standard errors ``(B, S)``.
    """
    results: dict[str, StatisticResult] = {}
    replicate_pvalues = np.full_like(null, np.nan)
    observed_pvalues = np.full(len(plan.statistics), np.nan)
    for j, stat in enumerate(plan.statistics):
        column = null[:, j]
        studentised = is_studentised(stat)
        scales = null_scales[:, j] if studentised else None
        observed_scale = float(plan.observed_scales[j]) if studentised else 1.0
        finite = usable_replicates(column, scales)
        withheld = withheld_reason(stat, plan.model, plan.dataset.design, plan.settings.null)
        pvalue = np.nan if withheld else bootstrap_pvalue(plan.observed[j], column,
                                                          stat.alternative, observed_scale,
                                                          scales)
        note = withheld or _statistic_note(int(np.count_nonzero(~finite)), column.size)
        if not np.isfinite(plan.observed[j]):
            note = "undefined for this dataset"
        elif not (withheld or stat.in_combination):
            note = "; ".join(filter(None, (note, NOT_COMBINED_NOTE)))
        results[stat.name] = StatisticResult(stat.name, float(plan.observed[j]), pvalue,
                                             column[finite], stat.alternative, note)
        if not withheld and stat.in_combination:
            observed_pvalues[j] = pvalue
            replicate_pvalues[:, j] = leave_one_out_pvalues(column, stat.alternative, scales)
    results[COMBINED] = combine(observed_pvalues, replicate_pvalues)
    return results


def combination_statistic(pvalues: np.ndarray) -> np.ndarray:
    """-log10 of the harmonic mean p-value per row, skipping undefined (NaN) p-values.

    The log scale keeps the heavy 1/p tail from swamping the null mean and sd that the
    effect sizes use; it is a monotone function of the harmonic mean.
    """
    weights = np.isfinite(pvalues).astype(np.float64)
    safe = np.where(weights > 0, pvalues, 0.5)
    combined = harmonic_mean_pvalue(safe, weights=weights, axis=-1)
    return np.where(weights.sum(axis=-1) > 0, -np.log10(combined), np.nan)


def combine(observed_pvalues: np.ndarray, replicate_pvalues: np.ndarray) -> StatisticResult:
    """Harmonic mean p-value of the statistics' p-values, calibrated on the replicates.

    The statistic is -log10 of the harmonic mean p-value (Wilson 2019, PNAS 116:1195); its
    p-value compares it with the same statistic computed from every replicate's
    leave-one-out p-values, which keeps the test exact under the bootstrap whatever the
    dependence between statistics. Unlike the Cauchy combination, a statistic with p = 1
    cannot cancel the evidence of the others (see
    :mod:`driftscreen.statistics.combination`). The uncalibrated harmonic mean is given
    in the note.
    """
    observed = float(combination_statistic(observed_pvalues[None])[0])
    null = combination_statistic(replicate_pvalues)
    pvalue = bootstrap_pvalue(observed, null, "greater")
    note = (f"harmonic mean of the p-values {10.0 ** -observed:.3g}" if np.isfinite(observed)
            else "no statistic defined for this dataset")
    return StatisticResult(COMBINED, observed, pvalue, null[np.isfinite(null)], "greater", note)


def parameter_interval(name: str, raw: float, simulated: float, replicates: np.ndarray,
                       unit: str = "") -> ParameterEstimate:
    """Bias-corrected estimate and basic bootstrap 95% interval on the log scale.

    ``raw`` is the moment estimate on the data, ``simulated`` the bias-corrected value the
    replicates were drawn at, ``replicates`` their re-fitted estimates. The law of
    log(replicate) - log(simulated) stands in for that of log(raw) - log(true value)
    (Davison & Hinkley 1997, sec. 5.2, basic interval).
    """
    values = replicates[np.isfinite(replicates) & (replicates > 0)]
    if values.size < 2 or not (np.isfinite(raw) and raw > 0):
        return ParameterEstimate(name, simulated, np.nan, np.nan, unit)
    q_low, q_high = np.quantile(np.log(values) - np.log(simulated), [0.025, 0.975])
    return ParameterEstimate(name, simulated, float(raw * np.exp(-q_high)),
                             float(raw * np.exp(-q_low)), unit)


def precision_interval(raw: float, simulated: float, replicates: np.ndarray,
                       options: NullOptions, design: Design,
                       rate: float | None, pairs: int = 0) -> ParameterEstimate | None:
    """Read precision C = 1/g - 1 with a 95% interval; None where it was not estimated.

    A fixed precision is reported as it is. An estimated one gets the basic bootstrap
    interval of g on its own scale (g = 0 is a value the estimator reaches, so not on the
    log scale), turned into C. When no noise was detected (g = 0) the estimate is inf and
    the lower bound comes from the 97.5% quantile of the replicates' g: reads at least
    that precise are consistent with the data. Nothing is reported where the series
    cannot tell noise from drift at its fitted ``rate``, unless the noise came from
    ``pairs`` pairs of technical replicates (time series and snapshots alike; the unit
    column then says so). The replicates' estimate of g is a ratio, skewed to the right
    like theta-hat, and gets the basic interval on the log scale: on 200 simulated
    datasets each (10 pairs, C = 300, B = 99) it covered C in 0.95 of snapshots and 0.93
    of time series, against 0.92 and 0.91 on the scale of g.
    """
    if options.fixed_noise is not None:
        if options.fixed_noise == 0:
            return None
        value = 1.0 / options.fixed_noise - 1.0
        return ParameterEstimate("precision", value, value, value, "fixed")
    source = technical_source(pairs) if pairs else ""
    if not pairs and (not design.is_time_series
                      or (simulated <= 0 and not noise_identifiable(design, rate))):
        return None
    values = replicates[np.isfinite(replicates)]
    if values.size < 2:
        return ParameterEstimate("precision", precision_of(simulated), np.nan, np.nan, source)
    q_low, q_high = np.quantile(values, [0.025, 0.975])
    if simulated <= 0:
        return ParameterEstimate("precision", np.inf, precision_of(q_high), np.inf, source)
    if pairs:
        noise = parameter_interval("noise", raw, simulated, values)
        return ParameterEstimate("precision", precision_of(simulated), precision_of(noise.high),
                                 precision_of(noise.low), source)
    low_g = max(raw - (q_high - simulated), 0.0)
    high_g = max(raw - (q_low - simulated), 0.0)
    return ParameterEstimate("precision", precision_of(simulated), precision_of(high_g),
                             precision_of(low_g), source)


def precision_of(noise: float) -> float:
    """C = 1/g - 1; inf for g = 0."""
    return np.inf if noise <= 0 else 1.0 / noise - 1.0


def summarize_dataset(dataset: Dataset) -> DatasetSummary:
    """The report's view of a dataset (no counts)."""
    design = dataset.design
    times = design.times
    return DatasetSummary(
        name=dataset.name, n_samples=dataset.n_samples, n_taxa=dataset.n_taxa,
        dropped_taxa=dataset.dropped_taxa, time_series=design.is_time_series,
        span_days=float(times[-1] - times[0]) if times is not None else np.nan,
        depth_min=int(design.depths.min()), depth_median=float(np.median(design.depths)),
        depth_max=int(design.depths.max()), notes=dataset.notes, warnings=dataset.warnings)


def observed_diagnostics(plan: CalibrationPlan) -> dict[str, pd.DataFrame]:
    """Every statistic's ``diagnose`` table on the observed data, made storable.

    Each runs on the observed counts with the observed fit (the model the observed value
    of the statistic was computed with) and a generator on the sub-stream its ``compute``
    had (see :func:`plan_calibration` and :func:`compute_statistics`), so random choices
    such as the groupings of taxa are the ones behind the observed value.
    """
    dataset = plan.dataset
    stream = seeds.substream(seeds.dataset_stream(plan.settings.seed, dataset.name),
                             seeds.STATISTICS)
    tables = {}
    for j, stat in enumerate(plan.statistics):
        table = stat.diagnose(dataset.counts, dataset.design, plan.raw_model,
                              seeds.generator(seeds.substream(stream, j)))
        tables[stat.name] = storable_table(with_neutral_taylor_line(table), dataset.taxa)
    return tables


def with_neutral_taylor_line(table: pd.DataFrame) -> pd.DataFrame:
    """Add the Taylor line fitted to the neutral expected variances of the same taxa.

    For a table with ``mean``, ``neutral_variance`` and ``used`` per taxon (the
    fluctuation-scaling diagnosis), the line of log neutral variance on log mean over the
    used taxa (Taylor 1961, Nature 189:732), with the statistic's own taxon weights, is
    what neutral drift predicts for this dataset's taxa (those with p > 0: a taxon that is
    declining towards absence has none); its intercept and slope are
    repeated in every row (``neutral_intercept``, ``neutral_slope``). Other tables are
    returned as they are.
    """
    if not {"mean", "neutral_variance", "used"} <= set(table.columns):
        return table
    positive = table["neutral_variance"].to_numpy(dtype=np.float64) > 0
    used = (table["used"].to_numpy(dtype=bool) & positive)[None]
    weights = (table["weight"].to_numpy(dtype=np.float64)[None]
               if "weight" in table.columns else None)
    intercept, slope = taylor_fit(table["mean"].to_numpy(dtype=np.float64)[None],
                                  table["neutral_variance"].to_numpy(dtype=np.float64)[None],
                                  used, weights)
    return table.assign(neutral_intercept=intercept[0], neutral_slope=slope[0])


def significant_digits(values: np.ndarray, digits: int = DIAGNOSTIC_DIGITS) -> np.ndarray:
    """Floats rounded to ``digits`` significant digits (decimal), NaN and inf kept."""
    return np.array([float(format(v, f".{digits - 1}e")) for v in values], dtype=np.float64)


def taxon_labels(table: pd.DataFrame, taxa: tuple[str, ...]) -> list[str]:
    """Taxon ids for the ``taxon`` column indices; a pool of m rare taxa reads "ID +(m-1) rare".

    ``members`` (when present and numeric) counts the taxa pooled in a row, ``taxon`` is
    then the pool's most abundant member.
    """
    members = (table["members"].to_numpy() if "members" in table
               and pd.api.types.is_integer_dtype(table["members"]) else np.ones(len(table), int))
    return [taxa[int(i)] + (f" +{int(m) - 1} rare" if m > 1 else "")
            for i, m in zip(table["taxon"].to_numpy(), members)]


def storable_table(table: pd.DataFrame, taxa: tuple[str, ...]) -> pd.DataFrame:
    """A diagnose table as kept in a result: ids for indices, modest and exact to store.

    ``taxon`` indices become taxon ids (:func:`taxon_labels`); columns of sequences (the
    member lists of groupings) are dropped; floats keep :data:`DIAGNOSTIC_DIGITS`
    significant digits, so fresh and stored results are the same numbers.
    """
    columns = {}
    for name in table.columns:
        column = table[name]
        if name == "taxon":
            columns[name] = np.array(taxon_labels(table, taxa), dtype=object)
        elif pd.api.types.is_bool_dtype(column) or pd.api.types.is_integer_dtype(column):
            columns[name] = column.to_numpy()
        elif pd.api.types.is_float_dtype(column):
            columns[name] = significant_digits(column.to_numpy(dtype=np.float64))
        elif all(isinstance(value, str) for value in column):
            columns[name] = column.to_numpy(dtype=object)
    return pd.DataFrame(columns)


def assemble(plan: CalibrationPlan, outputs: list[ChunkOutput]) -> NeutralityResult:
    """Turn the observed side and all replicate chunks into a NeutralityResult."""
    null = np.concatenate([out.values for out in outputs], axis=0)
    null_scales = np.concatenate([np.ones_like(out.values) if out.scales is None else out.scales
                                  for out in outputs], axis=0)
    model, raw = plan.model, plan.raw_model
    parameters = {"theta": parameter_interval(
        "theta", raw.theta, model.theta, np.concatenate([out.theta for out in outputs]))}
    if model.rate is not None and raw.rate is not None:
        rates = np.concatenate([out.rate for out in outputs if out.rate is not None])
        parameters["rate"] = parameter_interval("rate", raw.rate, model.rate, rates, "per day")
    precision = precision_interval(raw.noise, model.noise,
                                   np.concatenate([out.noise for out in outputs]),
                                   plan.settings.null, plan.dataset.design, raw.rate,
                                   noise_pairs(plan.dataset, plan.settings.null))
    if precision is not None:
        parameters["precision"] = precision
    return NeutralityResult(
        dataset=summarize_dataset(plan.dataset), model=model,
        statistics=calibrate_statistics(plan, null, null_scales), parameters=parameters,
        settings=plan.settings, notes=model.flags, diagnostics=observed_diagnostics(plan),
        taxa=taxon_results(plan, outputs),
        statistic_options=tuple(repr(stat) for stat in plan.statistics))


def taxon_results(plan: CalibrationPlan, outputs: list[ChunkOutput]) -> pd.DataFrame | None:
    """The per-taxon scan of the observed data against every replicate, made storable."""
    if plan.taxon_scan is None or any(out.taxa is None for out in outputs):
        return None
    dataset = plan.dataset
    ties = seeds.substream(seeds.dataset_stream(plan.settings.seed, dataset.name),
                           seeds.TAXON_TIES)
    table = scan_table(plan.taxon_scan, dataset.counts, dataset.design, plan.observed_taxa,
                       np.concatenate([out.taxa for out in outputs]), seeds.generator(ties))
    return storable_table(table, dataset.taxa)


def neutrality_test(dataset: Dataset, *, replicates: int = 999, groupings: int = 200,
                    seed: int = 0, jobs: int = 1,
                    statistics: tuple[Statistic, ...] | None = None,
                    noise: NoiseOption = "estimate",
                    start: StartOption = "first-sample") -> NeutralityResult:
    """Test one dataset against the neutral model by parametric bootstrap.

    Parameters
    ----------
    dataset:
        The data (see :func:`driftscreen.intake.read_datasets`).
    replicates:
        Number B of neutral replicates; p-values resolve down to 1 / (B + 1).
    groupings:
        Number of random groupings of taxa for ``regrouping_invariance``.
    seed:
        Master seed; the dataset's streams derive from it and from the dataset's name.
    jobs:
        Worker processes for the replicate chunks (results do not depend on it).
    statistics:
        Statistics to run (default: all that the design allows).
    noise:
        Technical noise of the reads: ``"estimate"`` (from the dataset's technical
        replicates where it has them, for any design; else from the data, time series only),
        ``"off"`` (multinomial reads) or a fixed Dirichlet-multinomial precision C.
    start:
        ``"first-sample"``: time-series replicates are conditioned on the observed first
        sample (a community relaxing from a disturbance is still neutral);
        ``"stationary"``: they start from the stationary law.

    Returns
    -------
    NeutralityResult
        Per statistic ``statistic``, ``pvalue``, ``null_distribution`` and effect sizes,
        the fitted null with bootstrap intervals, and ``summary()``.

    Raises
    ------
    InputError
        A design too small to analyse (:func:`driftscreen.limits.unanalysable_reason`).
    """
    check_test_input(dataset, jobs)
    settings = CalibrationSettings(replicates=replicates, groupings=groupings, seed=seed,
                                   null=NullOptions(noise=noise, start=start))
    return run_calibration(dataset, settings, jobs=jobs, statistics=statistics)


def check_test_input(dataset: Dataset, jobs: int) -> None:
    """The input check of a test of one dataset: an analysable design, ``jobs`` >= 1.

    Raises
    ------
    InputError
        A design too small to analyse (:func:`driftscreen.limits.unanalysable_reason`).
    ValueError
        ``jobs`` out of :data:`driftscreen.limits.JOBS`.
    """
    check_analysable(dataset)
    JOBS.check("jobs", jobs)


def run_calibration(dataset: Dataset, settings: CalibrationSettings, *, jobs: int = 1,
                    statistics: tuple[Statistic, ...] | None = None) -> NeutralityResult:
    """The calibrated test of a checked dataset (:func:`neutrality_test` without its input
    check); ``jobs`` is the ``n_jobs`` of the joblib backend in use."""
    plan = plan_calibration(dataset, settings, statistics)
    return assemble(plan, run_tasks(plan.tasks, jobs))


def run_tasks(tasks: tuple[ChunkTask, ...], jobs: int) -> list[ChunkOutput]:
    """Run replicate chunks in order, in this process or in ``jobs`` worker processes."""
    if jobs == 1 or len(tasks) == 1:
        return [run_chunk(task) for task in tasks]
    return list(Parallel(n_jobs=jobs)(delayed(run_chunk)(task) for task in tasks))
