"""One function per subcommand, taking plain values: what the CLI calls, usable from Python."""

from __future__ import annotations

import inspect
import time
from collections.abc import Mapping, Sequence
from datetime import datetime
from pathlib import Path
from typing import Any, TextIO

from driftscreen import seeds
from driftscreen.dataset import Dataset
from driftscreen.errors import InputError
from driftscreen.files import atomic_write_text
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.synthetic import DesignSpec, as_dataset, metacommunity

COUNTS_FILE = "counts.tsv"
METADATA_FILE = "metadata.tsv"
RESULTS_FILE = "results.tsv"
PARAMETERS_FILE = "parameters.tsv"
RESULTS_JSON_FILE = "results.json"
REPORT_FILE = "report.txt"


def neutral_collection(n_datasets: int, spec: DesignSpec, n_taxa: int, theta: float,
                       rate: float, seed: int, prefix: str = "community") -> list[Dataset]:
    """``n_datasets`` independent neutral datasets, each from its own seeded stream."""
    width = len(str(n_datasets))
    datasets = []
    for index in range(n_datasets):
        name = f"{prefix}_{index + 1:0{width}d}"
        rng = seeds.generator(seeds.dataset_stream(seed, name))
        design = spec.draw(rng)
        model = NeutralModel(metacommunity(n_taxa, rng), theta,
                             rate if design.is_time_series else None)
        counts = simulate(model, design, 1, rng)[0]
        note = (f"simulated neutral community: theta {theta:g}"
                + (f", rate {rate:g} per day" if design.is_time_series else "")
                + f", seed {seed}")
        datasets.append(as_dataset(name, counts, design, (note,)))
    return datasets


def write_collection(datasets: Sequence[Dataset], out: Path) -> tuple[Path, Path]:
    """Write datasets as one counts table and one metadata table in ``out``."""
    from driftscreen.intake import write_tables

    out.mkdir(parents=True, exist_ok=True)
    counts_path, metadata_path = out / COUNTS_FILE, out / METADATA_FILE
    write_tables(datasets, counts_path, metadata_path)
    return counts_path, metadata_path


def simulate_command(out: Path, *, n_taxa: int, n_samples: int, interval: float | None,
                     irregular: bool, depth: int, depth_spread: float, theta: float,
                     rate: float, n_datasets: int, seed: int) -> tuple[Path, Path]:
    """`driftscreen simulate`: write neutral datasets that intake reads back."""
    spec = DesignSpec(n_samples=n_samples, interval=interval, irregular=irregular,
                      depth=depth, depth_spread=depth_spread)
    return write_collection(neutral_collection(n_datasets, spec, n_taxa, theta, rate, seed), out)


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
                 output: str | None = None) -> str:
    """`driftscreen test`: the report text (also written to ``output`` if given)."""
    from driftscreen.calibrate import neutrality_test

    result = neutrality_test(dataset, replicates=replicates, groupings=groupings, seed=seed,
                             jobs=jobs)
    report = result.summary()
    if output:
        atomic_write_text(output, report)
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
                   messages: TextIO | None = None) -> list[Path]:
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

    Returns
    -------
    list of Path
        ``results.tsv``, ``parameters.tsv``, ``results.json`` and ``report.txt`` in ``out``.
    """
    from driftscreen.calibrate import CalibrationSettings
    from driftscreen.intake import read_datasets
    from driftscreen.report.tables import parameters_tsv, results_json, results_tsv
    from driftscreen.report.text import screen_report
    from driftscreen.screen import check_backend, execution_backend, screen, screen_statistics
    from driftscreen.store import ResultStore, settings_fingerprint

    started = time.monotonic()
    check_backend(backend, scheduler)
    settings = CalibrationSettings(replicates=replicates, groupings=groupings, seed=seed)
    intake = {**intake_defaults(), **intake}
    datasets = read_datasets(counts, metadata, **intake, min_samples=1, min_taxa=1)
    inputs = {"counts": counts, "metadata": metadata, "taxon_map": intake.get("taxon_map")}
    fingerprint = settings_fingerprint(
        inputs={role: path for role, path in inputs.items() if path is not None},
        intake={k: v for k, v in intake.items() if k != "taxon_map"},
        replicates=replicates, groupings=groupings, seed=seed,
        statistics=screen_statistics(groupings))
    store = ResultStore.open(out, fingerprint)
    with execution_backend(backend, scheduler, jobs) as n_jobs:
        run = screen(datasets, settings, jobs=n_jobs, store=store, messages=messages)
    date = datetime.now().astimezone().strftime("%Y-%m-%d %H:%M:%S %Z")
    texts = {
        RESULTS_FILE: results_tsv(run),
        PARAMETERS_FILE: parameters_tsv(run),
        RESULTS_JSON_FILE: results_json(run, fingerprint),
        REPORT_FILE: screen_report(run, fingerprint, run_seconds=time.monotonic() - started,
                                   date=date),
    }
    return [atomic_write_text(Path(out) / name, text) for name, text in texts.items()]
