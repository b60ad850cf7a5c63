"""Property: whatever a new user's mistake, a command ends in exit 0 with the right numbers or
exit 2 with one line on stderr, and no input file changes.

Each example starts from a small valid table (wide with taxa as rows or columns, or long;
counts, or fractions with --depth or --depth-by; plain or gzipped) and metadata, applies
mistakes a user makes (numbers beyond any sequencing run, digit separators, other scripts'
digits, a mistyped year, a table saved as Windows-1252, a ragged line, too few samples,
out-of-range options and depths, output places that are files, folders, pipes, links,
inputs or damaged resume stores) and runs `driftscreen test` or `driftscreen screen` in
this process. The expected outcome comes from a model of the mutated table kept here
(Python integers; the documented conversion round(fraction x depth)), independent of the
code under test.
"""

from __future__ import annotations

import gzip
import hashlib
import os
import re
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from cli_run import run_cli

#: Base counts, taxa x samples; every sample sums to well over 100 reads.
BASE = [[120, 80, 95, 60, 140, 75],
        [30, 45, 20, 55, 25, 40],
        [10, 0, 15, 5, 20, 12],
        [40, 60, 35, 70, 30, 50]]
TAXA = ["Nitrospira", "Bacillus", "Pseudomonas", "Zoogloea"]
SAMPLES = [f"r1_d{k}" for k in range(len(BASE[0]))]
#: Largest count of a cell and of a sample total (10^15; driftscreen.limits.MAX_READS).
BOUND = 10**15
#: Cell texts that are counts, with their value.
VALID_CELLS = {"0": 0, "17": 17, " 42 ": 42, "+5": 5, "1e3": 1000, "12.0": 12,
               "999999999999999": 999_999_999_999_999, "1000000000000000": BOUND}
#: Cell texts that are not counts.
INVALID_CELLS = ["1e300", "9223372036854775808", "9e18", "1000000000000001", "-3", "2.5",
                 "abc", "", "NA", "inf", "nan", "1_234", "\u0661\u0662\u0663",
                 "\uff11\uff12", "0x10", "1,5"]
#: Taxon names and the encoding the table is saved in.
NAMES = [("Bacillus", "utf-8"), ("Bacillus\u2026", "cp1252"), ("B\u00e4cillus", "cp1252"),
         ("Bacillus\u2028sp", "utf-8"), ("Bacillus\u2026", "utf-8")]
TIMES = ["days", "dates", "mistyped-year", "far-day", "repeated-day", "none"]
LAYOUTS = ["taxa-rows", "taxa-columns", "long"]
#: --depth of a table of fractions: valid ones, then invalid ones.
DEPTHS = (["1000", "250", "3", "1e15"], ["2e18", "9.3e18", "1e300", "0", "-5", "many"])
OPTIONS = {"--seed": (["0", "7"], ["-1", "x"]), "--groupings": (["2"], ["1", "0"]),
           "--replicates": (["19"], ["0", "-4"]), "--jobs": (["1"], ["0"]),
           "--read-noise": (["off", "estimate", "50"], ["1e-300", "0", "-1", "inf"])}
TEST_OUTPUTS = ["none", "new-file", "new-folder-file", "folder", "under-file", "counts",
                "link-to-counts", "pipe"]
SCREEN_OUTS = ["new", "empty-folder", "file", "link-to-file", "under-file", "pipe",
               "damaged-store", "store-settings-folder", "holds-input"]


@dataclass
class Scenario:
    """One run: the mutated inputs, the command and its options."""

    command: str
    cells: dict[tuple[int, int], str] = field(default_factory=dict)
    name: tuple[str, str] = NAMES[0]
    n_samples: int = len(SAMPLES)
    times: str = "days"
    ragged: bool = False
    options: dict[str, str] = field(default_factory=dict)
    place: str = "none"
    layout: str = "taxa-rows"
    gzipped: bool = False
    depth: str | None = None  # a table of fractions converted at this --depth
    depth_column: bool = False  # ... given in a metadata column (--depth-by) instead


