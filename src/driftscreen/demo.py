"""The built-in demo: six bioreactors, three drifting neutrally and three with niche structure.

An invented scenario, generated deterministically by the package. Six laboratory
bioreactors are seeded from one inoculum of 40 taxa and sampled every 2 days for four
months (60 samples each, about 8000 reads per sample, depth varying from sample to
sample). ``reactor_A``-``reactor_C`` run on a steady feed: their communities follow the
neutral model (drift plus immigration from the inoculum; Hubbell 2001), simulated exactly
by :func:`driftscreen.neutral.simulate.simulate`. ``reactor_D``-``reactor_F`` get a pulsed
feed to which every taxon's growth responds in its own way: each taxon follows the
stochastic logistic model with environmental noise (Grilli 2020, Nat. Commun. 11:4743;
:class:`driftscreen.niche.StochasticLogistic`), with the inoculum's composition as
carrying capacities, which gives clear niche structure.

:func:`run_demo` writes the tables, screens them with
:func:`driftscreen.commands.screen_command` and returns a short text for the terminal.
"""

from __future__ import annotations

import csv
import shlex
import textwrap
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

import numpy as np
import pandas as pd

from driftscreen import seeds
from driftscreen.commands import (PARAMETERS_FILE, REPORT_FILE, RESULTS_FILE, RESULTS_JSON_FILE,
                                  screen_command)
from driftscreen.dataset import Dataset, Design
from driftscreen.files import atomic_write_text, check_output_folder
from driftscreen.intake.writer import counts_frame
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.niche import StochasticLogistic, sequence_counts
from driftscreen.report.format import ALPHA, WIDTH, qvalue_text, verdict_word
from driftscreen.statistics.registry import COMBINED
from driftscreen.synthetic import COUNTS_FILE, METADATA_FILE, DesignSpec, metacommunity

STEADY, PULSED = "steady", "pulsed"
#: Reactor names and their feed, in output order.
REACTORS: tuple[tuple[str, str], ...] = (
    ("reactor_A", STEADY), ("reactor_B", STEADY), ("reactor_C", STEADY),
    ("reactor_D", PULSED), ("reactor_E", PULSED), ("reactor_F", PULSED),
)
#: Master seed of the scenario (the data) and of the screen (the bootstrap).
SCENARIO_SEED = 2024
SCREEN_SEED = 1
N_TAXA = 40
N_SAMPLES = 60
INTERVAL_DAYS = 2
DEPTH = 8000
DEPTH_SPREAD = 0.25
#: Neutral reactors: immigration parameter and relaxation rate per day.
THETA = 100.0
RATE = 0.1
#: Pulsed reactors: environmental-noise strength sigma and logistic timescale in days.
NICHE_STRENGTH = 0.4
NICHE_TIMESCALE = 5.0
GROUPINGS = 200
INPUT_FOLDER, RESULTS_FOLDER = "input", "results"
#: Stream purpose of the shared inoculum (the reactors use streams keyed by their names).
INOCULUM = "inoculum"


@dataclass(frozen=True)
class DemoInputs:
    """Where the demo's counts and metadata tables were written."""

    counts: Path
    metadata: Path


def inoculum(seed: int = SCENARIO_SEED) -> np.ndarray:
    """Composition of the shared inoculum: log-normal abundances over ``N_TAXA`` taxa."""
    return metacommunity(N_TAXA, seeds.generator(seeds.dataset_stream(seed, INOCULUM)))


def reactor_counts(feed: str, p: np.ndarray, design: Design,
                   rng: np.random.Generator) -> np.ndarray:
    """Read counts ``(T, K)`` of one reactor: neutral (steady) or stochastic logistic (pulsed)."""
    if feed == STEADY:
        return simulate(NeutralModel(p, THETA, RATE), design, 1, rng)[0]
    model = StochasticLogistic(n_taxa=p.size, strength=NICHE_STRENGTH, timescale=NICHE_TIMESCALE)
    capacities = p[None, :]
    start = model.stationary_log(capacities, 1, rng)[:, 0]
    log_abundance = model.integrate_log(start, capacities, design.times, rng)
    return sequence_counts(log_abundance, design.depths, rng)[0]


