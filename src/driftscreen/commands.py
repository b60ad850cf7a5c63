"""One function per subcommand, taking plain values: what the CLI calls, usable from Python."""

from __future__ import annotations

import inspect
import os
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, TextIO

from driftscreen import seeds
from driftscreen.dataset import Dataset
from driftscreen.errors import InputError
from driftscreen.files import (atomic_write_text, check_output_file, check_output_folder,
                               same_place)
from driftscreen.limits import (MAX_SPAN_DAYS, MAX_SPAN_YEARS, MIN_TAXA, THETA, check_analysable,
                               minimum_samples)
from driftscreen.neutral.model import NeutralModel, NullOptions
from driftscreen.neutral.simulate import simulate
from driftscreen.synthetic import DesignSpec, as_dataset, metacommunity
from driftscreen.taxon_scan import VERSION as TAXON_SCAN_VERSION

if TYPE_CHECKING:
    from driftscreen.power import PowerDesign
    from driftscreen.results import NeutralityResult
    from driftscreen.screen import ScreenResult
    from driftscreen.store import ResultStore

COUNTS_FILE = "counts.tsv"
METADATA_FILE = "metadata.tsv"
RESULTS_FILE = "results.tsv"
PARAMETERS_FILE = "parameters.tsv"
RESULTS_JSON_FILE = "results.json"
REPORT_FILE = "report.txt"
TAXA_FILE = "taxa.tsv"
TAXA_ACROSS_FILE = "taxa_across.tsv"
#: The files a screen writes into its output folder.
SCREEN_FILES = (RESULTS_FILE, PARAMETERS_FILE, RESULTS_JSON_FILE, REPORT_FILE, TAXA_FILE,
                TAXA_ACROSS_FILE)


#: Fingerprint entry of a screen run without the most influential samples.
INFLUENCE_OFF = "off"
SIMULATION_MODELS = ("neutral", "logistic", "lotka-volterra")
TRUTH_FILE = "truth.tsv"


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


def niche_model(model: str, n_taxa: int, strength: float | None):
    """The niche model ``model`` of :mod:`driftscreen.niche` with its default parameters and,
    if given, ``strength``; an out-of-range strength is an input error."""
    from driftscreen.niche import NoisyLotkaVolterra, StochasticLogistic

    niche_class = StochasticLogistic if model == "logistic" else NoisyLotkaVolterra
    try:
        return niche_class(n_taxa) if strength is None else niche_class(n_taxa, strength=strength)
    except ValueError as error:
        raise InputError(str(error), place="option --strength",
                         fix="logistic strengths (sigma) lie in [0, 2); Lotka-Volterra "
                             "strengths are >= 0") from None


def neutral_collection(n_datasets: int, spec: DesignSpec, n_taxa: int, theta: float,
                       rate: float, seed: int, prefix: str = "community") -> list[Dataset]:
    """``n_datasets`` independent neutral datasets, each from its own seeded stream."""
    width = len(str(n_datasets))
    return [simulated_dataset(f"{prefix}_{index + 1:0{width}d}", spec, n_taxa, seed,
                              theta=theta, rate=rate)[0] for index in range(n_datasets)]


def write_collection(datasets: Sequence[Dataset], out: Path) -> tuple[Path, Path]:
    """Write datasets as one counts table and one metadata table in ``out``."""
    from driftscreen.intake import write_tables

    out.mkdir(parents=True, exist_ok=True)
    counts_path, metadata_path = out / COUNTS_FILE, out / METADATA_FILE
    write_tables(datasets, counts_path, metadata_path)
    return counts_path, metadata_path


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
    rows = [row for _, truth in made for row in truth]
    columns = list(rows[0])
    text = "\t".join(columns) + "\n" + "".join(
        "\t".join(row[c] for c in columns) + "\n" for row in rows)
    return counts_path, metadata_path, atomic_write_text(out / TRUTH_FILE, text)


def check_design_span(n_samples: int, interval: float | None) -> None:
    """A synthetic time series spans at most :data:`driftscreen.limits.MAX_SPAN_DAYS`, the
    longest span intake accepts."""
    if interval is not None and interval * (n_samples - 1) > MAX_SPAN_DAYS:
        raise InputError(f"{n_samples} samples every {interval:g} days span "
                         f"{interval * (n_samples - 1) / 365.25:.0f} years, more than a "
                         f"sampling campaign of {MAX_SPAN_YEARS} years",
                         file="option --interval", fix="give fewer samples or a shorter interval")