def mostly(usual: object, others: list | st.SearchStrategy) -> st.SearchStrategy:
    """``usual`` in about two draws of three, else one of ``others``: most runs then reach
    the analysis, and every mistake is still tried often."""
    rest = others if isinstance(others, st.SearchStrategy) else st.sampled_from(others)
    return st.one_of(st.just(usual), st.just(usual), rest)


def cell_strategy() -> st.SearchStrategy[dict[tuple[int, int], str]]:
    position = st.tuples(st.integers(0, len(BASE) - 1), st.integers(0, len(BASE[0]) - 1))
    text = st.one_of(st.sampled_from(sorted(VALID_CELLS)), st.sampled_from(INVALID_CELLS))
    return mostly({}, st.dictionaries(position, text, min_size=1, max_size=2))


def option_strategy() -> st.SearchStrategy[dict[str, str]]:
    one = st.sampled_from(sorted(OPTIONS)).flatmap(
        lambda option: st.sampled_from(OPTIONS[option][0] + OPTIONS[option][1]).map(
            lambda value: {option: value}))
    return mostly({}, one)


@st.composite
def scenarios(draw: st.DrawFn) -> Scenario:
    command = draw(st.sampled_from(["test", "screen"]))
    places = TEST_OUTPUTS if command == "test" else SCREEN_OUTS
    depth = draw(mostly(None, st.one_of(st.sampled_from(DEPTHS[0]), st.sampled_from(DEPTHS[1]))))
    return Scenario(command=command, cells={} if depth else draw(cell_strategy()),
                    name=draw(st.sampled_from(NAMES)),
                    n_samples=draw(mostly(len(SAMPLES), list(range(2, len(SAMPLES))))),
                    times=draw(mostly("days", TIMES)), ragged=draw(mostly(False, [True])),
                    options=draw(option_strategy()),
                    place=draw(mostly(places[0], places[1:])),
                    layout=draw(st.sampled_from(LAYOUTS)), gzipped=draw(st.booleans()),
                    depth=depth, depth_column=draw(st.booleans()))


# ----------------------------------------------------------------------------- the model
def count_of(text: str) -> int | None:
    """The count a cell's text stands for, or None if it is no count."""
    if text in VALID_CELLS:
        return VALID_CELLS[text]
    return int(text) if re.fullmatch("[0-9]+", text) else None


def cell_texts(scenario: Scenario) -> list[list[str]]:
    """The value cells as written, taxa x kept samples: counts, or fractions of each sample."""
    kept = range(scenario.n_samples)
    if scenario.depth is not None:
        totals = [sum(row[j] for row in BASE) for j in kept]
        return [[f"{row[j] / totals[j]:.6f}" for j in kept] for row in BASE]
    return [[scenario.cells.get((i, j), str(row[j])) for j in kept] for i, row in enumerate(BASE)]


def counts_of(scenario: Scenario) -> list[list[int]] | None:
    """The counts the table holds (taxa x kept samples), or None if a cell is no count;
    fractions become round(fraction x depth) reads (the documented conversion)."""
    texts = cell_texts(scenario)
    if scenario.depth is not None:
        depth = float(scenario.depth) if scenario.depth in DEPTHS[0] else None
        if depth is None:
            return None
        return [[int(np.rint(float(text) * depth)) for text in row] for row in texts]
    table = [[count_of(text) for text in row] for row in texts]
    return None if any(value is None for row in table for value in row) else table


def time_texts(scenario: Scenario) -> list[str] | None:
    """Each sample's time cell (None: a snapshot design, no metadata)."""
    n = len(SAMPLES)
    return {"days": [str(k) for k in range(n)],
            "dates": [f"2025-04-{k + 1:02d}" for k in range(n)],
            "mistyped-year": ["1025-04-01"] + [f"2025-04-{k + 1:02d}" for k in range(1, n)],
            "far-day": [str(k) for k in range(n - 1)] + ["80000"],
            "repeated-day": ["0", "0"] + [str(k) for k in range(2, n)],
            "none": None}[scenario.times]


def problem_in_inputs(scenario: Scenario, counts: list[list[int]] | None) -> bool:
    """True if intake must refuse the tables (whatever the command)."""
    if counts is None or scenario.ragged:
        return True
    totals = [sum(column) for column in zip(*counts)]
    if any(total == 0 or total > BOUND for total in totals):
        return True
    # the first two samples are always kept; the last one only with every sample
    return (scenario.times in ("repeated-day", "mistyped-year")
            or (scenario.times == "far-day" and scenario.n_samples == len(SAMPLES)))


