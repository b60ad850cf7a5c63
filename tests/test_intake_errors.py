"""Bad input gives one-line InputErrors naming file, place and fix; inputs stay untouched.

The second table holds the same mistakes made on the command line (with bad options and
output places), run in this process: each ends in one line on stderr and exit status 2.
"""

from __future__ import annotations

import gzip
import hashlib
import os
import re
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from cli_run import run_cli

from driftscreen.cli import build_parser, option_names
from driftscreen.errors import InputError
from driftscreen.intake import read_datasets

#: How the command line words the library's parameters.
OPTIONS = option_names(build_parser())
GOOD = "taxon\tS1\tS2\tS3\nA\t1\t2\t3\nB\t4\t5\t6\n"
META = "sample\tday\tsite\nS1\t1\tx\nS2\t2\tx\nS3\t3\tx\n"
LONG = "sample\ttaxon\tcount\nS1\tA\t1\nS2\tA\t2\nS3\tA\t3\nS1\tB\t4\nS2\tB\t5\nS3\tB\t6\n"


@dataclass
class Case:
    """One bad input: files to write, read_datasets arguments, expected message pattern.

    ``kwargs`` values naming a written file (e.g. ``"map.tsv"``) are turned into paths.
    """

    id: str
    pattern: str
    counts: str | bytes | None = GOOD
    meta: str | None = None
    kwargs: dict = field(default_factory=dict)
    counts_name: str = "counts.tsv"
    extra: dict = field(default_factory=dict)


def meta_with(column: str, values: list[str]) -> str:
    rows = [f"S{k}\t{v}" for k, v in enumerate(values, start=1)]
    return f"sample\t{column}\n" + "\n".join(rows) + "\n"


