"""Screen many datasets at once: parallel, reproducible, resumable.

Every dataset is calibrated as in :mod:`driftscreen.calibrate` (parametric bootstrap with
re-fitting; Davison & Hinkley 1997, ch. 4). The screen

1. sets aside datasets that cannot be analysed (too few samples or taxa) with a note;
2. reuses every dataset already finished in the output folder's store
   (:class:`driftscreen.store.ResultStore`);
3. plans the others (observed fit and statistics), possibly in parallel;
4. runs the replicate chunks of all of them through ONE joblib ``Parallel`` generator and,
   as soon as a dataset's last chunk is back, assembles it and saves it atomically;
5. names the most influential sample of every dataset whose combined p-value is at most
   0.05 and tests it again without that sample (:mod:`driftscreen.influence`), again all
   chunks through one ``Parallel`` generator, saving each dataset with its influence;
6. adjusts the p-values of every statistic across datasets by Benjamini-Hochberg (1995).

Random streams are keyed by the master seed and the dataset's name
(:func:`driftscreen.seeds.dataset_stream`) and chunk sizes depend on the design only, so a
dataset's results do not depend on the number of jobs, the backend, or on which other
datasets are screened with it. Only its q-values do, by the nature of FDR control.
An exception while planning, simulating or assembling one dataset becomes that dataset's
note; the other datasets go on. Only analysed datasets are saved in the store, so a later
run tries failed ones again. A stored dataset that still lacks its influential sample (the
run stopped during step 5) gets it on the next run; one that has it is not redone.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any, TextIO

import numpy as np
from joblib import Parallel, delayed, parallel_config

from driftscreen import calibrate
from driftscreen.calibrate import (COMBINED, CalibrationPlan, CalibrationSettings, ChunkOutput,
                                   ChunkTask, assemble, plan_calibration, summarize_dataset)
from driftscreen.dataset import Dataset
from driftscreen.errors import InputError, mention
from driftscreen.fdr import qvalues_by_statistic
from driftscreen.influence import (LEVEL, NOTE_PREFIX, InfluencePlan, finish_influence,
                                   plan_influence, wants_influence)
from driftscreen.limits import unanalysable_reason
from driftscreen.progress import Progress
from driftscreen.results import DatasetSummary, NeutralityResult, SampleInfluence
from driftscreen.serialize import (result_from_dict, result_to_dict, summary_from_dict,
                                   summary_to_dict)
from driftscreen.statistics.registry import STATISTIC_NAMES, default_statistics
from driftscreen.store import ResultStore

BACKENDS = ("loky", "dask")
#: How long to wait for a Dask scheduler to answer.
SCHEDULER_TIMEOUT = "20s"


@dataclass(frozen=True)
class DatasetOutcome:
    """One dataset of a screen: its summary and result, or why it has none.

    Attributes
    ----------
    summary:
        The dataset's design and taxa (always known).
    result:
        The calibrated test; ``None`` when the dataset could not be analysed.
    note:
        Why there is no result (empty when there is one).
    """

    summary: DatasetSummary
    result: NeutralityResult | None
    note: str = ""

    @property
    def name(self) -> str:
        return self.summary.name

    @property
    def analysed(self) -> bool:
        return self.result is not None

    def statistic_names(self) -> tuple[str, ...]:
        """Statistics reported for this dataset (those its design allows, if not analysed)."""
        if self.result is not None:
            return tuple(self.result.statistics)
        allowed = default_statistics(time_series=self.summary.time_series, n_groupings=2)
        return tuple(s.name for s in allowed) + (COMBINED,)

    def pvalue(self, statistic: str) -> float:
        """The statistic's p-value, NaN if not analysed or not computed."""
        if self.result is None or statistic not in self.result.statistics:
            return np.nan
        return float(self.result.statistics[statistic].pvalue)