def problem_in_options(scenario: Scenario) -> bool:
    return any(value in OPTIONS[option][1] for option, value in scenario.options.items())


def problem_in_place(scenario: Scenario) -> bool:
    return scenario.place not in ("none", "new-file", "new-folder-file", "new", "empty-folder")


def too_small(scenario: Scenario, counts: list[list[int]]) -> bool:
    """Fewer samples or taxa than the analysis needs (driftscreen.limits)."""
    minimum = 3 if scenario.times == "none" else 4
    taxa_with_reads = sum(1 for row in counts if sum(row) > 0)
    return scenario.n_samples < minimum or taxa_with_reads < 2


# ----------------------------------------------------------------------------- the files
def table_lines(scenario: Scenario) -> list[list[str]]:
    """The counts table's lines as fields, in the scenario's layout; a ragged table lacks
    the last field of one data line."""
    name = scenario.name[0]
    taxa = [name if i == 1 else taxon for i, taxon in enumerate(TAXA)]
    samples = SAMPLES[:scenario.n_samples]
    texts = cell_texts(scenario)
    if scenario.layout == "taxa-rows":
        lines = [["taxon", *samples]] + [[taxon, *row] for taxon, row in zip(taxa, texts)]
        broken = 3  # the line of taxon 2
    elif scenario.layout == "taxa-columns":
        lines = [["sample", *taxa]] + [[sample, *column]
                                       for sample, column in zip(samples, zip(*texts))]
        broken = 1  # the line of the first sample
    else:
        lines = [["sample", "taxon", "count"]] + [[sample, taxon, texts[i][j]]
                                                  for i, taxon in enumerate(taxa)
                                                  for j, sample in enumerate(samples)]
        broken = 1 + 2 * scenario.n_samples  # the first line of taxon 2
    if scenario.ragged:
        lines[broken] = lines[broken][:-1]
    return lines


def write_inputs(folder: Path, scenario: Scenario) -> list[str]:
    """Write counts (and metadata) into ``folder``; the command-line arguments for them."""
    text = "".join("\t".join(fields) + "\n" for fields in table_lines(scenario))
    data = text.encode(scenario.name[1], errors="replace")
    if scenario.place == "holds-input":  # a counts table named like a screen's output
        counts = folder / "results.tsv"
    elif scenario.gzipped:
        counts, data = folder / "counts.tsv.gz", gzip.compress(data, mtime=0)
    else:
        counts = folder / "counts.tsv"
    counts.write_bytes(data)
    depth = [] if scenario.depth is None else ["--depth", scenario.depth]
    times = time_texts(scenario)
    if times is None:
        return [str(counts), *depth]
    rows = [["sample", "time"]] + [[sample, time] for sample, time in zip(SAMPLES, times)]
    if depth and scenario.depth_column:
        rows = [row + [scenario.depth if k else "reads"] for k, row in enumerate(rows)]
        depth = ["--depth-by", "reads"]
    metadata = "".join("\t".join(row) + "\n" for row in rows)
    (folder / "metadata.tsv").write_text(metadata, encoding="utf-8")
    return [str(counts), "--metadata", str(folder / "metadata.tsv"), "--time-by", "time",
            *depth]


