"""The `driftscreen` command line: argument parsing and exit codes only.

Every subcommand calls the library; nothing here computes. Problems in user input
(:class:`driftscreen.errors.InputError`) are printed as one line on stderr with exit
status 2; results go to stdout or to files, progress and notes to stderr.
"""

from __future__ import annotations

import argparse
import math
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from driftscreen.commands import power_command, screen_command, simulate_command, test_command
from driftscreen.dataset import Dataset
from driftscreen.demo import run_demo as demo
from driftscreen.errors import InputError
from driftscreen.intake import intake_defaults, read_datasets
from driftscreen.intake.reader import CHOICES as INTAKE_CHOICES
from driftscreen.limits import (DEPTH_SPREAD, GROUPINGS, INTERVAL, JOBS, MAX_READS,
                               MAX_READS_TEXT, READ_PRECISION, READS, REPLICATES, SEED, THETA,
                               IntegerRange, NumberRange, check_analysable)
from driftscreen.neutral.model import NOISE_CHOICES, START_CHOICES, NullOptions
from driftscreen.power import ALTERNATIVES, PowerDesign
from driftscreen.screen import BACKENDS
from driftscreen.synthetic import MODELS, check_design_span
from driftscreen.version import __version__

EXIT_INPUT = 2
#: Options of the library's parameters whose names differ from the option's.
PARAMETER_OPTIONS = {"n_taxa": "--taxa", "n_samples": "--samples", "n_datasets": "--datasets"}