@dataclass(frozen=True)
class ScreenResult:
    """Outcome of :func:`screen`.

    Attributes
    ----------
    outcomes:
        One per dataset, in the order the datasets were given (intake sorts by name).
    qvalues:
        Benjamini-Hochberg q-values per statistic, aligned with ``outcomes`` (NaN where
        the dataset has no p-value for that statistic).
    settings:
        Replicates, groupings and seed.
    reused:
        Number of datasets taken from the store rather than computed.
    """

    outcomes: tuple[DatasetOutcome, ...]
    qvalues: dict[str, np.ndarray]
    settings: CalibrationSettings
    reused: int = 0

    def qvalue(self, index: int, statistic: str) -> float:
        values = self.qvalues.get(statistic)
        return np.nan if values is None else float(values[index])


@dataclass(frozen=True)
class Failure:
    """Why one dataset (or one of its chunks) failed; picklable."""

    message: str

    @classmethod
    def from_exception(cls, stage: str, error: BaseException) -> Failure:
        text = str(error).strip().splitlines()[0] if str(error).strip() else ""
        return cls(f"{stage} failed ({type(error).__name__}{': ' + text if text else ''})")


# ----------------------------------------------------------------------------- records
def outcome_to_dict(outcome: DatasetOutcome) -> dict[str, Any]:
    """A JSON-safe record of ``outcome`` (see :mod:`driftscreen.serialize`)."""
    return {"summary": summary_to_dict(outcome.summary),
            "result": None if outcome.result is None else result_to_dict(outcome.result),
            "note": outcome.note}


def outcome_from_dict(data: Mapping[str, Any]) -> DatasetOutcome:
    """Inverse of :func:`outcome_to_dict`."""
    result = data["result"]
    return DatasetOutcome(summary_from_dict(data["summary"]),
                          None if result is None else result_from_dict(result), data["note"])


def stored_outcome(store: ResultStore, name: str, data: Mapping[str, Any]) -> DatasetOutcome:
    """:func:`outcome_from_dict` of a record found in ``store``; one of another layout
    means the folder is not a store of this version."""
    try:
        return outcome_from_dict(data)
    except (KeyError, IndexError, TypeError, ValueError, AttributeError):
        raise store.not_a_store(f"the record of dataset '{name}' is of another layout") from None


# ----------------------------------------------------------------------------- analysability
def failed_outcome(dataset: Dataset, note: str) -> DatasetOutcome:
    return DatasetOutcome(summarize_dataset(dataset), None, note)


# ----------------------------------------------------------------------------- workers
def plan_safely(dataset: Dataset, settings: CalibrationSettings) -> CalibrationPlan | Failure:
    """:func:`plan_calibration`, with any exception turned into a :class:`Failure`."""
    try:
        return plan_calibration(dataset, settings)
    except Exception as error:  # noqa: BLE001 - one dataset's failure must not stop the screen
        return Failure.from_exception("analysing the observed data", error)


def run_chunk_safely(task: ChunkTask) -> ChunkOutput | Failure:
    """:func:`driftscreen.calibrate.run_chunk`, with any exception turned into a Failure."""
    try:
        return calibrate.run_chunk(task)
    except Exception as error:  # noqa: BLE001 - one dataset's failure must not stop the screen
        return Failure.from_exception("computing the neutral replicates", error)


def assemble_safely(plan: CalibrationPlan, outputs: list[ChunkOutput | Failure]
                    ) -> DatasetOutcome:
    """The dataset's outcome from its chunk outputs (a failed chunk fails the dataset)."""
    failures = [out for out in outputs if isinstance(out, Failure)]
    if failures:
        return failed_outcome(plan.dataset, failures[0].message)
    try:
        result = assemble(plan, [out for out in outputs if isinstance(out, ChunkOutput)])
    except Exception as error:  # noqa: BLE001 - one dataset's failure must not stop the screen
        return failed_outcome(plan.dataset, Failure.from_exception("calibration", error).message)
    return DatasetOutcome(result.dataset, result)


# ----------------------------------------------------------------------------- progress


def chunk_work(task: ChunkTask) -> float:
    """Relative cost of a chunk: replicates x samples x taxa."""
    return float(task.n_replicates * task.design.n_samples * task.model.n_taxa)