def reactor_dataset(name: str, feed: str, p: np.ndarray, seed: int) -> Dataset:
    """One reactor's time series: design and counts from the stream keyed by its name.

    Taxa without reads in this reactor are left out, as intake does.
    """
    rng = seeds.generator(seeds.dataset_stream(seed, name))
    spec = DesignSpec(n_samples=N_SAMPLES, interval=INTERVAL_DAYS, depth=DEPTH,
                      depth_spread=DEPTH_SPREAD)
    design = spec.draw(rng)
    counts = reactor_counts(feed, p, design, rng)
    present = counts.sum(axis=0) > 0
    width = len(str(N_TAXA))
    taxa = tuple(f"taxon_{i + 1:0{width}d}" for i in np.flatnonzero(present))
    samples = tuple(f"{name}_day{int(day):03d}" for day in design.times)
    return Dataset(name=name, counts=counts[:, present], taxa=taxa, samples=samples,
                   design=Design(depths=counts.sum(axis=1), times=design.times),
                   dropped_taxa=int(np.count_nonzero(~present)))


def demo_datasets(seed: int = SCENARIO_SEED) -> tuple[Dataset, ...]:
    """The six reactors of the scenario, the same for the same ``seed``."""
    p = inoculum(seed)
    return tuple(reactor_dataset(name, feed, p, seed) for name, feed in REACTORS)


def metadata_frame(datasets: tuple[Dataset, ...]) -> pd.DataFrame:
    """One row per sample: ``sample``, ``reactor``, ``day`` (whole days), ``feed``."""
    feeds = dict(REACTORS)
    return pd.DataFrame({
        "sample": [s for d in datasets for s in d.samples],
        "reactor": [d.name for d in datasets for _ in d.samples],
        "day": [int(t) for d in datasets for t in d.design.times],
        "feed": [feeds[d.name] for d in datasets for _ in d.samples],
    })


def write_inputs(folder: Path, seed: int = SCENARIO_SEED) -> DemoInputs:
    """Write ``counts.tsv`` (taxa x samples) and ``metadata.tsv`` into ``folder``.

    Read back with ``--dataset-by reactor --time-by day`` they give the same datasets.
    """
    datasets = demo_datasets(seed)
    samples = [s for d in datasets for s in d.samples]
    counts_path, metadata_path = folder / COUNTS_FILE, folder / METADATA_FILE
    atomic_write_text(counts_path, counts_frame(datasets, samples).to_csv(
        sep="\t", index_label="taxon", lineterminator="\n"))
    atomic_write_text(metadata_path, metadata_frame(datasets).to_csv(
        sep="\t", index=False, lineterminator="\n"))
    return DemoInputs(counts_path, metadata_path)


def screen_command_line(inputs: DemoInputs, results: Path, replicates: int, jobs: int) -> str:
    """The `driftscreen screen` command that does what the demo does after writing inputs."""
    words = ["driftscreen", "screen", str(inputs.counts), "--metadata", str(inputs.metadata),
             "--dataset-by", "reactor", "--time-by", "day", "--replicates", str(replicates),
             "--groupings", str(GROUPINGS), "--seed", str(SCREEN_SEED), "--jobs", str(jobs),
             "--out", str(results)]
    return " ".join(shlex.quote(word) for word in words)


def combined_qvalues(results_tsv: Path) -> dict[str, float]:
    """Combined q-value per dataset from a screen's ``results.tsv`` (NaN if empty)."""
    with results_tsv.open(encoding="utf-8", newline="") as stream:
        rows = csv.DictReader(stream, delimiter="\t")
        return {row["dataset"]: float(row["q_value"]) if row["q_value"] else np.nan
                for row in rows if row["statistic"] == COMBINED}