class Parser(argparse.ArgumentParser):
    """An argument parser whose usage errors are one line (and exit status 2)."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_INPUT, f"{self.prog}: error: {message}; see '{self.prog} --help'\n")
#: What `screen --figures` holds when given without a folder (then OUT/figures).
FIGURES_IN_OUT = ""


def positive_int(text: str) -> int:
    value = int(text)
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be a positive integer, got {text}")
    return value


def whole_number(allowed: IntegerRange) -> Callable[[str], int]:
    """An argument type accepting exactly the whole numbers of ``allowed``."""
    def parse(text: str) -> int:
        try:
            value: int | None = int(text)
        except ValueError:
            value = None
        if value is None or value not in allowed:
            raise argparse.ArgumentTypeError(f"must be {allowed.describe()}, got {text}")
        return value
    return parse


def number_in(allowed: NumberRange) -> Callable[[str], float]:
    """An argument type accepting exactly the numbers of ``allowed``."""
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        if value not in allowed:
            raise argparse.ArgumentTypeError(f"must be {allowed.describe()}, got {text}")
        return value
    return parse


def read_depth(text: str) -> float:
    """--depth: a number of reads per sample, above 0 and at most :data:`MAX_READS`."""
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not (math.isfinite(value) and 0 < value <= MAX_READS):
        raise argparse.ArgumentTypeError(
            f"must be a number of reads above 0 and at most {MAX_READS_TEXT}, got {text}")
    return value


def read_noise(text: str) -> str | float:
    """--read-noise: 'estimate', 'off' or a Dirichlet-multinomial precision C."""
    if text in NOISE_CHOICES:
        return text
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"must be 'estimate', 'off' or a read precision C > 0, got {text}") from None
    if value not in READ_PRECISION:
        raise argparse.ArgumentTypeError(
            f"a read precision must be {READ_PRECISION.describe()}, got {text}")
    return value


def at_least_two(text: str) -> int:
    value = int(text)
    if value < 2:
        raise argparse.ArgumentTypeError(f"must be at least 2, got {text}")
    return value


def positive_float(text: str) -> float:
    value = float(text)
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"must be a positive number, got {text}")
    return value


def nonnegative_float(text: str) -> float:
    value = float(text)
    if not (math.isfinite(value) and value >= 0):
        raise argparse.ArgumentTypeError(f"must be zero or positive, got {text}")
    return value


def column_list(text: str) -> list[str]:
    return [c.strip() for c in text.split(",") if c.strip()]


def add_input_options(parser: argparse.ArgumentParser, optional_counts: bool = False) -> None:
    """Options that describe how to read the counts table and its metadata.

    ``optional_counts``: the table may be left out (`driftscreen power` then takes its
    design from options, and ``--depth`` is the depth of that design).
    """
    if optional_counts:
        parser.add_argument("counts", nargs="?",
                            help="abundance table (CSV/TSV, wide or long, .gz allowed; or "
                                 "BIOM) whose design to plan for; or leave it out and give "
                                 "--taxa, --samples, --interval and --depth")
    else:
        parser.add_argument("counts", help="abundance table (CSV/TSV, wide or long, .gz "
                                              "allowed; or BIOM)")
    group = parser.add_argument_group("input")
    group.add_argument("--metadata", metavar="FILE",
                       help="sample metadata table (CSV/TSV); wins over the sample metadata "
                            "inside a BIOM file")
    group.add_argument("--sample-id", metavar="COL",
                       help="metadata column holding sample ids (default: the first column)")
    group.add_argument("--dataset-by", metavar="COL[,COL...]", type=column_list, default=[],
                       help="metadata column(s) whose values define datasets")
    group.add_argument("--time-by", metavar="COL",
                       help="metadata column with sampling times (days or ISO dates); "
                            "without it every dataset is a snapshot design")
    group.add_argument("--depth-by", metavar="COL",
                       help="metadata column with each sample's sequencing depth (reads)")
    group.add_argument("--replicate-by", metavar="COL",
                       help="metadata column naming the biological sample each sequenced "
                            "sample comes from: samples sharing a value are technical "
                            "replicates (the same extract or library sequenced again); the "
                            "deepest is analysed, the others give the read precision")
    group.add_argument("--depth", metavar="READS", type=read_depth,
                       help="one sequencing depth for every sample (relative-abundance tables)"
                            + ("; without COUNTS: median reads per sample of the design"
                               if optional_counts else ""))
    group.add_argument("--abundance", choices=INTAKE_CHOICES["abundance"],
                       default="auto", help="what the table holds (default: detect)")
    group.add_argument("--remainder", choices=INTAKE_CHOICES["remainder"], default="auto",
                       help="relative rows summing below 1: pool the rest as taxon 'other' "
                            "(default) or renormalise")
    group.add_argument("--layout", choices=INTAKE_CHOICES["layout"], default="auto",
                       help="wide (taxa x samples) or long (sample, taxon, count) table")
    group.add_argument("--orientation", choices=INTAKE_CHOICES["orientation"],
                       default="auto", help="for wide tables: are taxa rows or columns")
    group.add_argument("--lineage", metavar="COL",
                       help="table column (BIOM: observation metadata field) with "
                            "lineage strings, for --rank")
    group.add_argument("--rank", metavar="RANK",
                       help="aggregate taxa to this rank (e.g. genus) using --lineage, "
                            "a BIOM file's taxonomy or --taxon-map")
    group.add_argument("--taxon-map", metavar="FILE",
                       help="two-column file mapping taxon to group, to aggregate taxa")


def intake_options(args: argparse.Namespace) -> dict:
    """The keyword options of ``read_datasets`` given by :func:`add_input_options` (each
    option's destination is the parameter's name)."""
    return {name: getattr(args, name) for name in intake_defaults()}


def read_input(args: argparse.Namespace) -> list[Dataset]:
    """Every dataset of the table, however small: the analysis applies the size limits."""
    return read_datasets(args.counts, args.metadata, **intake_options(args), min_samples=1,
                         min_taxa=1)


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


def add_calibration_options(parser: argparse.ArgumentParser, replicates: int = 999,
                            title: str = "calibration") -> argparse._ArgumentGroup:
    """--replicates, --groupings, --seed and --jobs, in an argument group it returns."""
    group = parser.add_argument_group(title)
    group.add_argument("--replicates", metavar="B", type=whole_number(REPLICATES),
                       default=replicates,
                       help=f"neutral bootstrap replicates (default {replicates}); "
                            "p-values resolve down to 1/(B+1)")
    group.add_argument("--groupings", metavar="R", type=whole_number(GROUPINGS), default=200,
                       help="random groupings of taxa for regrouping_invariance (default 200)")
    group.add_argument("--seed", metavar="S", type=whole_number(SEED), default=0,
                       help="master random seed (default 0)")
    group.add_argument("--jobs", metavar="J", type=whole_number(JOBS), default=1,
                       help="worker processes (results do not depend on it; default 1)")
    return group


def add_null_options(parser: argparse.ArgumentParser) -> None:
    """--read-noise and --start: how the neutral null treats reads and the first sample."""
    group = parser.add_argument_group("neutral null")
    group.add_argument("--read-noise", metavar="C", type=read_noise, default="estimate",
                       help="technical noise of the reads (PCR, extraction): 'estimate' "
                            "(default; from technical replicates given by --replicate-by, "
                            "else from the variance between samples close in time that "
                            "drift cannot explain, time series only), 'off' (multinomial "
                            "reads), or a fixed Dirichlet-multinomial precision C")
    group.add_argument("--start", choices=START_CHOICES, default="first-sample",
                       help="'first-sample' (default): replicates of a time series start "
                            "from its first sample and relax towards the metacommunity, so "
                            "a community recovering from a disturbance is still neutral; "
                            "'stationary': they start from the stationary law")


def null_options(args: argparse.Namespace) -> NullOptions:
    return NullOptions(noise=args.read_noise, start=args.start)


# ----------------------------------------------------------------------------- simulate
def add_simulate(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("simulate", help="write simulated community datasets (counts + metadata)",
                       description="Simulate neutral communities (drift plus immigration, "
                                   "sequenced at a given depth), or niche communities, and "
                                   "write a counts table and a metadata table that `driftscreen "
                                   "test` and `screen` read, and truth.tsv with the parameters "
                                   "behind them.")
    p.add_argument("--out", metavar="DIR", required=True,
                   help="folder for counts.tsv, metadata.tsv and truth.tsv (created if needed)")
    p.add_argument("--taxa", type=at_least_two, default=40, help="number of taxa (default 40)")
    p.add_argument("--samples", type=at_least_two, default=100,
                   help="samples per dataset (default 100)")
    p.add_argument("--interval", type=number_in(INTERVAL), default=1.0,
                   help="mean days between samples (default 1)")
    p.add_argument("--irregular", action="store_true",
                   help="irregular sampling: gamma-distributed gaps with that mean")
    p.add_argument("--snapshot", action="store_true",
                   help="independent replicate communities, no time axis")
    p.add_argument("--depth", type=whole_number(READS), default=10_000,
                   help="median reads per sample (default 10000)")
    p.add_argument("--depth-spread", type=number_in(DEPTH_SPREAD), default=0.0,
                   help="standard deviation of log depth across samples (default 0)")
    p.add_argument("--theta", type=number_in(THETA), default=50.0,
                   help="immigration parameter theta (default 50)")
    p.add_argument("--rate", type=positive_float, default=0.2,
                   help="relaxation rate per day: correlations decay as exp(-rate*lag) "
                        "(default 0.2)")
    p.add_argument("--datasets", type=positive_int, default=1,
                   help="number of datasets written into the one table (default 1)")
    p.add_argument("--model", choices=MODELS,
                   default="neutral",
                   help="neutral (default), or a niche alternative: the stochastic logistic "
                        "model or the noisy Lotka-Volterra community (see docs/power.md)")
    p.add_argument("--strength", type=nonnegative_float,
                   help="niche strength for --model logistic (sigma) or lotka-volterra "
                        "(mean competition); default: the model's own")
    p.add_argument("--seed", type=whole_number(SEED), default=0,
                   help="random seed (default 0)")
    p.set_defaults(handler=run_simulate)


def run_simulate(args: argparse.Namespace) -> int:
    if args.strength is not None and args.model == "neutral":
        raise InputError("a strength applies only to a niche model", place="option --strength",
                         fix="add --model logistic or --model lotka-volterra, or drop --strength")
    paths = simulate_command(
        out=Path(args.out), n_taxa=args.taxa, n_samples=args.samples,
        interval=None if args.snapshot else args.interval, irregular=args.irregular,
        depth=args.depth, depth_spread=args.depth_spread, theta=args.theta, rate=args.rate,
        n_datasets=args.datasets, seed=args.seed, model=args.model, strength=args.strength)
    print("\n".join(str(path) for path in paths))
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
    add_null_options(p)
    p.add_argument("--output", metavar="FILE", help="also write the report to FILE")
    p.add_argument("--taxa", metavar="FILE",
                   help="also write the per-taxon scan (which taxa depart from neutrality, "
                        "with p- and q-values and directions) to FILE as a TSV table")
    p.add_argument("--figures", metavar="DIR",
                   help="also draw the null distributions, Taylor's law, the volatility "
                        "of groups of taxa and the occupancy of every taxon as PNG files "
                        "in DIR (needs driftscreen[plot])")
    add_detectable_option(p)
    add_influence_option(p)
    p.set_defaults(handler=run_test)


def run_test(args: argparse.Namespace) -> int:
    dataset = choose_dataset(read_input(args), args.dataset, args.counts)
    report = test_command(dataset, replicates=args.replicates, groupings=args.groupings,
                          seed=args.seed, jobs=args.jobs, output=args.output,
                          detectable=args.detectable, messages=sys.stderr,
                          figures=args.figures, influence=args.influence,
                          null=null_options(args), taxa=args.taxa)
    sys.stdout.write(report)
    return 0


# ----------------------------------------------------------------------------- screen
def add_screen(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("screen", help="test every dataset of a table, in parallel and resumably",
                       description="Test every dataset of a table against the neutral model "
                                   "(one dataset per combination of the --dataset-by columns), "
                                   "adjust the p-values for the false discovery rate across "
                                   "datasets, and write results.tsv, parameters.tsv, "
                                   "results.json, report.txt, taxa.tsv (which taxa depart "
                                   "from neutrality) and taxa_across.tsv (which depart "
                                   "across datasets) into the output folder. "
                                   "Finished datasets are kept in the folder: running the same "
                                   "command again after an interruption goes on where it "
                                   "stopped.")
    add_input_options(p)
    add_calibration_options(p)
    add_null_options(p)
    p.add_argument("--out", metavar="DIR", required=True,
                   help="output folder (created if needed); also holds the resume store")
    p.add_argument("--backend", choices=BACKENDS, default="loky",
                   help="parallel backend: worker processes on this machine (loky, default) "
                        "or a Dask cluster (needs driftscreen[dask])")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="address of a running Dask scheduler (with --backend dask; without "
                        "it a local cluster of --jobs workers is started)")
    p.add_argument("--quiet", action="store_true", help="no progress messages on stderr")
    p.add_argument("--figures", metavar="DIR", nargs="?", const=FIGURES_IN_OUT,
                   help="also draw every dataset's figures (null distributions, Taylor's "
                        "law, volatility of groups of taxa) as PNG files in DIR; without "
                        "DIR in OUT/figures (needs driftscreen[plot])")
    add_detectable_option(p)
    add_influence_option(p)
    p.set_defaults(handler=run_screen)


def screen_figures_folder(args: argparse.Namespace) -> Path | None:
    """The folder given to `screen --figures`: DIR, OUT/figures without DIR, or None."""
    if args.figures is None:
        return None
    return Path(args.out) / "figures" if args.figures == FIGURES_IN_OUT else Path(args.figures)


def run_screen(args: argparse.Namespace) -> int:
    try:
        paths = screen_command(
            args.counts, args.metadata, out=Path(args.out), intake=intake_options(args),
            replicates=args.replicates, groupings=args.groupings, seed=args.seed,
            jobs=args.jobs, backend=args.backend, scheduler=args.scheduler,
            messages=None if args.quiet else sys.stderr, detectable=args.detectable,
            figures=screen_figures_folder(args), influence=args.influence,
            null=null_options(args))
    except KeyboardInterrupt:
        print(f"driftscreen: interrupted; finished datasets are kept in {args.out}: run the "
              "same command again to go on", file=sys.stderr)
        return 130
    for path in paths:
        print(path)
    return 0


# ----------------------------------------------------------------------------- power
def add_detectable_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--detectable", action="store_true",
                        help="for a dataset where neutrality is not rejected, add a note on "
                             "the weakest logistic niche structure its design detects with "
                             "80%% power (a quick power run; takes time)")


def add_influence_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--no-influence", dest="influence", action="store_false",
                        help="do not look for the single sample a rejection rests on most "
                             "(by default every dataset with combined p <= 0.05 is tested "
                             "again without its most influential sample)")


def add_power(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("power", help="power and minimum detectable niche strength of a design",
                       description="Simulate niche communities of increasing strength with a "
                                   "design (a dataset's, or one given by numbers), run the "
                                   "full calibrated test on each, and report the power of "
                                   "every statistic and the weakest strength detected with "
                                   "80% power.")
    add_input_options(p, optional_counts=True)
    p.add_argument("--dataset", metavar="NAME",
                   help="which dataset's design to use when the table holds several")
    group = p.add_argument_group("design by numbers (instead of COUNTS)")
    group.add_argument("--taxa", metavar="K", type=positive_int, help="number of taxa")
    group.add_argument("--samples", metavar="T", type=positive_int,
                       help="samples per dataset (time points, or replicate communities)")
    group.add_argument("--interval", metavar="D", type=number_in(INTERVAL),
                       help="days between samples (the mean, with --irregular)")
    group.add_argument("--irregular", action="store_true",
                       help="gamma-distributed gaps with mean --interval")
    group.add_argument("--snapshot", action="store_true",
                       help="replicate communities observed once, no time axis")
    group.add_argument("--depth-spread", metavar="S", type=number_in(DEPTH_SPREAD),
                       help="standard deviation of log depth across samples (default 0)")
    group = p.add_argument_group("alternative")
    group.add_argument("--alternative", choices=ALTERNATIVES,
                       default="logistic",
                       help="niche model: independent stochastic logistic taxa (strength = "
                            "environmental noise sigma) or a competitive Lotka-Volterra "
                            "community (strength = mean competition); default logistic")
    group.add_argument("--strengths", metavar="S1,S2,...",
                       help="grid of strengths (default: 1e-4,3e-4,1e-3,...,1 for "
                            "logistic; 0.01,0.03,0.1,0.2,...,1 for lotka-volterra); add 0, "
                            "the neutral limit, to see the false-positive rate")
    group.add_argument("--timescale", metavar="DAYS", type=positive_float, default=1.0,
                       help="generation time of the niche dynamics in days (default 1)")
    group.add_argument("--noise", metavar="SIGMA", type=float,
                       help="environmental noise of the lotka-volterra community (default 0)")
    group = add_calibration_options(p, replicates=199, title="simulation and calibration")
    group.add_argument("--datasets", metavar="N", type=positive_int, default=50,
                       help="simulated datasets per strength (default 50)")
    group.add_argument("--alpha", metavar="A", type=float, default=0.05,
                       help="level of the tests (default 0.05)")
    p.add_argument("--output", metavar="FILE", help="also write the report to FILE")
    p.add_argument("--table", metavar="FILE",
                   help="write power per strength and statistic as a TSV table")
    p.add_argument("--quiet", action="store_true", help="no progress messages on stderr")
    p.set_defaults(handler=run_power)


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
    check_design_span(n_samples, None if snapshot else interval)
    return PowerDesign.from_numbers(n_taxa=n_taxa, n_samples=n_samples,
                                    interval=None if snapshot else interval,
                                    irregular=irregular, depth=max(int(round(depth)), 1),
                                    depth_spread=depth_spread or 0.0)


def run_power(args: argparse.Namespace) -> int:
    dataset = None
    if args.counts is not None:
        dataset = choose_dataset(read_input(args), args.dataset, args.counts)
    elif args.metadata is not None or args.dataset is not None:
        option = "--metadata" if args.metadata is not None else "--dataset"
        raise InputError("needs a counts table", file=f"option {option}",
                         fix=f"give COUNTS too, or drop {option} and describe the design "
                             "with --taxa, --samples, --interval, --depth")
    design = power_design(dataset, n_taxa=args.taxa, n_samples=args.samples,
                          interval=args.interval, irregular=args.irregular,
                          snapshot=args.snapshot, depth=None if dataset else args.depth,
                          depth_spread=args.depth_spread)
    report = power_command(design, alternative=args.alternative, strengths=args.strengths,
                           n_datasets=args.datasets, replicates=args.replicates,
                           groupings=args.groupings, seed=args.seed, jobs=args.jobs,
                           alpha=args.alpha, timescale=args.timescale, noise=args.noise,
                           output=args.output, table=args.table,
                           messages=None if args.quiet else sys.stderr,
                           inputs=dataset.source if dataset else ())
    sys.stdout.write(report)
    return 0


# ----------------------------------------------------------------------------- demo
def add_demo(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help="run the whole job on a built-in example",
                       description="Simulate the built-in bioreactor scenario, test it and "
                                   "write everything into a folder.")
    p.add_argument("--out", metavar="DIR", default="driftscreen-demo",
                   help="folder for the demo's inputs and outputs (default driftscreen-demo)")
    p.add_argument("--replicates", metavar="B", type=whole_number(REPLICATES), default=199,
                   help="neutral bootstrap replicates (default 199 for a quick demo)")
    p.add_argument("--jobs", metavar="J", type=whole_number(JOBS), default=1,
                   help="worker processes (default 1)")
    p.set_defaults(handler=run_demo)


def run_demo(args: argparse.Namespace) -> int:
    sys.stdout.write(demo(Path(args.out), replicates=args.replicates, jobs=args.jobs,
                          messages=sys.stderr))
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = Parser(
        prog="driftscreen",
        description="Are a microbial community's ups and downs neutral drift plus immigration, "
                    "or niche structure? Fit the neutral null, calibrate neutrality statistics "
                    "by parametric bootstrap, report p-values and effect sizes.")
    parser.add_argument("--version", action="version", version=f"driftscreen {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    add_demo(sub)
    add_test(sub)
    add_screen(sub)
    add_power(sub)
    add_simulate(sub)
    return parser


def option_names(parser: argparse.ArgumentParser) -> dict[str, str]:
    """The option of every Python parameter the library names in an :class:`InputError`:
    the option whose destination has its name, or the one of :data:`PARAMETER_OPTIONS`."""
    names: dict[str, str] = {}
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for command in action.choices.values():
                names.update(option_names(command))
        elif action.option_strings:
            names.setdefault(action.dest, action.option_strings[-1])
    return {**names, **PARAMETER_OPTIONS}


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return args.handler(args)
    except InputError as error:
        print(f"driftscreen: error: {error.one_line(option_names(parser))}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print("driftscreen: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