# ----------------------------------------------------------------------------- the screen
def screen(datasets: Sequence[Dataset], settings: CalibrationSettings, *, jobs: int = 1,
           store: ResultStore | None = None, messages: TextIO | None = None,
           influence: bool = True) -> ScreenResult:
    """Calibrate every dataset, reusing finished ones, and adjust p-values for FDR.

    Parameters
    ----------
    datasets:
        Datasets with distinct names (as from ``read_datasets(..., min_samples=1,
        min_taxa=1)``); unanalysable ones get a note instead of a result.
    settings:
        Replicates B, groupings R and master seed.
    jobs:
        ``n_jobs`` of the joblib ``Parallel`` calls; the active joblib backend is used
        (see :func:`execution_backend`). Results do not depend on it.
    store:
        Where finished datasets are saved and found again; ``None`` keeps nothing.
    messages:
        Stream for the reuse notice and progress lines; ``None`` is silent.
    influence:
        Name the most influential sample of every dataset whose combined p-value (before
        FDR adjustment) is at most 0.05, with its p-values without that sample
        (:mod:`driftscreen.influence`).

    Returns
    -------
    ScreenResult
        Outcomes in the order of ``datasets`` and Benjamini-Hochberg q-values.
    """
    names = [d.name for d in datasets]
    if len(set(names)) != len(names):
        raise ValueError("dataset names must be distinct")
    outcomes: dict[str, DatasetOutcome] = {}
    for dataset in datasets:
        reason = unanalysable_reason(dataset)
        if reason:
            outcomes[dataset.name] = failed_outcome(dataset, reason)
    finished = store.finished() if store is not None else {}
    reused = [name for name in names if name in finished and name not in outcomes]
    for name in reused:
        outcomes[name] = stored_outcome(store, name, finished[name])
    pending = [d for d in datasets if d.name not in outcomes]
    progress = Progress(len(datasets), messages)
    if reused:
        noun = "dataset" if len(reused) == 1 else "datasets"
        progress.write(f"reusing {len(reused)} finished {noun} from {store.out}")
    progress.counted(len(outcomes))
    outcomes.update(calibrate_pending(pending, settings, jobs, store, progress))
    if influence:
        outcomes.update(influence_pending(datasets, outcomes, settings, jobs, store, messages))
    ordered = tuple(outcomes[name] for name in names)
    not_analysed = sum(not o.analysed for o in ordered)
    if not_analysed:
        progress.write(f"{not_analysed} of {len(ordered)} datasets could not be analysed; "
                       "the reasons are in the notes of the outputs")
    return ScreenResult(ordered, screen_qvalues(ordered), settings, len(reused))


def calibrate_pending(datasets: Sequence[Dataset], settings: CalibrationSettings, jobs: int,
                      store: ResultStore | None, progress: Progress
                      ) -> dict[str, DatasetOutcome]:
    """Plan, then run all replicate chunks in one Parallel generator; save as they finish."""
    if not datasets:
        return {}
    outcomes: dict[str, DatasetOutcome] = {}
    planned = Parallel(n_jobs=jobs)(delayed(plan_safely)(d, settings) for d in datasets)
    plans: list[CalibrationPlan] = []
    for dataset, plan in zip(datasets, planned, strict=True):
        if isinstance(plan, Failure):
            outcomes[dataset.name] = keep(failed_outcome(dataset, plan.message), store)
            progress.dataset_finished()
        else:
            plans.append(plan)
    progress.planned(len(datasets), sum(len(plan.tasks) for plan in plans), plans_work(plans))
    for index, outputs in finished_plans(plans, jobs, progress):
        plan = plans[index]
        outcomes[plan.dataset.name] = keep(assemble_safely(plan, outputs), store)
        progress.dataset_finished()
    return outcomes


def plans_work(plans: Sequence[CalibrationPlan]) -> float:
    """Relative cost of the replicate chunks of ``plans``."""
    return sum(chunk_work(task) for plan in plans for task in plan.tasks)


