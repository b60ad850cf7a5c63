"""The `driftscreen` command line: argument parsing and exit codes only.

Every subcommand calls the library; nothing here computes. Problems in user input
(:class:`driftscreen.errors.InputError`) are printed as one line on stderr with exit
status 2; results go to stdout or to files, progress and notes to stderr.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from driftscreen import __version__
from driftscreen.errors import InputError

EXIT_INPUT = 2


def positive_int(text: str) -> int:
    value = int(text)
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be a positive integer, got {text}")
    return value


def positive_float(text: str) -> float:
    value = float(text)
    if not value > 0:
        raise argparse.ArgumentTypeError(f"must be a positive number, got {text}")
    return value


def nonnegative_float(text: str) -> float:
    value = float(text)
    if not value >= 0:
        raise argparse.ArgumentTypeError(f"must be zero or positive, got {text}")
    return value


def column_list(text: str) -> list[str]:
    return [c.strip() for c in text.split(",") if c.strip()]


def add_input_options(parser: argparse.ArgumentParser) -> None:
    """Options that describe how to read the counts table and its metadata."""
    parser.add_argument("counts", help="abundance table (CSV/TSV, wide or long; .gz allowed)")
    group = parser.add_argument_group("input")
    group.add_argument("--metadata", metavar="FILE", help="sample metadata table (CSV/TSV)")
    group.add_argument("--sample-id", metavar="COL",
                       help="metadata column holding sample ids (default: the first column)")
    group.add_argument("--dataset-by", metavar="COL[,COL...]", type=column_list, default=[],
                       help="metadata column(s) whose values define datasets")
    group.add_argument("--time-by", metavar="COL",
                       help="metadata column with sampling times (days or ISO dates); "
                            "without it every dataset is a snapshot design")
    group.add_argument("--depth-by", metavar="COL",
                       help="metadata column with each sample's sequencing depth (reads)")
    group.add_argument("--depth", metavar="READS", type=positive_float,
                       help="one sequencing depth for every sample (relative-abundance tables)")
    group.add_argument("--abundance", choices=["auto", "counts", "fraction", "percent"],
                       default="auto", help="what the table holds (default: detect)")
    group.add_argument("--remainder", choices=["auto", "pool", "renormalise"], default="auto",
                       help="relative rows summing below 1: pool the rest as taxon 'other' "
                            "(default) or renormalise")
    group.add_argument("--layout", choices=["auto", "wide", "long"], default="auto",
                       help="wide (taxa x samples) or long (sample, taxon, count) table")
    group.add_argument("--orientation", choices=["auto", "taxa-rows", "taxa-columns"],
                       default="auto", help="for wide tables: are taxa rows or columns")
    group.add_argument("--lineage", metavar="COL",
                       help="table column with lineage strings, for --rank")
    group.add_argument("--rank", metavar="RANK",
                       help="aggregate taxa to this rank (e.g. genus) using --lineage "
                            "or --taxon-map")
    group.add_argument("--taxon-map", metavar="FILE",
                       help="two-column file mapping taxon to group, to aggregate taxa")


def intake_options(args: argparse.Namespace) -> dict:
    """The keyword options of ``read_datasets`` given by :func:`add_input_options`."""
    return dict(layout=args.layout, orientation=args.orientation, sample_id=args.sample_id,
                dataset_by=args.dataset_by, time_by=args.time_by, depth_by=args.depth_by,
                depth=args.depth, abundance=args.abundance, remainder=args.remainder,
                lineage=args.lineage, rank=args.rank, taxon_map=args.taxon_map)


def read_input(args: argparse.Namespace) -> list:
    from driftscreen.intake import read_datasets

    return read_datasets(args.counts, args.metadata, **intake_options(args))


def add_calibration_options(parser: argparse.ArgumentParser, replicates: int = 999) -> None:
    group = parser.add_argument_group("calibration")
    group.add_argument("--replicates", metavar="B", type=positive_int, default=replicates,
                       help=f"neutral bootstrap replicates (default {replicates}); "
                            "p-values resolve down to 1/(B+1)")
    group.add_argument("--groupings", metavar="R", type=positive_int, default=200,
                       help="random groupings of taxa for regrouping_invariance (default 200)")
    group.add_argument("--seed", metavar="S", type=int, default=0,
                       help="master random seed (default 0)")
    group.add_argument("--jobs", metavar="J", type=positive_int, default=1,
                       help="worker processes (results do not depend on it; default 1)")


# ----------------------------------------------------------------------------- simulate
def add_simulate(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("simulate", help="write a neutral community dataset (counts + metadata)",
                       description="Simulate neutral communities (drift plus immigration, "
                                   "sequenced at a given depth) and write a counts table and a "
                                   "metadata table that `driftscreen test` and `screen` read.")
    p.add_argument("--out", metavar="DIR", required=True,
                   help="folder for counts.tsv and metadata.tsv (created if needed)")
    p.add_argument("--taxa", type=positive_int, default=40, help="number of taxa (default 40)")
    p.add_argument("--samples", type=positive_int, default=100,
                   help="samples per dataset (default 100)")
    p.add_argument("--interval", type=positive_float, default=1.0,
                   help="mean days between samples (default 1)")
    p.add_argument("--irregular", action="store_true",
                   help="irregular sampling: gamma-distributed gaps with that mean")
    p.add_argument("--snapshot", action="store_true",
                   help="independent replicate communities, no time axis")
    p.add_argument("--depth", type=positive_int, default=10_000,
                   help="median reads per sample (default 10000)")
    p.add_argument("--depth-spread", type=nonnegative_float, default=0.0,
                   help="standard deviation of log depth across samples (default 0)")
    p.add_argument("--theta", type=positive_float, default=50.0,
                   help="immigration parameter theta (default 50)")
    p.add_argument("--rate", type=positive_float, default=0.2,
                   help="relaxation rate per day: correlations decay as exp(-rate*lag) "
                        "(default 0.2)")
    p.add_argument("--datasets", type=positive_int, default=1,
                   help="number of datasets written into the one table (default 1)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.set_defaults(handler=run_simulate)


def run_simulate(args: argparse.Namespace) -> int:
    from driftscreen.commands import simulate_command

    counts_path, metadata_path = simulate_command(
        out=Path(args.out), n_taxa=args.taxa, n_samples=args.samples,
        interval=None if args.snapshot else args.interval, irregular=args.irregular,
        depth=args.depth, depth_spread=args.depth_spread, theta=args.theta, rate=args.rate,
        n_datasets=args.datasets, seed=args.seed)
    print(counts_path)
    print(metadata_path)
    return 0


# ----------------------------------------------------------------------------- test
def add_test(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("test", help="test one dataset against the neutral model",
                       description="Fit the neutral null to one dataset, calibrate every "
                                   "statistic by parametric bootstrap and print the report.")
    add_input_options(p)
    p.add_argument("--dataset", metavar="NAME",
                   help="which dataset to test when the table holds several")
    add_calibration_options(p)
    p.add_argument("--output", metavar="FILE", help="also write the report to FILE")
    p.set_defaults(handler=run_test)


def run_test(args: argparse.Namespace) -> int:
    from driftscreen.commands import choose_dataset, test_command

    dataset = choose_dataset(read_input(args), args.dataset, args.counts)
    report = test_command(dataset, replicates=args.replicates, groupings=args.groupings,
                          seed=args.seed, jobs=args.jobs, output=args.output)
    sys.stdout.write(report)
    return 0


# ----------------------------------------------------------------------------- screen
def add_screen(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("screen", help="test every dataset of a table, in parallel and resumably",
                       description="Test every dataset of a table against the neutral model "
                                   "(one dataset per combination of the --dataset-by columns), "
                                   "adjust the p-values for the false discovery rate across "
                                   "datasets, and write results.tsv, parameters.tsv, "
                                   "results.json and report.txt into the output folder. "
                                   "Finished datasets are kept in the folder: running the same "
                                   "command again after an interruption goes on where it "
                                   "stopped.")
    add_input_options(p)
    add_calibration_options(p)
    p.add_argument("--out", metavar="DIR", required=True,
                   help="output folder (created if needed); also holds the resume store")
    p.add_argument("--backend", choices=["loky", "dask"], default="loky",
                   help="parallel backend: worker processes on this machine (loky, default) "
                        "or a Dask cluster (needs driftscreen[dask])")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="address of a running Dask scheduler (with --backend dask; without "
                        "it a local cluster of --jobs workers is started)")
    p.add_argument("--quiet", action="store_true", help="no progress messages on stderr")
    p.set_defaults(handler=run_screen)


def run_screen(args: argparse.Namespace) -> int:
    from driftscreen.commands import screen_command

    try:
        paths = screen_command(
            args.counts, args.metadata, out=Path(args.out), intake=intake_options(args),
            replicates=args.replicates, groupings=args.groupings, seed=args.seed,
            jobs=args.jobs, backend=args.backend, scheduler=args.scheduler,
            messages=None if args.quiet else sys.stderr)
    except KeyboardInterrupt:
        print(f"driftscreen: interrupted; finished datasets are kept in {args.out}: run the "
              "same command again to go on", file=sys.stderr)
        return 130
    for path in paths:
        print(path)
    return 0


# ----------------------------------------------------------------------------- demo
def add_demo(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help="run the whole job on a built-in example",
                       description="Simulate the built-in bioreactor scenario, test it and "
                                   "write everything into a folder.")
    p.add_argument("--out", metavar="DIR", default="driftscreen-demo",
                   help="folder for the demo's inputs and outputs (default driftscreen-demo)")
    p.add_argument("--replicates", metavar="B", type=positive_int, default=199,
                   help="neutral bootstrap replicates (default 199 for a quick demo)")
    p.add_argument("--jobs", metavar="J", type=positive_int, default=1,
                   help="worker processes (default 1)")
    p.set_defaults(handler=run_demo)


def run_demo(args: argparse.Namespace) -> int:
    from driftscreen.demo import run_demo as demo

    sys.stdout.write(demo(Path(args.out), replicates=args.replicates, jobs=args.jobs,
                          messages=sys.stderr))
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="driftscreen",
        description="Are a microbial community's ups and downs neutral drift plus immigration, "
                    "or niche structure? Fit the neutral null, calibrate neutrality statistics "
                    "by parametric bootstrap, report p-values and effect sizes.")
    parser.add_argument("--version", action="version", version=f"driftscreen {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    add_demo(sub)
    add_test(sub)
    add_screen(sub)
    add_simulate(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.handler(args)
    except InputError as error:
        print(f"driftscreen: error: {error.one_line()}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print("driftscreen: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