def output_arguments(root: Path, counts: Path, scenario: Scenario) -> list[str]:
    """Make the output place of the scenario; its command-line arguments."""
    (root / "a-file").write_text("keep me\n", encoding="utf-8")
    place = scenario.place
    if scenario.command == "test":
        paths = {"new-file": root / "report.txt", "new-folder-file": root / "new" / "r.txt",
                 "folder": root, "under-file": root / "a-file" / "r.txt",
                 "counts": counts, "link-to-counts": root / "link.txt",
                 "pipe": root / "pipe"}
        if place == "link-to-counts":
            paths[place].symlink_to(counts)
        elif place == "pipe":  # a special file, like /dev/null (never written by a test)
            os.mkfifo(paths[place])
        return [] if place == "none" else ["--output", str(paths[place])]
    out = root / "out"
    if place == "empty-folder":
        out.mkdir()
    elif place == "file":
        out = root / "a-file"
    elif place == "link-to-file":
        out = root / "link"
        out.symlink_to(root / "a-file")
    elif place == "under-file":
        out = root / "a-file" / "out"
    elif place == "pipe":
        out = root / "pipe"
        os.mkfifo(out)
    elif place == "damaged-store":
        (out / ".driftscreen").mkdir(parents=True)
        (out / ".driftscreen" / "settings.json").write_bytes(b'{"inputs": [1]}')
    elif place == "store-settings-folder":
        (out / ".driftscreen" / "settings.json").mkdir(parents=True)
    elif place == "holds-input":  # the counts table is inputs/results.tsv
        out = counts.parent
    return ["--out", str(out)]


def digests(folder: Path) -> dict[str, str]:
    return {path.name: hashlib.sha256(path.read_bytes()).hexdigest()
            for path in sorted(folder.iterdir()) if path.is_file()}


# ----------------------------------------------------------------------------- the checks
def check_report(report: str, counts: list[list[int]], scenario: Scenario) -> None:
    """The report's design and depths are those of the table (no number silently wrong)."""
    kept = [row for row in counts if sum(row) > 0]
    totals = [sum(column) for column in zip(*kept)]
    samples = scenario.n_samples
    design = (f"{samples} replicate communities" if scenario.times == "none"
              else f"{samples} samples")
    assert design in report, report[:400]
    assert re.search(rf"^Taxa\s+{len(kept)}\b", report, re.MULTILINE), report[:400]
    assert f"min {min(totals):,}," in report and f"max {max(totals):,}" in report, report[:400]


def check_screen_outputs(out: Path, counts: list[list[int]], scenario: Scenario) -> None:
    """results.tsv holds the dataset with its size, or the note that it is too small."""
    lines = (out / "results.tsv").read_text(encoding="utf-8").splitlines()
    header = lines[0].split("\t")
    first = dict(zip(header, lines[1].split("\t")))
    assert int(first["n_samples"]) == scenario.n_samples
    assert int(first["n_taxa"]) == sum(1 for row in counts if sum(row) > 0)
    assert first["note"].startswith("not analysed") == too_small(scenario, counts)


@settings(derandomize=True, database=None, max_examples=400, deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(scenarios())
def test_every_run_ends_in_a_result_or_one_line(scenario):
    with tempfile.TemporaryDirectory() as temporary:
        root = Path(temporary)
        inputs = root / "inputs"
        inputs.mkdir()
        input_arguments = write_inputs(inputs, scenario)
        arguments = [scenario.command, *input_arguments]
        arguments += output_arguments(root, Path(input_arguments[0]), scenario)
        options = {"--replicates": "19", "--groupings": "2", **scenario.options}
        arguments += [item for pair in options.items() for item in pair]
        arguments += ["--no-influence"] + (["--quiet"] if scenario.command == "screen" else [])
        before = digests(inputs)

        status, stdout, stderr = run_cli(arguments)
        event(f"{scenario.command}, {scenario.layout}"
              f"{', fractions' if scenario.depth else ''}: exit {status}")

        assert digests(inputs) == before  # no input changed
        assert "Traceback" not in stderr
        counts = counts_of(scenario)
        refused = (problem_in_options(scenario) or problem_in_place(scenario)
                   or problem_in_inputs(scenario, counts)
                   or (scenario.command == "test" and too_small(scenario, counts)))
        if refused:
            assert status == 2, (arguments, stderr, stdout[:300])
            assert stderr.count("\n") == 1 and stderr.endswith("\n"), stderr
            assert stderr.startswith("driftscreen"), stderr
            return
        assert status == 0, (arguments, stderr)
        if scenario.command == "test":
            check_report(stdout, counts, scenario)
            if scenario.place != "none":
                assert Path(arguments[arguments.index("--output") + 1]).read_text(
                    encoding="utf-8") == stdout
        else:
            check_screen_outputs(Path(arguments[arguments.index("--out") + 1]), counts,
                                 scenario)