def finished_plans(plans: Sequence[CalibrationPlan], jobs: int, progress: Progress
                   ) -> Iterator[tuple[int, list[ChunkOutput | Failure]]]:
    """Run every chunk of ``plans`` through one Parallel generator; yield (plan index, its
    outputs in chunk order) as soon as a plan's last chunk is back."""
    work = [(index, task) for index, plan in enumerate(plans) for task in plan.tasks]
    remaining = [len(plan.tasks) for plan in plans]
    collected: list[list[ChunkOutput | Failure]] = [[] for _ in plans]
    results = Parallel(n_jobs=jobs, return_as="generator")(
        delayed(run_chunk_safely)(task) for _, task in work)
    for (index, task), output in zip(work, results, strict=True):
        collected[index].append(output)
        remaining[index] -= 1
        progress.chunk_finished(chunk_work(task))
        if remaining[index] == 0:
            yield index, collected[index]
            collected[index] = []


# ----------------------------------------------------------------------------- influence
def plan_influence_safely(dataset: Dataset, result: NeutralityResult,
                          settings: CalibrationSettings) -> InfluencePlan | str | Failure:
    """:func:`driftscreen.influence.plan_influence`, with any exception made a Failure."""
    try:
        return plan_influence(dataset, result, settings)
    except Exception as error:  # noqa: BLE001 - one dataset's failure must not stop the screen
        return Failure.from_exception("ranking the samples", error)


def finish_influence_safely(plan: InfluencePlan, result: NeutralityResult,
                            outputs: list[ChunkOutput | Failure]) -> SampleInfluence | Failure:
    """:func:`driftscreen.influence.finish_influence`; a failed chunk or exception is a
    Failure."""
    failures = [out for out in outputs if isinstance(out, Failure)]
    if failures:
        return failures[0]
    try:
        return finish_influence(plan, result,
                                [out for out in outputs if isinstance(out, ChunkOutput)])
    except Exception as error:  # noqa: BLE001 - one dataset's failure must not stop the screen
        return Failure.from_exception("calibration without the sample", error)


def outcome_with_influence(outcome: DatasetOutcome, found: SampleInfluence | str | Failure,
                   store: ResultStore | None) -> DatasetOutcome:
    """``outcome`` with its influential sample, or with the note on why it has none.

    Influences and notes that no sample can be left out are saved with the record; a
    failure is not, so that a later run tries again (as for failed datasets).
    """
    result = outcome.result
    if isinstance(found, Failure):
        note = f"{NOTE_PREFIX} not determined ({found.message})"
        return replace(outcome, result=replace(result, notes=tuple(result.notes) + (note,)))
    if isinstance(found, str):
        return keep(replace(outcome, result=replace(result, notes=tuple(result.notes)
                                                    + (found,))), store)
    return keep(replace(outcome, result=replace(result, influence=found)), store)


def influence_pending(datasets: Sequence[Dataset], outcomes: Mapping[str, DatasetOutcome],
                      settings: CalibrationSettings, jobs: int, store: ResultStore | None,
                      messages: TextIO | None) -> dict[str, DatasetOutcome]:
    """The most influential sample of every analysed dataset with combined p <= 0.05 that
    lacks one: rank in parallel, then run all tests without the chosen samples through one
    Parallel generator, saving each dataset again as soon as its test is done."""
    pending = [(dataset, outcomes[dataset.name]) for dataset in datasets
               if outcomes[dataset.name].result is not None
               and wants_influence(outcomes[dataset.name].result)]
    if not pending:
        return {}
    progress = Progress(len(pending), messages, noun="tests without the most influential sample")
    noun = "dataset" if len(pending) == 1 else "datasets"
    progress.write(f"{len(pending)} {noun} with combined p <= {LEVEL:g}: finding the sample "
                   "each rests on most")
    planned = Parallel(n_jobs=jobs)(delayed(plan_influence_safely)(dataset, outcome.result,
                                                                   settings)
                                    for dataset, outcome in pending)
    updated: dict[str, DatasetOutcome] = {}
    chosen: list[tuple[DatasetOutcome, InfluencePlan]] = []
    for (_, outcome), plan in zip(pending, planned, strict=True):
        if isinstance(plan, InfluencePlan):
            chosen.append((outcome, plan))
        else:
            updated[outcome.name] = outcome_with_influence(outcome, plan, store)
            progress.dataset_finished()
    plans = [plan.plan for _, plan in chosen]
    progress.planned(len(plans), sum(len(plan.tasks) for plan in plans), plans_work(plans),
                     stage="ranked the samples of")
    for index, outputs in finished_plans(plans, jobs, progress):
        outcome, plan = chosen[index]
        found = finish_influence_safely(plan, outcome.result, outputs)
        updated[outcome.name] = outcome_with_influence(outcome, found, store)
        progress.dataset_finished()
    return updated


