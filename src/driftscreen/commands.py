"""One function per subcommand, taking plain values: what the CLI calls, usable from Python."""

from __future__ import annotations

import time
from collections.abc import Mapping, Sequence
from datetime import datetime
from pathlib import Path
from typing import Any, TextIO

from driftscreen import calibrate
from driftscreen.calibrate import CalibrationSettings
from driftscreen.dataset import Dataset
from driftscreen.files import (atomic_write_text, check_distinct_outputs, check_output_file,
                               check_output_folder)
from driftscreen.influence import wants_influence, with_influence
from driftscreen.intake import intake_defaults, read_datasets
from driftscreen.limits import THETA
from driftscreen.neutral.model import NullOptions
from driftscreen.notes import note_steps, with_notes, with_screen_notes
from driftscreen.power import PowerDesign, niche_alternative, parse_strengths, power_curve
from driftscreen.report.figures import require_matplotlib, write_figures
from driftscreen.report.tables import (parameters_tsv, result_taxa_tsv, results_json,
                                       results_tsv, taxa_across_tsv, taxa_tsv)
from driftscreen.report.text import screen_report
from driftscreen.screen import check_backend, execution_backend, screen
from driftscreen.store import ResultStore, screen_fingerprint
from driftscreen.synthetic import (COUNTS_FILE, METADATA_FILE, TRUTH_FILE, DesignSpec,
                                   check_design_span, simulated_dataset, truth_tsv,
                                   write_collection)

RESULTS_FILE = "results.tsv"
PARAMETERS_FILE = "parameters.tsv"
RESULTS_JSON_FILE = "results.json"
REPORT_FILE = "report.txt"
TAXA_FILE = "taxa.tsv"
TAXA_ACROSS_FILE = "taxa_across.tsv"
#: The files a screen writes into its output folder.
SCREEN_FILES = (RESULTS_FILE, PARAMETERS_FILE, RESULTS_JSON_FILE, REPORT_FILE, TAXA_FILE,
                TAXA_ACROSS_FILE)


def simulate_command(out: Path, *, n_taxa: int, n_samples: int, interval: float | None,
                     irregular: bool, depth: int, depth_spread: float, theta: float,
                     rate: float, n_datasets: int, seed: int, model: str = "neutral",
                     strength: float | None = None) -> tuple[Path, Path, Path]:
    """`driftscreen simulate`: write datasets that intake reads back, and their truth."""
    check_output_folder(out, "--out", writes=(COUNTS_FILE, METADATA_FILE, TRUTH_FILE))
    THETA.check("theta", theta)
    check_design_span(n_samples, interval)
    spec = DesignSpec(n_samples=n_samples, interval=interval, irregular=irregular,
                      depth=depth, depth_spread=depth_spread)
    width = len(str(n_datasets))
    made = [simulated_dataset(f"community_{index + 1:0{width}d}", spec, n_taxa, seed,
                              model=model, theta=theta, rate=rate, strength=strength)
            for index in range(n_datasets)]
    counts_path, metadata_path = write_collection([dataset for dataset, _ in made], out)
    truth = truth_tsv([row for _, rows in made for row in rows])
    return counts_path, metadata_path, atomic_write_text(out / TRUTH_FILE, truth)


def test_command(dataset: Dataset, *, replicates: int, groupings: int, seed: int, jobs: int,
                 output: str | None = None, detectable: bool = False,
                 messages: TextIO | None = None, figures: str | None = None,
                 influence: bool = True, null: NullOptions = NullOptions(),
                 taxa: str | None = None) -> str:
    """`driftscreen test`: the report text (also written to ``output`` if given).

    With ``taxa``, the per-taxon scan (:mod:`driftscreen.taxon_scan`) is written to that
    file as a TSV table with the columns of the screen's ``taxa.tsv``.

    ``null`` says how the neutral null treats the reads' technical noise and the first
    sample of a time series (:class:`driftscreen.neutral.model.NullOptions`).

    With ``influence``, a dataset whose combined p-value is at most 0.05 gets its most
    influential sample and its p-values without it (:mod:`driftscreen.influence`). With
    ``detectable``, a dataset whose combined test does not reject gets a note on what
    its design could have detected (:mod:`driftscreen.notes`). With
    ``figures``, the figures of :func:`driftscreen.report.figures.write_figures` go into
    that folder (matplotlib is checked for before any work).
    """
    if output:
        check_output_file(output, "--output", dataset.source)
    if taxa:
        check_output_file(taxa, "--taxa", dataset.source)
    if figures is not None:
        check_output_folder(figures, "--figures", dataset.source)
        require_matplotlib()
    check_distinct_outputs({"--output": output, "--taxa": taxa, "--figures": figures})
    settings = CalibrationSettings(replicates=replicates, groupings=groupings, seed=seed,
                                   null=null)
    calibrate.check_test_input(dataset, jobs)
    result = calibrate.run_calibration(dataset, settings, jobs=jobs)
    if influence and wants_influence(result):
        if messages is not None:
            print("driftscreen: rejected; finding the sample the rejection rests on most and "
                  "testing again without it", file=messages, flush=True)
        result = with_influence(result, dataset, settings, jobs=jobs)
    result = with_notes(dataset, result, note_steps(settings, jobs=jobs, detectable=detectable),
                        messages)
    report = result.summary()
    if output:
        atomic_write_text(output, report)
    if taxa:
        atomic_write_text(taxa, result_taxa_tsv(result))
    if figures is not None:
        written = write_figures(result, figures)
        if messages is not None:
            print(f"driftscreen: {len(written)} figures written to {figures}", file=messages,
                  flush=True)
    return report


