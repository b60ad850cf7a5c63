"""One function per subcommand, taking plain values: what the CLI calls, usable from Python."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from driftscreen import seeds
from driftscreen.dataset import Dataset
from driftscreen.errors import InputError
from driftscreen.files import atomic_write_text
from driftscreen.neutral.model import NeutralModel
from driftscreen.neutral.simulate import simulate
from driftscreen.synthetic import DesignSpec, as_dataset, metacommunity

COUNTS_FILE = "counts.tsv"
METADATA_FILE = "metadata.tsv"


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