def keep(outcome: DatasetOutcome, store: ResultStore | None) -> DatasetOutcome:
    """Save an analysed ``outcome`` and return it as read back from its record.

    Fresh and reused datasets thus go through the same JSON round trip, so the outputs of
    a resumed run equal those of an uninterrupted one byte for byte. Failed datasets are
    not saved: a later run tries them again.
    """
    record = outcome_to_dict(outcome)
    if store is not None and outcome.analysed:
        store.save(outcome.name, record)
    return outcome_from_dict(record)


def screen_qvalues(outcomes: Sequence[DatasetOutcome]) -> dict[str, np.ndarray]:
    """Benjamini-Hochberg q-values per statistic (registry order, then any others)."""
    names = list(STATISTIC_NAMES)
    for outcome in outcomes:
        names += [n for n in outcome.statistic_names() if n not in names]
    return qvalues_by_statistic({name: [o.pvalue(name) for o in outcomes] for name in names})


# ----------------------------------------------------------------------------- backends
def check_backend(backend: str, scheduler: str | None = None) -> None:
    """Refuse backend options that cannot work, before any work is done.

    Raises
    ------
    InputError
        Unknown backend, a scheduler without the Dask backend, or Dask not installed.
    """
    if backend not in BACKENDS:
        raise InputError(f"unknown backend '{backend}'", parameter="backend",
                         fix="use " + " or ".join(BACKENDS))
    if backend != "dask" and scheduler is not None:
        raise InputError("a scheduler address needs the Dask backend",
                         parameter="scheduler", fix=f"add {mention('backend')} dask")
    if backend == "dask":
        try:
            import distributed  # noqa: F401
        except ImportError:
            raise InputError("the Dask backend needs the packages dask and distributed",
                             parameter="backend",
                             fix="pip install 'driftscreen[dask]', or use "
                                 f"{mention('backend')} loky") from None


@contextlib.contextmanager
def execution_backend(backend: str, scheduler: str | None = None, jobs: int = 1
                      ) -> Iterator[int]:
    """Make ``backend`` joblib's active backend; yields the ``n_jobs`` to use with it.

    ``"loky"``: ``jobs`` worker processes on this machine. ``"dask"``: joblib's Dask
    backend on the cluster whose scheduler is at ``scheduler``
    (``distributed.Client(scheduler)``), or on a local cluster of ``jobs`` single-threaded
    worker processes started here; ``n_jobs`` is then -1 (every worker of the cluster).

    Raises
    ------
    InputError
        As :func:`check_backend`, or a scheduler that cannot be reached.
    """
    check_backend(backend, scheduler)
    if backend == "loky":
        with parallel_config(backend="loky"):
            yield jobs
        return
    with dask_client(scheduler, jobs), parallel_config(backend="dask"):
        yield -1


@contextlib.contextmanager
def dask_client(scheduler: str | None, jobs: int) -> Iterator[Any]:
    """A ``distributed.Client`` on ``scheduler``, or on a local cluster of ``jobs`` workers."""
    from distributed import Client, LocalCluster

    if scheduler is None:
        with LocalCluster(n_workers=jobs, threads_per_worker=1, processes=True,
                          host="127.0.0.1", dashboard_address=None) as cluster, \
                Client(cluster) as client:
            yield client
        return
    try:
        client = Client(scheduler, timeout=SCHEDULER_TIMEOUT)
    except (OSError, TimeoutError, ValueError) as error:
        raise InputError(f"cannot reach the Dask scheduler at '{scheduler}' ({error})",
                         parameter="scheduler",
                         fix="check the address and that the scheduler is running") from None
    with client:
        yield client
