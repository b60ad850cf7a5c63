"""The single sample a rejection rests on most, and the test without it.

A verdict of "neutrality rejected" may rest on one aberrant sample: a contaminated sample,
a sample swap, a failed run. For every dataset whose combined p-value is at most
:data:`LEVEL` (0.05, before any adjustment across datasets, so that the rule depends on the
dataset alone and a screen's answer for it does not depend on the other datasets), the
sample whose removal weakens the evidence most is found in two stages and the dataset is
then tested again without it:

1. **Outlyingness** (cheap, vectorised over samples and taxa). Under the fitted null each
   sample's relative abundance y_ti has mean p_i and variance
   p_i (1 - p_i) (v + (1 - v) s_t), v = 1 / (1 + theta), where s_t = g + (1 - g) / n_t is
   the sampling variance factor of reads at depth n_t with technical noise g (s_t = 1 / n_t
   for multinomial reads; Dirichlet-multinomial moments, Mosimann 1962, Biometrika 49:65).
   The score is the mean over taxa of the squared standardised deviation; for a time
   series it is averaged with the same mean for the sample's increments to its neighbours,
   whose variance is p_i (1 - p_i) (2 v (1 - exp(-rate dt)) + (1 - v) (s_s + s_t)) (the
   stationary covariance decays as exp(-rate dt)). Each part is about 1 for a neutral
   sample.
2. **Ranking** of the :data:`CANDIDATES` most outlying samples. For each, the observed
   statistics are recomputed on the dataset without it, as
   :func:`driftscreen.calibrate.plan_calibration` computes them for the observed data
   (:func:`driftscreen.calibrate.fit_null` with the settings' null options, then
   :func:`driftscreen.calibrate.compute_statistics` on the dataset's statistics stream),
   and compared with the *full-data* null distributions through normal-tail p-values
   (which, unlike bootstrap p-values, keep telling apart departures beyond every
   replicate); the harmonic mean of these p-values (Wilson 2019, PNAS 116:1195) measures
   what evidence is left. This is an approximation used only to choose a sample (it takes
   the null of T - 1 samples to be that of T, summarises it by its mean and sd, and
   combines uncalibrated p-values); it is never reported.
3. **Test without it**: the dataset without the chosen sample is calibrated in full with
   the same :class:`~driftscreen.calibrate.CalibrationSettings`, so the reported p-values
   are honest parametric-bootstrap p-values. The reduced dataset keeps the dataset's name,
   so it draws on the dataset's own streams (:func:`driftscreen.seeds.dataset_stream`):
   the result is exactly that of testing the table with the sample deleted, whatever the
   number of jobs.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
from scipy.special import erfc

from driftscreen import seeds
from driftscreen.calibrate import (COMBINED, CalibrationPlan, CalibrationSettings, ChunkOutput,
                                   assemble, compute_statistics, fit_null, noise_replicates,
                                   plan_calibration, run_tasks)
from driftscreen.dataset import Dataset, Design
from driftscreen.limits import NOT_ANALYSED, unanalysable_reason
from driftscreen.neutral.model import NeutralModel, sampling_variance_factor
from driftscreen.results import NeutralityResult, SampleInfluence, StatisticResult, rejected
from driftscreen.statistics.base import Statistic
from driftscreen.statistics.registry import default_statistics

#: Datasets whose combined p-value is at most this get their most influential sample.
LEVEL = 0.05
#: Most outlying samples ranked by the statistics of the dataset without them.
CANDIDATES = 3
#: Every note saying why a rejected dataset has no influential sample starts with this.
NOTE_PREFIX = "most influential sample:"


@dataclass(frozen=True)
class InfluencePlan:
    """The chosen sample and the calibration plan of the dataset without it."""

    index: int
    sample: str
    score: float
    plan: CalibrationPlan


# ----------------------------------------------------------------------------- datasets
def without_sample(dataset: Dataset, index: int) -> Dataset:
    """``dataset`` without sample ``index``: ids, times, depths, name and notes kept.

    Taxa left without reads are dropped and added to ``dropped_taxa``.
    """
    if not 0 <= index < dataset.n_samples:
        raise ValueError(f"sample index {index} outside 0..{dataset.n_samples - 1}")
    kept = np.arange(dataset.n_samples) != index
    counts = dataset.counts[kept]
    present = counts.sum(axis=0) > 0
    times = None if dataset.design.times is None else dataset.design.times[kept]
    return replace(dataset, counts=counts[:, present],
                   taxa=tuple(t for t, keep in zip(dataset.taxa, present) if keep),
                   samples=tuple(s for s, keep in zip(dataset.samples, kept) if keep),
                   design=Design(depths=dataset.design.depths[kept], times=times),
                   dropped_taxa=dataset.dropped_taxa + int(np.count_nonzero(~present)),
                   technical=(None if dataset.technical is None
                              else dataset.technical.restricted(kept, present)))


# ----------------------------------------------------------------------------- stage 1
def standardised_squares(deviations: np.ndarray, variances: np.ndarray) -> np.ndarray:
    """Mean over taxa (last axis) of deviation^2 / variance, taxa of zero variance skipped."""
    usable = variances > 0
    squares = np.divide(deviations**2, variances, out=np.zeros_like(deviations), where=usable)
    return squares.sum(axis=-1) / np.maximum(usable.sum(axis=-1), 1)


def marginal_outlyingness(shares: np.ndarray, design: Design, model: NeutralModel
                          ) -> np.ndarray:
    """Per sample: mean over taxa of (y_ti - p_i)^2 / (p_i (1 - p_i) (v + (1 - v) s_t))."""
    v = 1.0 / (1.0 + model.theta)
    sampling = sampling_variance_factor(design.depths, model.noise)
    variances = (model.p * (1.0 - model.p))[None] * (v + (1.0 - v) * sampling)[:, None]
    return standardised_squares(shares - model.p[None], variances)


def increment_outlyingness(shares: np.ndarray, design: Design, model: NeutralModel
                           ) -> np.ndarray:
    """Per sample: the standardised squared increments to its neighbours, averaged.

    Increment y_t - y_s of successive samples has variance p (1 - p) (2 v (1 - exp(-rate
    dt)) + (1 - v) (s_s + s_t)) under the fitted null; each pair's mean over taxa counts
    for both its samples.
    """
    v = 1.0 / (1.0 + model.theta)
    sampling = sampling_variance_factor(design.depths, model.noise)
    drift = 2.0 * v * -np.expm1(-model.rate * design.intervals)
    pair_sampling = (1.0 - v) * (sampling[:-1] + sampling[1:])
    variances = (model.p * (1.0 - model.p))[None] * (drift + pair_sampling)[:, None]
    pairs = standardised_squares(np.diff(shares, axis=0), variances)
    totals = np.zeros(design.n_samples)
    totals[:-1] += pairs
    totals[1:] += pairs
    neighbours = np.full(design.n_samples, 2.0)
    neighbours[[0, -1]] = 1.0
    return totals / neighbours


def outlyingness(dataset: Dataset, model: NeutralModel) -> np.ndarray:
    """How far each sample lies from the fitted null, shape ``(T,)``; about 1 if neutral.

    The marginal part for every design; for a time series averaged with the increment
    part (see the module docstring).
    """
    if model.n_taxa != dataset.n_taxa:
        raise ValueError("the model and the dataset have different taxa")
    shares = dataset.counts / dataset.design.depths[:, None]
    marginal = marginal_outlyingness(shares, dataset.design, model)
    if not dataset.is_time_series or model.rate is None:
        return marginal
    return 0.5 * (marginal + increment_outlyingness(shares, dataset.design, model))


def most_outlying(scores: np.ndarray, n: int) -> np.ndarray:
    """Indices of the ``n`` largest scores, largest first (ties: earlier sample first)."""
    return np.argsort(-scores, kind="stable")[:n]


# ----------------------------------------------------------------------------- stage 2
def statistics_for(dataset: Dataset, settings: CalibrationSettings,
                   statistics: tuple[Statistic, ...] | None) -> tuple[Statistic, ...]:
    """The statistics :func:`plan_calibration` runs on ``dataset`` (in its order)."""
    if statistics is not None:
        return statistics
    return tuple(default_statistics(time_series=dataset.is_time_series,
                                    n_groupings=settings.groupings))


def observed_statistics(dataset: Dataset, settings: CalibrationSettings,
                        statistics: tuple[Statistic, ...] | None = None) -> dict[str, float]:
    """The observed statistics of ``dataset`` by name, as :func:`plan_calibration` has them."""
    chosen = statistics_for(dataset, settings, statistics)
    stream = seeds.substream(seeds.dataset_stream(settings.seed, dataset.name), seeds.STATISTICS)
    counts = dataset.counts[None]
    technical = noise_replicates(dataset, settings.null)
    fit = fit_null(counts, dataset.design, settings.null, technical,
                   None if technical is None else technical.counts[None])
    values = compute_statistics(chosen, counts, dataset.design, fit, stream)[0]
    return {stat.name: float(value) for stat, value in zip(chosen, values)}


def tail_pvalue(observed: float, statistic: StatisticResult) -> float:
    """Normal-tail p-value of ``observed`` against a stored null distribution.

    The null is summarised by its mean and sd ("greater": upper tail) or its median and sd
    ("two-sided": both tails of the distance from the median). Unlike the bootstrap
    p-value it does not stop at 1 / (B + 1), so candidates whose removal leaves a
    statistic beyond every replicate are still told apart. NaN when undefined.
    """
    sd = statistic.null_sd
    if not (np.isfinite(observed) and np.isfinite(sd) and sd > 0):
        return np.nan
    if statistic.alternative == "greater":
        return float(0.5 * erfc((observed - statistic.null_mean) / sd / np.sqrt(2.0)))
    return float(erfc(abs(observed - statistic.null_median) / sd / np.sqrt(2.0)))


def remaining_evidence(observed: Mapping[str, float], result: NeutralityResult) -> float:
    """Harmonic mean of the p-values of ``observed`` against the full-data nulls.

    Only statistics that have a p-value in ``result`` count; NaN when none is defined.
    Larger means weaker evidence against neutrality. Used only to rank candidates.
    """
    pvalues = np.array([tail_pvalue(observed[name], stat)
                        for name, stat in result.statistics.items()
                        if name != COMBINED and np.isfinite(stat.pvalue) and name in observed])
    pvalues = pvalues[np.isfinite(pvalues)]
    if not pvalues.size:
        return np.nan
    with np.errstate(divide="ignore"):
        return float(1.0 / np.mean(1.0 / pvalues))


def analysable_candidates(dataset: Dataset, order: Sequence[int]) -> tuple[list[int], str]:
    """The candidates whose removal leaves an analysable dataset, and why none is if so."""
    kept, reason = [], ""
    for index in order:
        why = unanalysable_reason(without_sample(dataset, int(index)))
        if why:
            reason = reason or why
        else:
            kept.append(int(index))
    return kept, reason


def not_determined_note(reason: str) -> str:
    """The note of a rejected dataset none of whose samples can be left out."""
    return (f"{NOTE_PREFIX} not determined: without one sample the dataset is "
            f"{reason.removeprefix(NOT_ANALYSED)}")


def plan_influence(dataset: Dataset, result: NeutralityResult, settings: CalibrationSettings,
                   statistics: tuple[Statistic, ...] | None = None,
                   candidates: int = CANDIDATES) -> InfluencePlan | str:
    """Choose the most influential sample (stages 1 and 2) and plan the test without it.

    Returns the plan, or the note saying why no sample can be left out (the dataset
    without one would be too small to analyse).
    """
    scores = outlyingness(dataset, result.model)
    order, reason = analysable_candidates(dataset, most_outlying(scores, candidates))
    if not order:
        return not_determined_note(reason)
    evidence = np.array([remaining_evidence(
        observed_statistics(without_sample(dataset, index), settings, statistics), result)
        for index in order])
    chosen = order[int(np.argmax(np.where(np.isfinite(evidence), evidence, -np.inf)))]
    plan = plan_calibration(without_sample(dataset, chosen), settings, statistics)
    return InfluencePlan(chosen, dataset.samples[chosen], float(scores[chosen]), plan)


# ----------------------------------------------------------------------------- stage 3
def finish_influence(plan: InfluencePlan, result: NeutralityResult,
                     outputs: list[ChunkOutput]) -> SampleInfluence:
    """The record of ``plan`` from its replicate chunks, compared with the full ``result``."""
    without = assemble(plan.plan, outputs)
    pvalue = float(without.statistics[COMBINED].pvalue)
    pvalues = {name: float(stat.pvalue) for name, stat in without.statistics.items()
               if name != COMBINED}
    changes = rejected(pvalue, LEVEL) != result.rejected(LEVEL)
    return SampleInfluence(plan.sample, plan.index, plan.score, pvalue, pvalues, changes)


def wants_influence(result: NeutralityResult) -> bool:
    """Rejected at :data:`LEVEL` and neither an influence nor a note on why there is none."""
    return (result.rejected(LEVEL) and result.influence is None
            and not any(note.startswith(NOTE_PREFIX) for note in result.notes))


def sample_influence(dataset: Dataset, result: NeutralityResult, settings: CalibrationSettings,
                     *, jobs: int = 1, statistics: tuple[Statistic, ...] | None = None,
                     candidates: int = CANDIDATES) -> SampleInfluence | str:
    """The most influential sample of ``dataset`` and the combined p-value without it.

    Parameters
    ----------
    dataset, result:
        The data and their test (``result`` from the same ``settings`` and ``statistics``).
    settings:
        The calibration settings of ``result``, used unchanged for the test without the
        sample.
    jobs:
        Worker processes for its replicate chunks (results do not depend on it).
    candidates:
        How many of the most outlying samples are ranked.

    Returns
    -------
    SampleInfluence, or the note saying why no sample can be left out.
    """
    plan = plan_influence(dataset, result, settings, statistics, candidates)
    if isinstance(plan, str):
        return plan
    return finish_influence(plan, result, run_tasks(plan.plan.tasks, jobs))


def with_influence(result: NeutralityResult, dataset: Dataset, settings: CalibrationSettings,
                   *, jobs: int = 1, statistics: tuple[Statistic, ...] | None = None
                   ) -> NeutralityResult:
    """``result`` with its most influential sample if it is rejected at :data:`LEVEL`
    (or with a note saying why there is none); otherwise ``result`` itself."""
    if not wants_influence(result):
        return result
    found = sample_influence(dataset, result, settings, jobs=jobs, statistics=statistics)
    if isinstance(found, str):
        return replace(result, notes=tuple(result.notes) + (found,))
    return replace(result, influence=found)