def choose_dataset(datasets: Sequence[Dataset], name: str | None, source: str) -> Dataset:
    """The one dataset `driftscreen test` works on."""
    if name is None:
        if len(datasets) == 1:
            return datasets[0]
        listed = ", ".join(d.name for d in datasets[:3]) + (", ..." if len(datasets) > 3 else "")
        raise InputError(f"the table holds {len(datasets)} datasets ({listed})",
                         file=source, fix="choose one with --dataset NAME, or use "
                                          "`driftscreen screen` to test them all")
    for dataset in datasets:
        if dataset.name == name:
            return dataset
    raise InputError(f"no dataset named '{name}'", file=source, place="option --dataset",
                     fix="use one of: " + ", ".join(d.name for d in datasets[:10]))


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
    its design could have detected (:func:`driftscreen.power.detectable_line`). With
    ``figures``, the figures of :func:`driftscreen.report.figures.write_figures` go into
    that folder (matplotlib is checked for before any work).
    """
    from driftscreen.calibrate import COMBINED, CalibrationSettings, neutrality_test
    from driftscreen.influence import wants_influence, with_influence
    from driftscreen.power import detectable_line, with_detectable_line
    from driftscreen.reanalysis import depth_sensitivity_line
    from driftscreen.report.figures import require_matplotlib, write_figures
    from driftscreen.report.text import verdict_word

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
    result = neutrality_test(dataset, replicates=replicates, groupings=groupings, seed=seed,
                             jobs=jobs, noise=null.noise, start=null.start)
    if influence and wants_influence(result):
        if messages is not None:
            print("driftscreen: rejected; finding the sample the rejection rests on most and "
                  "testing again without it", file=messages, flush=True)
        result = with_influence(result, dataset, settings, jobs=jobs)
    if detectable and verdict_word(result.statistics[COMBINED].pvalue) == "not rejected":
        if messages is not None:
            print("driftscreen: not rejected; a quick power run estimates what this design "
                  "can detect", file=messages, flush=True)
        result = with_detectable_line(result, detectable_line(dataset, settings, jobs=jobs))
    if dataset.from_relative:
        if messages is not None:
            print("driftscreen: converted from relative abundances; testing again at a tenfold "
                  "lower depth", file=messages, flush=True)
        result = replace(result, notes=tuple(result.notes)
                         + (depth_sensitivity_line(dataset, result, settings),))
    report = result.summary()
    if output:
        atomic_write_text(output, report)
    if taxa:
        from driftscreen.report.tables import result_taxa_tsv

        atomic_write_text(taxa, result_taxa_tsv(result))
    if figures is not None:
        written = write_figures(result, figures)
        if messages is not None:
            print(f"driftscreen: {len(written)} figures written to {figures}", file=messages,
                  flush=True)
    return report



def intake_defaults() -> dict[str, Any]:
    """Default intake options of :func:`driftscreen.intake.read_datasets` (size limits aside).

    Filling them in makes the settings fingerprint the same whether an option was given
    at its default value or left out.
    """
    from driftscreen.intake import read_datasets

    return {name: parameter.default
            for name, parameter in inspect.signature(read_datasets).parameters.items()
            if parameter.kind is inspect.Parameter.KEYWORD_ONLY
            and name not in ("min_samples", "min_taxa")}


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
        could have detected (see :func:`add_detectable_lines`); part of the fingerprint.
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
    from driftscreen.calibrate import CalibrationSettings
    from driftscreen.intake import read_datasets
    from driftscreen.report.tables import (parameters_tsv, results_json, results_tsv,
                                           taxa_across_tsv, taxa_tsv)
    from driftscreen.report.text import screen_report
    from driftscreen.screen import check_backend, execution_backend, screen, screen_statistics
    from driftscreen.power import detectable_settings
    from driftscreen.report.figures import require_matplotlib
    from driftscreen.store import ResultStore, settings_fingerprint

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
    inputs = {"counts": counts, "metadata": metadata, "taxon_map": intake.get("taxon_map")}
    fingerprint = settings_fingerprint(
        inputs={role: path for role, path in inputs.items() if path is not None},
        intake={k: v for k, v in intake.items() if k != "taxon_map"},
        replicates=replicates, groupings=groupings, seed=seed,
        statistics=screen_statistics(groupings))
    if detectable:
        fingerprint["detectable"] = detectable_settings()
    if not influence:
        fingerprint["influence"] = INFLUENCE_OFF
    fingerprint["null"] = {"read_noise": null.noise, "start": null.start}
    fingerprint["taxon_scan"] = TAXON_SCAN_VERSION
    store = ResultStore.open(out, fingerprint)
    with execution_backend(backend, scheduler, jobs) as n_jobs:
        run = screen(datasets, settings, jobs=n_jobs, store=store, messages=messages,
                     influence=influence)
        run = add_depth_sensitivity(run, datasets, store, messages)
        if detectable:
            run = add_detectable_lines(run, datasets, n_jobs, store, messages)
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
    return paths + ([] if figures is None else screen_figures(run, figures))


def screen_figures(run: ScreenResult, folder: Path) -> list[Path]:
    """The figures of every analysed dataset of a screen, drawn from its stored result."""
    from driftscreen.report.figures import write_figures

    return [path for outcome in run.outcomes if outcome.result is not None
            for path in write_figures(outcome.result, folder)]


def add_detectable_lines(run: ScreenResult, datasets: Sequence[Dataset], jobs: int,
                         store: ResultStore | None, messages: TextIO | None = None
                         ) -> ScreenResult:
    """Add the detectable line to every analysed dataset the screen does not reject.

    "Not rejected" is the screen's verdict: combined q-value above 0.05. Each line comes
    from a quick power run seeded by the master seed and the dataset's name, so it is
    the same on every run.
    """
    from driftscreen.calibrate import COMBINED
    from driftscreen.power import DETECTABLE_PREFIX, detectable_line
    from driftscreen.report.text import verdict_word

    return add_notes(
        run, datasets, store, messages, DETECTABLE_PREFIX, "what the design can detect",
        wanted=lambda index: verdict_word(run.qvalue(index, COMBINED)) == "not rejected",
        line_for=lambda dataset, _: detectable_line(dataset, run.settings, jobs=jobs))


def add_depth_sensitivity(run: ScreenResult, datasets: Sequence[Dataset],
                          store: ResultStore | None, messages: TextIO | None = None
                          ) -> ScreenResult:
    """Add to every dataset converted from relative abundances how its p-values move
    when the stated depth is ten times lower (:mod:`driftscreen.reanalysis`)."""
    from driftscreen.reanalysis import DEPTH_SENSITIVITY_PREFIX, depth_sensitivity_line

    relative = {dataset.name for dataset in datasets if dataset.from_relative}
    return add_notes(
        run, datasets, store, messages, DEPTH_SENSITIVITY_PREFIX, "depth sensitivity",
        wanted=lambda index: run.outcomes[index].name in relative,
        line_for=lambda dataset, result: depth_sensitivity_line(dataset, result, run.settings))


def add_notes(run: ScreenResult, datasets: Sequence[Dataset], store: ResultStore | None,
              messages: TextIO | None, prefix: str, label: str, *,
              wanted: Callable[[int], bool],
              line_for: Callable[[Dataset, NeutralityResult], str]) -> ScreenResult:
    """Append a computed line to the notes of the analysed datasets that want one.

    Datasets reused from the store that already carry a line starting with ``prefix``
    keep it, and each updated record is saved again, so a resumed screen computes only
    the lines still missing and its outputs equal those of an uninterrupted run.
    """
    from driftscreen.screen import keep

    by_name = {dataset.name: dataset for dataset in datasets}
    outcomes = list(run.outcomes)
    pending = [index for index, outcome in enumerate(outcomes)
               if outcome.result is not None
               and not any(note.startswith(prefix) for note in outcome.result.notes)
               and wanted(index)]
    for count, index in enumerate(pending, 1):
        outcome = outcomes[index]
        if messages is not None:
            print(f"driftscreen: {label}, {count}/{len(pending)}: dataset '{outcome.name}'",
                  file=messages, flush=True)
        line = line_for(by_name[outcome.name], outcome.result)
        result = replace(outcome.result, notes=tuple(outcome.result.notes) + (line,))
        outcomes[index] = keep(replace(outcome, result=result), store)
    return replace(run, outcomes=tuple(outcomes))


def power_design(dataset: Dataset | None, *, n_taxa: int | None, n_samples: int | None,
                 interval: float | None, irregular: bool, snapshot: bool,
                 depth: float | None, depth_spread: float | None) -> PowerDesign:
    """The design of `driftscreen power`: a dataset's, or one from the design options.

    Raises
    ------
    InputError
        Both or neither given, an incomplete or contradictory set of design options, or
        a design too small to analyse.
    """
    from driftscreen.power import PowerDesign

    given = {"--taxa": n_taxa, "--samples": n_samples, "--interval": interval,
             "--irregular": irregular or None, "--snapshot": snapshot or None,
             "--depth-spread": depth_spread}
    named = [option for option, value in given.items() if value is not None]
    if dataset is not None:
        if named:
            raise InputError("design options cannot be combined with a counts table",
                             file=f"option {named[0]}",
                             fix="give either COUNTS (and intake options) or the design "
                                 "options --taxa, --samples, --interval, --depth")
        check_analysable(dataset, fix="choose another dataset with --dataset")
        return PowerDesign.from_dataset(dataset)
    missing = [option for option, value in (("--taxa", n_taxa), ("--samples", n_samples),
                                            ("--depth", depth)) if value is None]
    if interval is None and not snapshot:
        missing.append("--interval (or --snapshot)")
    if missing:
        raise InputError("no design given: missing " + ", ".join(missing),
                         file="command power",
                         fix="give a counts table (COUNTS --metadata FILE ...) or all of "
                             "--taxa K --samples T --interval D --depth N")
    if snapshot and (interval is not None or irregular):
        option = "--interval" if interval is not None else "--irregular"
        raise InputError("a snapshot design has no sampling times", file=f"option {option}",
                         fix="drop it, or drop --snapshot")
    minimum = minimum_samples(time_series=not snapshot)
    if n_samples < minimum:
        raise InputError(f"{n_samples} samples are too few to analyse",
                         file="option --samples", fix=f"give at least {minimum}")
    if n_taxa < MIN_TAXA:
        raise InputError(f"{n_taxa} taxa are too few to analyse", file="option --taxa",
                         fix=f"give at least {MIN_TAXA}")
    check_design_span(n_samples, None if snapshot else interval)
    return PowerDesign.from_numbers(n_taxa=n_taxa, n_samples=n_samples,
                                    interval=None if snapshot else interval,
                                    irregular=irregular, depth=max(int(round(depth)), 1),
                                    depth_spread=depth_spread or 0.0)


def check_power_outputs(output: str | None, table: str | None, inputs: Sequence[str]) -> None:
    """`power --output` and `--table` are writable files, neither an input nor each other."""
    if output:
        check_output_file(output, "--output", inputs)
    if table:
        check_output_file(table, "--table", inputs)
    check_distinct_outputs({"--output": output, "--table": table})


def check_distinct_outputs(places: Mapping[str, str | os.PathLike | None]) -> None:
    """No two output places of one command (by option) are the same place."""
    given = [(option, path) for option, path in places.items() if path]
    for index, (option, path) in enumerate(given):
        for earlier, other in given[:index]:
            if same_place(path, other):
                raise InputError(f"is also given as {earlier}", file=str(path),
                                 place=f"option {option}",
                                 fix=f"give {option} a place of its own")


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
    from driftscreen.power import NicheAlternative, parse_strengths, power_curve

    check_power_outputs(output, table, inputs)
    if not 0.0 < alpha < 1.0:
        raise InputError(f"alpha {alpha:g} is not between 0 and 1", file="option --alpha",
                         fix="give a level such as 0.05")
    if noise is not None and alternative != "lotka-volterra":
        raise InputError("--noise is a setting of the lotka-volterra alternative",
                         file="option --noise",
                         fix="drop it, or add --alternative lotka-volterra")
    if noise is not None and not 0.0 <= noise < 2.0:
        raise InputError(f"noise {noise:g} is not in [0, 2)", file="option --noise",
                         fix="give a value such as 0.01")
    niche = NicheAlternative(alternative, timescale=timescale, noise=noise or 0.0)
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