def screen_command(counts: str, metadata: str | None = None, *, out: Path,
                   intake: Mapping[str, Any], replicates: int, groupings: int, seed: int,
                   jobs: int = 1, backend: str = "loky", scheduler: str | None = None,
                   messages: TextIO | None = None, detectable: bool = False,
                   figures: Path | None = None, influence: bool = True,
                   null: NullOptions = NullOptions()) -> list[Path]:
    """`driftscreen screen`: test every dataset of a table, resumably; write the outputs.

    Parameters
    ----------
    counts, metadata:
        Input tables, read with :func:`driftscreen.intake.read_datasets`.
    out:
        Output folder; it also holds the resume store (``out/.driftscreen``).
    intake:
        The other keyword options of ``read_datasets`` (``taxon_map`` is an input file).
    replicates, groupings, seed:
        Calibration settings (see :func:`driftscreen.calibrate.neutrality_test`).
    jobs, backend, scheduler:
        Parallel execution (see :func:`driftscreen.screen.execution_backend`); results do
        not depend on them.
    messages:
        Stream for the reuse notice and progress; ``None`` is silent.
    detectable:
        Add to every dataset that the screen does not reject a note on what its design
        could have detected (see :mod:`driftscreen.notes`); part of the fingerprint.
    figures:
        Folder for the figures of every analysed dataset
        (:func:`driftscreen.report.figures.write_figures`); ``None`` draws none.
    influence:
        Name the most influential sample of every dataset whose combined p-value is at
        most 0.05 (see :func:`driftscreen.screen.screen`); turning it off is part of the
        fingerprint.
    null:
        Technical noise and start of the neutral null
        (:class:`driftscreen.neutral.model.NullOptions`); part of the fingerprint.

    Returns
    -------
    list of Path
        ``results.tsv``, ``parameters.tsv``, ``results.json``, ``report.txt``,
        ``taxa.tsv`` and ``taxa_across.tsv`` in ``out``, then the figures.
    """
    started = time.monotonic()
    sources = [path for path in (counts, metadata, intake.get("taxon_map")) if path is not None]
    check_output_folder(out, "--out", sources, writes=SCREEN_FILES)
    check_backend(backend, scheduler)
    if figures is not None:
        check_output_folder(figures, "--figures", sources)
        require_matplotlib()
    settings = CalibrationSettings(replicates=replicates, groupings=groupings, seed=seed,
                                   null=null)
    intake = {**intake_defaults(), **intake}
    datasets = read_datasets(counts, metadata, **intake, min_samples=1, min_taxa=1)
    fingerprint = screen_fingerprint(
        inputs={"counts": counts, "metadata": metadata, "taxon_map": intake.get("taxon_map")},
        intake=intake, settings=settings, detectable=detectable, influence=influence)
    store = ResultStore.open(out, fingerprint)
    with execution_backend(backend, scheduler, jobs) as n_jobs:
        run = screen(datasets, settings, jobs=n_jobs, store=store, messages=messages,
                     influence=influence)
        steps = note_steps(settings, jobs=n_jobs, detectable=detectable)
        run = with_screen_notes(run, datasets, steps, store, messages)
    date = datetime.now().astimezone().strftime("%Y-%m-%d %H:%M:%S %Z")
    texts = {
        RESULTS_FILE: results_tsv(run),
        PARAMETERS_FILE: parameters_tsv(run),
        RESULTS_JSON_FILE: results_json(run, fingerprint),
        REPORT_FILE: screen_report(run, fingerprint, run_seconds=time.monotonic() - started,
                                   date=date),
        TAXA_FILE: taxa_tsv(run),
        TAXA_ACROSS_FILE: taxa_across_tsv(run),
    }
    paths = [atomic_write_text(Path(out) / name, text) for name, text in texts.items()]
    if figures is not None:
        paths += [path for outcome in run.outcomes if outcome.result is not None
                  for path in write_figures(outcome.result, figures)]
    return paths


def power_command(design: PowerDesign, *, alternative: str = "logistic",
                  strengths: str | None = None, n_datasets: int = 50, replicates: int = 199,
                  groupings: int = 200, seed: int = 0, jobs: int = 1, alpha: float = 0.05,
                  timescale: float = 1.0, noise: float | None = None,
                  output: str | None = None, table: str | None = None,
                  messages: TextIO | None = None, inputs: Sequence[str] = ()) -> str:
    """`driftscreen power`: the power report (also written to ``output``; the TSV table
    of :meth:`driftscreen.power.PowerResult.to_tsv` to ``table``).

    ``strengths`` is the comma-separated grid as typed (default: the alternative's grid);
    ``noise`` is the environmental noise of the lotka-volterra alternative (default 0);
    ``inputs`` are the files the design was read from (never overwritten).
    """
    if output:
        check_output_file(output, "--output", inputs)
    if table:
        check_output_file(table, "--table", inputs)
    check_distinct_outputs({"--output": output, "--table": table})
    niche = niche_alternative(alternative, timescale=timescale, noise=noise)
    grid = None if strengths is None else parse_strengths(strengths, niche)
    result = power_curve(design, niche, grid, n_datasets=n_datasets, replicates=replicates,
                         groupings=groupings, seed=seed, jobs=jobs, alpha=alpha,
                         messages=messages)
    report = result.summary()
    if output:
        atomic_write_text(output, report)
    if table:
        atomic_write_text(table, result.to_tsv())
    return report