def summary_lines(qvalues: dict[str, float]) -> list[str]:
    """A header and one line per reactor: name, feed, combined q-value, verdict."""
    lines = [f"{'reactor':<10}  {'feed':<6}  {'combined q':>10}  verdict"]
    for name, feed in REACTORS:
        q = qvalues.get(name, np.nan)
        lines.append(f"{name:<10}  {feed:<6}  {qvalue_text(q):>10}  "
                     f"neutrality {verdict_word(q)}")
    return lines


def scenario_text() -> str:
    """The scenario in a few sentences, with its parameters."""
    return (f"Six laboratory bioreactors seeded from one inoculum of {N_TAXA} taxa, sampled "
            f"every {INTERVAL_DAYS} days for four months ({N_SAMPLES} samples each, about "
            f"{DEPTH} reads per sample). reactor_A-C run on a steady feed and drift "
            f"neutrally (theta {THETA:g}, rate {RATE:g} per day); reactor_D-F get a pulsed "
            "feed that favours different taxa at different times (stochastic logistic "
            f"niche model, noise strength {NICHE_STRENGTH:g}). Invented data, simulated by "
            f"driftscreen (seed {SCENARIO_SEED}).")


def run_demo(out: Path, replicates: int = 199, jobs: int = 1,
             messages: TextIO | None = None) -> str:
    """Write the demo's inputs into ``out/input``, screen them into ``out/results``.

    Running it again into the same folder rewrites identical inputs, and the screen reuses
    the finished results (its resume store), so nothing is recomputed.

    Parameters
    ----------
    out:
        Demo folder (created if needed).
    replicates:
        Neutral bootstrap replicates B per reactor.
    jobs:
        Worker processes (results do not depend on it).
    messages:
        Stream for the screen's progress lines; ``None`` is silent.

    Returns
    -------
    str
        What the scenario is, the equivalent `driftscreen screen` command, where the
        outputs are, and one line per reactor with its combined q-value and verdict.
    """
    out = Path(out)
    check_output_folder(out, "--out")
    inputs = write_inputs(out / INPUT_FOLDER)
    results = out / RESULTS_FOLDER
    screen_command(str(inputs.counts), str(inputs.metadata), out=results,
                   intake={"dataset_by": ["reactor"], "time_by": "day"},
                   replicates=replicates, groupings=GROUPINGS, seed=SCREEN_SEED, jobs=jobs,
                   messages=messages)
    command = screen_command_line(inputs, results, replicates, jobs)
    return demo_text(inputs, results, command, combined_qvalues(results / RESULTS_FILE))


def demo_text(inputs: DemoInputs, results: Path, command: str,
              qvalues: dict[str, float]) -> str:
    """The demo's message: scenario, inputs, equivalent command, outputs, summary."""
    def paragraph(text: str) -> list[str]:
        return textwrap.wrap(text, WIDTH) + [""]

    lines = ["driftscreen demo: neutral drift or niche structure in six bioreactors", ""]
    lines += paragraph(scenario_text())
    lines += ["Inputs:   " + str(inputs.counts), "          " + str(inputs.metadata), ""]
    lines += ["The same screen from the command line:", "  " + command, ""]
    lines += paragraph(f"Results in {results}: {REPORT_FILE} (start here), {RESULTS_FILE} "
                       f"(every statistic), {PARAMETERS_FILE} (fitted theta and rate), "
                       f"{RESULTS_JSON_FILE}.")
    lines += summary_lines(qvalues) + [""]
    lines += paragraph("Verdict: neutrality is rejected where the combined q-value "
                       "(Benjamini-Hochberg across the six reactors) is at most "
                       f"{ALPHA:g}.")
    return "\n".join(lines).rstrip("\n") + "\n"