CASES = [
    # values in the counts table
    Case("negative", r"^.*counts\.tsv: row 3 \(taxon 'B'\), column 'S2': negative count -3; "
                     r"counts must be >= 0$",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t3\nB\t4\t-3\t6\n"),
    Case("negative-taxa-columns", r"counts\.tsv: row 4 \(sample 'S3'\), column 'B': negative "
                                  r"count -2; counts must be >= 0$",
         counts="sample\tA\tB\nS1\t1\t1\nS2\t2\t2\nS3\t3\t-2\n"),
    Case("negative-fraction", r"row 2 \(taxon 'A'\), column 'S1': negative abundance -0\.1; "
                              r"abundances must be >= 0$",
         counts="taxon\tS1\tS2\tS3\nA\t-0.1\t0.2\t0.3\nB\t0.4\t0.5\t0.6\n"),
    Case("non-numeric", r"counts\.tsv: row 3 \(taxon 'B'\), column 'S2': non-numeric count "
                        r"'abc'; write the count as a plain number$",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t3\nB\t4\tabc\t6\n"),
    Case("thousands-separator", r"column 'S1': non-numeric count '1,200'",
         counts="taxon\tS1\tS2\tS3\nA\t\"1,200\"\t2\t3\nB\t4\t5\t6\n"),
    Case("empty-cell", r"counts\.tsv: row 3 \(taxon 'B'\), column 'S3': empty cell where a "
                       r"count is needed; write 0 where a taxon was not observed$",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t3\nB\t4\t5\t\n"),
    Case("na-cell", r"row 2 \(taxon 'A'\), column 'S1': missing value 'NA' where a count is "
                    r"needed; write 0",
         counts="taxon\tS1\tS2\tS3\nA\tNA\t2\t3\nB\t4\t5\t6\n"),
    Case("infinite", r"column 'S2': non-numeric count 'inf'",
         counts="taxon\tS1\tS2\tS3\nA\t1\tinf\t3\nB\t4\t5\t6\n"),
    Case("non-integer-counts", r"row 2 \(taxon 'A'\), column 'S2': non-integer count 2\.5; "
                               r"round the counts, or give --abundance fraction or percent",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2.5\t3\nB\t4\t5\t6\n", kwargs={"abundance": "counts"}),
    Case("neither-counts-nor-relative", r"counts\.tsv: values are not all whole numbers and "
                                        r"samples sum to .*; give --abundance fraction or percent",
         counts="taxon\tS1\tS2\tS3\nA\t100.5\t2\t3\nB\t4\t5\t6\n"),
    Case("zero-depth-sample", r"counts\.tsv: column 'S2': no reads in sample 'S2' \(every value "
                              r"is 0\); remove the sample",
         counts="taxon\tS1\tS2\tS3\nA\t1\t0\t3\nB\t4\t0\t6\n"),
    Case("fractions-over-one", r"counts\.tsv: column 'S3': abundances of sample 'S3' sum to "
                               r"1\.2, more than 1; check the table, or give --abundance percent$",
         counts="taxon\tS1\tS2\tS3\nA\t0.5\t0.5\t0.6\nB\t0.5\t0.5\t0.6\n",
         kwargs={"abundance": "fraction", "depth": 100}),
    Case("percent-over-100", r"abundances of sample 'S1' sum to 110, more than 100; check the "
                             r"table$",
         counts="taxon\tS1\tS2\tS3\nA\t60.5\t50\t50\nB\t49.5\t50\t50\n",
         kwargs={"abundance": "percent", "depth": 100}),
    Case("relative-without-depth", r"counts\.tsv: relative abundances \(fractions\) need "
                                   r"sequencing depths to become counts; give --depth N or "
                                   r"--depth-by COLUMN$",
         counts="taxon\tS1\tS2\tS3\nA\t0.5\t0.5\t0.25\nB\t0.5\t0.5\t0.75\n"),
    Case("relative-rounds-to-nothing", r"sample 'S1' has no reads after conversion at depth 1",
         counts="taxon\tS1\tS2\tS3\nA\t0.1\t0.5\t0.25\nB\t0.1\t0.5\t0.75\n",
         kwargs={"depth": 1, "remainder": "renormalise"}),
    # counts no sequencing run gives, and digits that are not 0-9
    Case("count-beyond-int64", r"counts\.tsv: row 3 \(taxon 'B'\), column 'S2': count "
                               r"9\.22337e\+18 is more reads than any sequencing run gives "
                               r"\(at most 10\^15\); correct the cell",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t3\nB\t4\t9223372036854775808\t6\n"),
    Case("count-1e300", r"row 2 \(taxon 'A'\), column 'S3': count 1e\+300 is more reads",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t1e300\nB\t4\t5\t6\n"),
    Case("count-just-above-bound", r"column 'S1': count 1e\+15 is more reads than any",
         counts="taxon\tS1\tS2\tS3\nA\t1000000000000001\t2\t3\nB\t4\t5\t6\n"),
    Case("sample-total-above-bound", r"counts\.tsv: column 'S1': sample 'S1' holds 1\.2e\+15 "
                                     r"reads, more than any sequencing run gives",
         counts="taxon\tS1\tS2\tS3\nA\t600000000000000\t2\t3\nB\t600000000000000\t5\t6\n"),
    Case("digit-separator", r"counts\.tsv: row 3 \(taxon 'B'\), column 'S1': '1_234' is not a "
                            r"plain number; write the count with the digits 0-9 only",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t3\nB\t1_234\t5\t6\n"),
    Case("arabic-indic-digits", r"column 'S2': '\u0661\u0662' is not a plain number",
         counts="taxon\tS1\tS2\tS3\nA\t1\t\u0661\u0662\t3\nB\t4\t5\t6\n"),
    Case("fullwidth-digits", r"column 'S3': '\uff13' is not a plain number",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t\uff13\nB\t4\t5\t6\n"),
    Case("depth-above-bound", r"^option --depth: depth 2e\+18 is more reads than any "
                              r"sequencing run gives \(at most 10\^15\)",
         kwargs={"depth": 2e18}),
    Case("depth-column-above-bound", r"meta\.tsv: row 3, column 'reads': depth 1e\+19 of "
                                     r"sample 'S2' is more reads than any sequencing run gives",
         counts="taxon\tS1\tS2\tS3\nA\t0.5\t0.5\t0.25\nB\t0.5\t0.5\t0.75\n",
         meta=meta_with("reads", ["10", "1e19", "10"]), kwargs={"depth_by": "reads"}),
    Case("converted-above-bound", r"counts\.tsv: column 'S1': sample 'S1' holds "
                                  r"1,000,500,000,000,000 reads after conversion at depth "
                                  r"1e\+15, more than 10\^15; give the sample's real depth$",
         counts="taxon\tS1\tS2\tS3\nA\t0.5005\t0.5\t0.25\nB\t0.5\t0.5\t0.75\n",
         kwargs={"depth": 1e15}),
    # ids
    Case("duplicate-sample-header", r"counts\.tsv: header: duplicate sample id 'S1' in columns "
                                    r"2 and 3; give every sample a unique id$",
         counts="taxon\tS1\tS1\tS3\nA\t1\t2\t3\nB\t4\t5\t6\n"),
    Case("duplicate-taxon", r"counts\.tsv: row 4: duplicate taxon id 'A' \(also on row 2\); "
                            r"give every taxon a unique id, or sum the duplicate rows$",
         counts=GOOD + "A\t1\t1\t1\n"),
    Case("empty-taxon-id", r"counts\.tsv: row 3, column 'taxon': empty taxon id; give every "
                           r"row a taxon id$",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t3\n\t4\t5\t6\n"),
    Case("duplicate-meta-sample", r"meta\.tsv: row 4, column 'sample': duplicate sample id "
                                  r"'S2' \(also on row 3\); give each sample one metadata row$",
         meta="sample\tday\nS1\t1\nS2\t2\nS2\t3\nS3\t4\n"),
    Case("empty-meta-sample", r"meta\.tsv: row 3, column 'sample': empty sample id",
         meta="sample\tday\nS1\t1\n\t2\nS3\t4\n"),
    Case("samples-without-metadata", r"meta\.tsv: column 'sample': 5 sample\(s\) of .*counts\.tsv "
                                     r"have no metadata row: 'S3', 'S4', 'S5' \(and 2 more\); add "
                                     r"rows for them",
         counts="taxon\tS1\tS2\tS3\tS4\tS5\tS6\tS7\n"
                "A\t1\t2\t3\t4\t5\t6\t7\nB\t1\t1\t1\t1\t1\t1\t1\n",
         meta="sample\tday\nS1\t1\nS2\t2\n", kwargs={"orientation": "taxa-rows"}),
    # metadata columns and options
    Case("dataset-by-missing", r"meta\.tsv: header: no column 'subject' \(option --dataset-by\); "
                               r"use one of the columns 'sample', 'day', 'site'$",
         meta=META, kwargs={"dataset_by": ["subject"]}),
    Case("time-by-missing", r"no column 'time' \(option --time-by\); use one of the columns",
         meta=META, kwargs={"time_by": "time"}),
    Case("depth-by-missing", r"no column 'reads' \(option --depth-by\)",
         meta=META, kwargs={"depth_by": "reads"}),
    Case("sample-id-missing", r"meta\.tsv: header: no column 'id' \(option --sample-id\)",
         meta=META, kwargs={"sample_id": "id"}),
    Case("replicate-by-missing", r"meta\.tsv: header: no column 'extract' \(option "
                                 r"--replicate-by\); use one of the columns",
         meta=META, kwargs={"replicate_by": "extract"}),
    Case("replicate-by-needs-metadata", r"^option --replicate-by: needs a metadata table; "
                                        r"give --metadata FILE$",
         kwargs={"replicate_by": "extract"}),
    Case("replicate-empty-name", r"meta\.tsv: row 3, column 'extract': empty biological "
                                 r"sample name; write the biological sample",
         meta=meta_with("extract", ["E1", "", "E3"]), kwargs={"replicate_by": "extract"}),
    Case("replicates-at-two-times", r"meta\.tsv: dataset 'counts': samples 'S1' and 'S3' come "
                                    r"from one biological sample \('E1' in column 'extract'\) "
                                    r"but have different times \('1', '3'\); give the "
                                    r"sequenced samples of one biological sample the same time "
                                    r"in column 'day', or different biological sample names$",
         meta="sample\tday\textract\nS1\t1\tE1\nS2\t2\tE2\nS3\t3\tE1\n",
         kwargs={"time_by": "day", "replicate_by": "extract"}),
    Case("option-needs-metadata", r"^option --time-by: needs a metadata table; give "
                                  r"--metadata FILE$", kwargs={"time_by": "day"}),
    Case("depth-zero", r"^option --depth: depth 0 is not a positive number; give the number "
                       r"of reads per sample", kwargs={"depth": 0}),
    Case("depth-negative", r"^option --depth: depth -5 is not a positive", kwargs={"depth": -5}),
    Case("depth-nan", r"^option --depth: depth nan is not a positive",
         kwargs={"depth": float("nan")}),
    Case("depth-text", r"^option --depth: non-numeric depth 'many'", kwargs={"depth": "many"}),
    Case("depth-and-depth-by", r"^option --depth: --depth and --depth-by are both given; give "
                               r"one of them$",
         meta=meta_with("reads", ["10", "10", "10"]), kwargs={"depth": 5, "depth_by": "reads"}),
    Case("depth-column-text", r"meta\.tsv: row 3, column 'reads': non-numeric depth 'lots'; "
                              r"write the depth as a plain number$",
         counts="taxon\tS1\tS2\tS3\nA\t0.5\t0.5\t0.25\nB\t0.5\t0.5\t0.75\n",
         meta=meta_with("reads", ["10", "lots", "10"]), kwargs={"depth_by": "reads"}),
    Case("depth-column-zero", r"meta\.tsv: row 4, column 'reads': depth 0 of sample 'S3' is not "
                              r"positive; give the number of reads",
         counts="taxon\tS1\tS2\tS3\nA\t0.5\t0.5\t0.25\nB\t0.5\t0.5\t0.75\n",
         meta=meta_with("reads", ["10", "20", "0"]), kwargs={"depth_by": "reads"}),
    Case("depth-column-empty", r"meta\.tsv: row 2, column 'reads': empty cell where a depth is "
                               r"needed; give every sample its number of reads$",
         counts="taxon\tS1\tS2\tS3\nA\t0.5\t0.5\t0.25\nB\t0.5\t0.5\t0.75\n",
         meta=meta_with("reads", ["", "20", "10"]), kwargs={"depth_by": "reads"}),
    Case("empty-dataset-value", r"meta\.tsv: row 3, column 'site': empty dataset value",
         meta="sample\tsite\nS1\tx\nS2\t\nS3\tx\n", kwargs={"dataset_by": ["site"]}),
    # times
    Case("duplicate-times", r"meta\.tsv: dataset 'x': samples 'S1' and 'S3' have the same time "
                            r"'2'; give each sample of a time series its own time",
         meta="sample\tday\tsite\nS1\t2\tx\nS2\t1\tx\nS3\t2\tx\n",
         kwargs={"time_by": "day", "dataset_by": ["site"]}),
    Case("duplicate-dates", r"dataset 'counts': samples 'S1' and 'S2' have the same time "
                            r"'2021-05-02T00:00'",
         meta=meta_with("date", ["2021-05-02", "2021-05-02T00:00", "2021-05-03"]),
         kwargs={"time_by": "date"}),
    Case("unparseable-time", r"meta\.tsv: row 3, column 'day': cannot read time 'yesterday'; "
                             r"write days as numbers or dates as YYYY-MM-DD$",
         meta=meta_with("day", ["1", "yesterday", "3"]), kwargs={"time_by": "day"}),
    Case("slashed-date", r"row 2, column 'when': cannot read time '05/01/2021'",
         meta=meta_with("when", ["05/01/2021", "2021-05-02", "2021-05-03"]),
         kwargs={"time_by": "when"}),
    Case("empty-time", r"row 4, column 'day': empty time",
         meta=meta_with("day", ["1", "2", ""]), kwargs={"time_by": "day"}),
    Case("mixed-times", r"meta\.tsv: row 2, column 'day': mixed time formats: '1' is a number "
                        r"but '2021-01-02' \(row 3, column 'day'\) is a date; use either days "
                        r"or ISO dates",
         meta=meta_with("day", ["1", "2021-01-02", "3"]), kwargs={"time_by": "day"}),
    Case("impossible-date", r"row 3, column 'day': impossible date '2021-02-30'",
         meta=meta_with("day", ["2021-02-27", "2021-02-30", "2021-03-03"]),
         kwargs={"time_by": "day"}),
    Case("impossible-hour", r"row 2, column 'day': impossible date '2021-02-27T25:00'",
         meta=meta_with("day", ["2021-02-27T25:00", "2021-02-28", "2021-03-03"]),
         kwargs={"time_by": "day"}),
    Case("offset-without-time", r"row 2, column 'day': cannot read time '2021-02-27Z'",
         meta=meta_with("day", ["2021-02-27Z", "2021-02-28", "2021-03-03"]),
         kwargs={"time_by": "day"}),
    Case("mistyped-year", r"meta\.tsv: dataset 'counts': samples 'S1' \('1025-04-01'\) and "
                          r"'S3' \('2025-04-03'\) are 1000 years apart, more than a sampling "
                          r"campaign of 200 years; correct the times in column 'date'",
         meta=meta_with("date", ["1025-04-01", "2025-04-02", "2025-04-03"]),
         kwargs={"time_by": "date"}),
    Case("days-over-200-years", r"samples 'S1' \('0'\) and 'S3' \('80000'\) are 219 years "
                                r"apart",
         meta=meta_with("day", ["0", "1", "80000"]), kwargs={"time_by": "day"}),
    # dataset size
    Case("too-few-samples", r"counts\.tsv: dataset 'counts': only 2 samples, at least 3 are "
                            r"needed; add samples",
         counts="taxon\tS1\tS2\nA\t1\t2\nB\t4\t5\n"),
    Case("too-few-samples-named", r"meta\.tsv: dataset 'y': only 1 sample,",
         meta="sample\tsite\nS1\tx\nS2\ty\nS3\tx\n", kwargs={"dataset_by": ["site"],
                                                          "min_samples": 2}),
    Case("too-few-taxa", r"counts\.tsv: dataset 'counts': only 1 taxon with reads, at least "
                         r"2 are needed",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t3\nB\t0\t0\t0\n"),
    # files and table shape
    Case("missing-file", r"nothing\.tsv: file not found; check the path$", counts=None,
         counts_name="nothing.tsv"),
    Case("folder", r"folder\.tsv: is a folder, not a file", counts=None, counts_name="folder.tsv",
         extra={"folder.tsv/": ""}),
    Case("binary", r"counts\.tsv: not a text table \(binary content\); export it as CSV or TSV",
         counts=b"PK\x03\x04\x00\x00binary"),
    Case("damaged-gzip", r"counts\.tsv\.gz: damaged gzip file",
         counts=gzip.compress(GOOD.encode())[:20],
         counts_name="counts.tsv.gz"),
    Case("empty-file", r"counts\.tsv: the file is empty; give a table with a header row",
         counts=""),
    Case("blank-file", r"counts\.tsv: the file is empty", counts="\n  \n\n"),
    Case("header-only", r"counts\.tsv: the table has a header but no data rows",
         counts="taxon\tS1\tS2\n"),
    Case("one-column", r"counts\.csv: row 1: no tab or comma in the header line \(one column "
                       r"only\); save the table as tab- or comma-separated text$",
         counts="taxon;S1;S2\nA;1;2\n", counts_name="counts.csv"),
    Case("ragged-long-row", r"counts\.tsv: row 3: 5 fields but the header has 4; give every row "
                            r"one field per header column",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t3\nB\t4\t5\t6\t7\n"),
    Case("ragged-short-row", r"counts\.tsv: row 4: 3 fields but the header has 4",
         counts="taxon\tS1\tS2\tS3\nA\t1\t2\t3\n\nB\t4\t5\n"),
    Case("unnamed-column", r"counts\.tsv: header: column 3 has no name; name every column",
         counts="taxon\tS1\t\tS3\nA\t1\t2\t3\nB\t4\t5\t6\n"),
    # orientation and layout
    Case("no-id-matches-metadata", r"counts\.tsv: no row or column id matches a metadata sample "
                                   r"id; check --sample-id",
         meta="sample\tday\nX1\t1\nX2\t2\nX3\t3\n"),
    Case("ambiguous-orientation", r"counts\.tsv: 1 row ids and 1 column ids match metadata sample "
                                  r"ids; give --orientation taxa-rows or taxa-columns$",
         counts="id\tS1\tT2\tT3\nS2\t1\t2\t3\nT4\t4\t5\t6\n", meta="sample\nS1\nS2\n"),
    Case("orientation-on-long", r"^option --orientation: applies to wide tables only, but .*counts"
                                r"\.tsv is a long table; drop it, or give --layout wide$",
         counts=LONG, kwargs={"orientation": "taxa-rows"}),
    Case("long-duplicate-pair", r"counts\.tsv: row 8: sample 'S2' and taxon 'A' also appear on "
                                r"row 3; list each sample-taxon pair once",
         counts=LONG + "S2\tA\t9\n"),
    Case("long-missing-role", r"counts\.tsv: header: a long table needs a count \(or abundance, "
                              r"value, reads\) column; name the columns sample, taxon and count",
         counts="sample\ttaxon\tn\nS1\tA\t1\n", kwargs={"layout": "long"}),
    Case("long-empty-sample", r"counts\.tsv: row 3, column 'sample': empty sample id",
         counts="sample\ttaxon\tcount\nS1\tA\t1\n\tA\t2\n"),
    Case("long-bad-count", r"counts\.tsv: row 2 \(sample 'S1', taxon 'A'\), column 'count': "
                           r"non-numeric count 'x'",
         counts="sample\ttaxon\tcount\nS1\tA\tx\n"),
    # aggregation
    Case("rank-without-lineage", r"^option --rank: needs lineages to aggregate taxa; give "
                                 r"--lineage COLUMN or --taxon-map FILE$",
         kwargs={"rank": "genus"}),
    Case("lineage-and-map", r"^option --lineage: --lineage and --taxon-map are both given",
         kwargs={"lineage": "tax", "taxon_map": "map.tsv"}, extra={"map.tsv": "A\tg\n"}),
    Case("unknown-rank", r"^option --rank: unknown rank 'genera'; use kingdom, phylum",
         counts="taxon\tS1\tS2\tS3\ttax\nA\t1\t2\t3\tx;y\nB\t4\t5\t6\tx;z\n",
         kwargs={"rank": "genera", "lineage": "tax"}),
    Case("lineage-column-missing", r"counts\.tsv: header: no column 'tax' \(option --lineage\); "
                                   r"use one of the columns 'taxon', 'S1', 'S2', 'S3'$",
         kwargs={"rank": "genus", "lineage": "tax"}),
    Case("lineage-with-taxa-columns", r"^option --lineage: a lineage column needs taxa as rows",
         counts="sample\tA\tB\ttax\nS1\t1\t2\tx\nS2\t1\t2\tx\nS3\t1\t2\tx\n",
         kwargs={"rank": "genus", "lineage": "tax", "orientation": "taxa-columns"}),
    Case("long-conflicting-lineage", r"counts\.tsv: row 3, column 'lineage': taxon has lineage "
                                     r"'k__B;g__Y' here but 'k__B;g__X' on row 2",
         counts="sample\ttaxon\tcount\tlineage\nS1\tA\t1\tk__B;g__X\nS2\tA\t2\tk__B;g__Y\n",
         kwargs={"rank": "genus", "lineage": "lineage"}),
    Case("map-three-columns", r"map\.tsv: header: a taxon map needs exactly two columns \(taxon, "
                              r"group\), found 3",
         kwargs={"taxon_map": "map.tsv"}, extra={"map.tsv": "taxon\tgroup\tx\nA\tg\t1\n"}),
    Case("map-duplicate", r"map\.tsv: row 4: taxon 'A' is mapped twice \(also on row 2\)",
         kwargs={"taxon_map": "map.tsv"}, extra={"map.tsv": "taxon\tgroup\nA\tg\nB\tg\nA\th\n"}),
    Case("map-missing", r"nomap\.tsv: file not found", kwargs={"taxon_map": "nomap.tsv"}),
]


def write_case(tmp_path: Path, case: Case) -> tuple[Path, dict]:
    """Write the files of a case; return the counts path and the call's keyword arguments."""
    if case.counts is not None:
        data = case.counts if isinstance(case.counts, bytes) else case.counts.encode()
        (tmp_path / case.counts_name).write_bytes(data)
    for name, text in case.extra.items():
        if name.endswith("/"):
            (tmp_path / name).mkdir()
        else:
            (tmp_path / name).write_text(text)
    kwargs = dict(case.kwargs)
    if case.meta is not None:
        (tmp_path / "meta.tsv").write_text(case.meta)
        kwargs["metadata"] = tmp_path / "meta.tsv"
    if "taxon_map" in kwargs:
        kwargs["taxon_map"] = tmp_path / kwargs["taxon_map"]
    return tmp_path / case.counts_name, kwargs


def checksums(folder: Path) -> dict[str, tuple[str, int]]:
    """SHA-256 and modification time of every file in ``folder``."""
    return {p.name: (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
            for p in folder.iterdir() if p.is_file()}


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input_gives_one_line_error(tmp_path, case):
    counts, kwargs = write_case(tmp_path, case)
    before = checksums(tmp_path)
    with pytest.raises(InputError) as caught:
        read_datasets(counts, **kwargs)
    error = caught.value
    message = error.one_line(OPTIONS)  # as the command line words it
    assert "\n" not in message and "\r" not in message
    assert re.search(case.pattern, message), message
    # a file (or a parameter, which the command line words as its option) and a fix
    assert (error.file or error.parameter) and error.fix, message
    assert str(error).startswith(error.file or f"parameter {error.parameter}: ")
    assert str(error).endswith(error.fix)
    assert "--" not in str(error)  # the library names parameters, not options
    assert "Traceback" not in message and "pandas" not in message.lower()
    assert checksums(tmp_path) == before  # input files are never modified


def test_error_ids_are_unique():
    assert len({c.id for c in CASES}) == len(CASES)


def test_successful_read_leaves_inputs_unchanged(tmp_path):
    (tmp_path / "counts.tsv.gz").write_bytes(gzip.compress(
        "taxon\tS1\tS2\tS3\tS4\nA\t0.5\t0.2\t0.1\t0.3\nB\t0.25\t0.7\t0.2\t0.3\n".encode()))
    (tmp_path / "meta.csv").write_text("sample,day,reads\nS1,2021-01-01,100\nS2,2021-01-03,200\n"
                                       "S3,2021-01-02,300\nS4,2021-01-09,400\nS5,2021-01-10,1\n")
    (tmp_path / "map.tsv").write_text("A\tone\nB\tone\n")
    before = checksums(tmp_path)
    (dataset,) = read_datasets(tmp_path / "counts.tsv.gz", tmp_path / "meta.csv", time_by="day",
                               depth_by="reads", taxon_map=tmp_path / "map.tsv", min_taxa=1)
    assert checksums(tmp_path) == before
    assert dataset.taxa == ("one", "other") and len(dataset.warnings) == 1


def test_metadata_rows_without_samples_are_a_warning(tmp_path):
    (tmp_path / "counts.tsv").write_text(GOOD)
    (tmp_path / "meta.tsv").write_text(META + "S9\t9\tx\n")
    (dataset,) = read_datasets(tmp_path / "counts.tsv", tmp_path / "meta.tsv", time_by="day")
    assert dataset.warnings == (f"1 metadata row(s) of {tmp_path / 'meta.tsv'} have no sample "
                                f"in {tmp_path / 'counts.tsv'} and were ignored: 'S9'",)


def test_counts_summing_to_100_warn_about_percentages(tmp_path):
    (tmp_path / "counts.tsv").write_text("taxon\tS1\tS2\tS3\nA\t60\t50\t1\nB\t40\t50\t99\n")
    (dataset,) = read_datasets(tmp_path / "counts.tsv")
    assert any("--abundance percent" in w for w in dataset.warnings)


def test_single_read_samples_are_a_warning(tmp_path):
    (tmp_path / "counts.tsv").write_text("taxon\tS1\tS2\tS3\nA\t1\t5\t0\nB\t0\t5\t1\n")
    (dataset,) = read_datasets(tmp_path / "counts.tsv")
    assert dataset.warnings == ("2 samples have a single read ('S1', 'S3'); consider removing "
                                "them",)


def test_programming_errors_are_not_input_errors(tmp_path):
    (tmp_path / "counts.tsv").write_text(GOOD)
    with pytest.raises(ValueError) as caught:
        read_datasets(tmp_path / "counts.tsv", layout="sideways")  # type: ignore[arg-type]
    assert not isinstance(caught.value, InputError)


# ----------------------------------------------------------------------------- the command line
SERIES = ("taxon\tS1\tS2\tS3\tS4\tS5\nA\t10\t12\t9\t14\t11\nB\t30\t25\t33\t28\t31\n"
          "C\t5\t7\t4\t6\t8\n")
SERIES_META = "sample\tday\nS1\t0\nS2\t1\nS3\t2\nS4\t3\nS5\t4\n"
TEST = ["test", "{in}/counts.tsv", "--metadata", "{in}/meta.tsv", "--time-by", "day",
        "--replicates", "19", "--groupings", "2", "--no-influence"]
SCREEN = ["screen", *TEST[1:], "--quiet"]


@dataclass
class CliCase:
    """One mistake on the command line: arguments (``{in}``: the inputs' folder, ``{tmp}``:
    a scratch folder holding the file ``a-file``), files to make (content ``"/"``: a
    folder, ``"|"``: a named pipe), links to make, expected message."""

    id: str
    pattern: str
    arguments: list[str]
    make: dict[str, str | bytes] = field(default_factory=dict)
    links: dict[str, str] = field(default_factory=dict)
    counts: str = SERIES
    counts_name: str = "counts.tsv"


CLI_CASES = [
    # output places
    CliCase("out-is-a-file", r"^driftscreen: error: .*a-file: option --out: is a file, not a "
                             r"folder; give a folder \(it is created if needed\)$",
            SCREEN + ["--out", "{tmp}/a-file"]),
    CliCase("out-is-a-pipe", r"pipe: option --out: is a file, not a folder",
            SCREEN + ["--out", "{tmp}/pipe"], make={"pipe": "|"}),
    CliCase("out-is-link-to-file", r"link: option --out: is a file, not a folder",
            SCREEN + ["--out", "{tmp}/link"], links={"link": "a-file"}),
    CliCase("out-is-a-broken-link", r"broken: option --out: is a link to nothing; remove the "
                                    r"link, or give another folder$",
            SCREEN + ["--out", "{tmp}/broken"], links={"broken": "nowhere"}),
    CliCase("out-under-a-file", r"a-file/out: option --out: is under the file .*a-file, not in "
                                r"a folder; give a path in a folder$",
            SCREEN + ["--out", "{tmp}/a-file/out"]),
    CliCase("out-would-overwrite-input", r"results\.tsv: option --out: is the input file "
                                         r".*results\.tsv \(inputs are never overwritten\); "
                                         r"give another file name$",
            ["screen", "{in}/results.tsv", "--replicates", "19", "--quiet", "--out", "{in}"],
            counts_name="results.tsv"),
    CliCase("output-is-a-folder", r"option --output: is a folder, not a file; give a file name",
            TEST + ["--output", "{tmp}"]),
    CliCase("output-under-a-file", r"a-file/report\.txt: option --output: is under the file",
            TEST + ["--output", "{tmp}/a-file/report.txt"]),
    CliCase("output-is-the-counts", r"counts\.tsv: option --output: is the input file "
                                    r".*counts\.tsv \(inputs are never overwritten\)",
            TEST + ["--output", "{in}/counts.tsv"]),
    CliCase("output-links-to-the-counts", r"link: option --output: is the input file",
            TEST + ["--output", "{tmp}/link"], links={"link": "{in}/counts.tsv"}),
    CliCase("output-is-a-pipe", r"pipe: option --output: is not a regular file",
            TEST + ["--output", "{tmp}/pipe"], make={"pipe": "|"}),
    CliCase("figures-in-the-output", r"r\.txt: option --figures: is also given as --output; "
                                     r"give --figures a place of its own$",
            TEST + ["--output", "{tmp}/r.txt", "--figures", "{tmp}/r.txt"]),
    CliCase("table-is-the-output", r"r\.txt: option --table: is also given as --output",
            ["power", "--taxa", "5", "--samples", "10", "--interval", "1", "--depth", "100",
             "--output", "{tmp}/r.txt", "--table", "{tmp}/r.txt"]),
    # a damaged resume store
    *[CliCase(f"store-{label}", r"out: option --out: holds a \.driftscreen folder that is not a "
                                r"resume store of this driftscreen version \(settings\.json is "
                                r"unreadable or of another layout\); give a new --out folder, "
                                r"or remove .*out/\.driftscreen to start afresh$",
              SCREEN + ["--out", "{tmp}/out"],
              make={"out/.driftscreen/settings.json": content})
      for label, content in (("settings-not-utf8", b"\xff\xfe{}"), ("settings-list", "[1]"),
                             ("inputs-list", '{"inputs": [1]}'),
                             ("inputs-number", '{"inputs": {"counts": 5}}'),
                             ("sha256-number", '{"inputs": {"counts": {"sha256": 7}}}'),
                             ("settings-folder", "/"))],
    CliCase("store-records-without-settings", r"not a resume store of this driftscreen version "
                                              r"\(it has records but no settings\.json\)",
            SCREEN + ["--out", "{tmp}/out"], make={"out/.driftscreen/datasets/x.json": b"\xff"}),
    # options the library refuses
    CliCase("seed-negative", r"^driftscreen test: error: argument --seed: must be a whole number "
                             r">= 0, got -1; see 'driftscreen test --help'$",
            TEST + ["--seed", "-1"]),
    CliCase("seed-negative-screen", r"argument --seed: must be a whole number >= 0, got -1",
            SCREEN + ["--seed", "-1", "--out", "{tmp}/out"]),
    CliCase("groupings-one", r"argument --groupings: must be a whole number >= 2, got 1",
            TEST + ["--groupings", "1"]),
    CliCase("jobs-zero", r"argument --jobs: must be a whole number >= 1, got 0",
            TEST + ["--jobs", "0"]),
    CliCase("depth-option-above-bound", r"argument --depth: must be a number of reads above 0 "
                                        r"and at most 10\^15, got 9\.3e18",
            TEST + ["--depth", "9.3e18"]),
    CliCase("simulate-depth-above-bound", r"argument --depth: must be a whole number from 1 to "
                                          r"10\^15, got 10000000000000000000",
            ["simulate", "--out", "{tmp}/sim", "--depth", "10000000000000000000"]),
    CliCase("read-precision-too-small", r"argument --read-noise: a read precision must be a "
                                        r"number >= 1e-06, got 1e-300",
            TEST + ["--read-noise", "1e-300"]),
    CliCase("simulate-interval-too-small", r"argument --interval: must be a number from 1e-06 "
                                           r"to 73050, got 1e-300",
            ["simulate", "--out", "{tmp}/sim", "--interval", "1e-300"]),
    CliCase("simulate-theta-too-large", r"argument --theta: must be a number from 1e-06 to "
                                        r"1e\+12, got 1e300",
            ["simulate", "--out", "{tmp}/sim", "--theta", "1e300"]),
    CliCase("simulate-depth-spread-too-large", r"argument --depth-spread: must be a number from "
                                               r"0 to 5, got 1000",
            ["simulate", "--out", "{tmp}/sim", "--depth-spread", "1000"]),
    CliCase("simulate-span-over-200-years", r"^driftscreen: error: option --interval: 100 "
                                            r"samples every 1000 days span 271 years, more than "
                                            r"a sampling campaign of 200 years; give fewer",
            ["simulate", "--out", "{tmp}/sim", "--interval", "1000", "--samples", "100"]),
    # the size limits of the analysis
    CliCase("three-sample-series", r"^driftscreen: error: .*counts\.tsv, .*meta\.tsv: dataset "
                                   r"'counts': a time series needs at least 4 samples, this "
                                   r"dataset has 3; add samples",
            TEST, counts="taxon\tS1\tS2\tS3\nA\t10\t12\t9\nB\t30\t25\t33\n"),
    CliCase("three-sample-series-power", r"dataset 'counts': a time series needs at least 4 "
                                         r"samples, this dataset has 3; choose another dataset",
            ["power", *TEST[1:6], "--datasets", "2"],
            counts="taxon\tS1\tS2\tS3\nA\t10\t12\t9\nB\t30\t25\t33\n"),
]


def make_cli_case(tmp_path: Path, case: CliCase) -> list[str]:
    """Write the case's inputs (in ``tmp/in``) and files; its arguments with paths filled in."""
    inputs, scratch = tmp_path / "in", tmp_path / "tmp"
    inputs.mkdir()
    scratch.mkdir()
    (inputs / case.counts_name).write_text(case.counts, encoding="utf-8")
    (inputs / "meta.tsv").write_text(SERIES_META, encoding="utf-8")
    (scratch / "a-file").write_text("keep me\n", encoding="utf-8")

    def filled(text: str) -> str:
        return text.replace("{in}", str(inputs)).replace("{tmp}", str(scratch))

    for name, content in case.make.items():
        path = scratch / name
        path.parent.mkdir(parents=True, exist_ok=True)
        if content == "/":
            path.mkdir()
        elif content == "|":  # a special file, like /dev/null (which no test may touch)
            os.mkfifo(path)
        elif isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content, encoding="utf-8")
    for name, target in case.links.items():
        (scratch / name).symlink_to(scratch / filled(target))
    return [filled(argument) for argument in case.arguments]


@pytest.mark.parametrize("case", CLI_CASES, ids=[c.id for c in CLI_CASES])
def test_bad_command_line_gives_one_line_and_exit_2(tmp_path, case):
    arguments = make_cli_case(tmp_path, case)
    before = {**checksums(tmp_path / "in"), **checksums(tmp_path / "tmp")}
    status, _, stderr = run_cli(arguments)
    assert status == 2, stderr
    assert stderr.count("\n") == 1 and stderr.endswith("\n"), stderr
    assert re.search(case.pattern, stderr.rstrip("\n")), stderr
    assert {**checksums(tmp_path / "in"), **checksums(tmp_path / "tmp")} == before


def test_cli_case_ids_are_unique():
    assert len({c.id for c in CLI_CASES}) == len(CLI_CASES)
