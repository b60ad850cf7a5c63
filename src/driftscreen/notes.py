"""The notes added to a calibrated dataset after its test, shared by `test` and `screen`.

Each :class:`NoteStep` appends one line to the notes of the analysed datasets that want
it: what the design could have detected (:func:`driftscreen.power.detectable_line`, for
datasets whose neutrality is not rejected) and how the p-values move at a tenfold lower
depth (:func:`driftscreen.reanalysis.depth_sensitivity_line`, for datasets converted from
relative abundances). The rule for "not rejected" is one: the combined q-value across the
datasets tested together is above :data:`driftscreen.results.ALPHA`; a single test is a
screen of one dataset, whose q-value is its p-value. A dataset whose notes already hold a step's line (a record
reused from the store) keeps it, so a resumed screen computes only the lines still missing.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from typing import TextIO

from driftscreen import power
from driftscreen.calibrate import CalibrationSettings
from driftscreen.dataset import Dataset
from driftscreen.reanalysis import DEPTH_SENSITIVITY_PREFIX, depth_sensitivity_line
from driftscreen.results import ALPHA, NeutralityResult
from driftscreen.screen import ScreenResult, keep
from driftscreen.statistics.registry import COMBINED
from driftscreen.store import ResultStore

@dataclass(frozen=True)
class NoteStep:
    """One line to add to the notes of the analysed datasets that want it.

    Attributes
    ----------
    prefix:
        How every line of this step starts (recognises a result that has one).
    label:
        What is computed, for the progress lines of a screen.
    announcement:
        What is computed, for the one progress line of a single test.
    wanted:
        Whether a dataset, its result and its combined q-value want the line.
    line:
        The line for a dataset and its result.
    """

    prefix: str
    label: str
    announcement: str
    wanted: Callable[[Dataset, NeutralityResult, float], bool]
    line: Callable[[Dataset, NeutralityResult], str]

    def has_line(self, result: NeutralityResult) -> bool:
        return any(note.startswith(self.prefix) for note in result.notes)


def not_rejected(qvalue: float) -> bool:
    """The one rule: a combined q-value above :data:`~driftscreen.results.ALPHA` (a missing
    one is not tested)."""
    return qvalue is not None and math.isfinite(qvalue) and qvalue > ALPHA


def note_steps(settings: CalibrationSettings, *, jobs: int, detectable: bool
               ) -> tuple[NoteStep, ...]:
    """The steps of a run, in the order their lines appear: what the design could have
    detected (with ``detectable``), then the depth sensitivity."""
    steps = []
    if detectable:
        steps.append(NoteStep(
            power.DETECTABLE_PREFIX, "what the design can detect",
            "not rejected; a quick power run estimates what this design can detect",
            wanted=lambda dataset, result, qvalue: not_rejected(qvalue),
            line=lambda dataset, result: power.detectable_line(dataset, settings, jobs=jobs)))
    steps.append(NoteStep(
        DEPTH_SENSITIVITY_PREFIX, "depth sensitivity",
        "converted from relative abundances; testing again at a tenfold lower depth",
        wanted=lambda dataset, result, qvalue: dataset.from_relative,
        line=lambda dataset, result: depth_sensitivity_line(dataset, result, settings,
                                                            jobs=jobs)))
    return tuple(steps)


def with_note(result: NeutralityResult, line: str) -> NeutralityResult:
    """``result`` with ``line`` appended to its notes (printed under "Notes")."""
    return replace(result, notes=tuple(result.notes) + (line,))


def with_notes(dataset: Dataset, result: NeutralityResult, steps: Sequence[NoteStep],
               messages: TextIO | None = None) -> NeutralityResult:
    """``result`` of a single test with the line of every step that wants one."""
    for step in steps:
        if step.has_line(result) or not step.wanted(dataset, result, result.pvalue):
            continue
        if messages is not None:
            print(f"driftscreen: {step.announcement}", file=messages, flush=True)
        result = with_note(result, step.line(dataset, result))
    return result


def with_screen_notes(run: ScreenResult, datasets: Sequence[Dataset],
                      steps: Sequence[NoteStep], store: ResultStore | None,
                      messages: TextIO | None = None) -> ScreenResult:
    """``run`` with the line of every step added to the analysed datasets that want one;
    each updated record is saved again."""
    for step in steps:
        run = with_step(run, datasets, step, store, messages)
    return run


def with_step(run: ScreenResult, datasets: Sequence[Dataset], step: NoteStep,
              store: ResultStore | None, messages: TextIO | None) -> ScreenResult:
    """``run`` with the line of ``step`` on every analysed dataset that wants one."""
    by_name = {dataset.name: dataset for dataset in datasets}
    outcomes = list(run.outcomes)
    pending = [index for index, outcome in enumerate(outcomes)
               if outcome.result is not None and not step.has_line(outcome.result)
               and step.wanted(by_name[outcome.name], outcome.result,
                               run.qvalue(index, COMBINED))]
    for count, index in enumerate(pending, 1):
        outcome = outcomes[index]
        if messages is not None:
            print(f"driftscreen: {step.label}, {count}/{len(pending)}: dataset "
                  f"'{outcome.name}'", file=messages, flush=True)
        result = with_note(outcome.result, step.line(by_name[outcome.name], outcome.result))
        outcomes[index] = keep(replace(outcome, result=result), store)
    return replace(run, outcomes=tuple(outcomes))
