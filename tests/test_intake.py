"""Reading abundance tables and metadata into datasets (driftscreen.intake)."""

from __future__ import annotations

import datetime
import gzip
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from driftscreen.dataset import Dataset, Design
from driftscreen.intake import read_datasets, write_tables

# Invented example: 4 taxa x 5 samples.
TAXA = ("Alpha_1", "Beta_2", "Gamma_3", "Delta_4")
SAMPLES = ("S1", "S2", "S3", "S4", "S5")
COUNTS = np.array([[10, 0, 5, 1],
                   [20, 3, 0, 2],
                   [5, 5, 5, 5],
                   [0, 9, 1, 7],
                   [12, 1, 4, 0]])  # (samples, taxa)


def write(path: Path, text: str) -> Path:
    """Write text (gzip-compressed for a .gz name)."""
    if path.suffix == ".gz":
        path.write_bytes(gzip.compress(text.encode()))
    else:
        path.write_text(text)
    return path


def wide_text(values: np.ndarray, rows: tuple[str, ...], columns: tuple[str, ...],
              first: str, sep: str = "\t") -> str:
    lines = [sep.join((first,) + columns)]
    lines += [sep.join([r] + [f"{v:g}" for v in row]) for r, row in zip(rows, values)]
    return "\n".join(lines) + "\n"


def taxa_rows(sep: str = "\t", first: str = "taxon", values: np.ndarray = COUNTS) -> str:
    return wide_text(values.T, TAXA, SAMPLES, first, sep)


def only(datasets: list[Dataset]) -> Dataset:
    assert len(datasets) == 1
    return datasets[0]


def assert_standard(dataset: Dataset) -> None:
    np.testing.assert_array_equal(dataset.counts, COUNTS)
    assert dataset.taxa == TAXA
    assert dataset.samples == SAMPLES
    np.testing.assert_array_equal(dataset.design.depths, COUNTS.sum(axis=1))


# --- wide tables, orientation, formats --------------------------------------------------

@pytest.mark.parametrize("name,sep", [("counts.tsv", "\t"), ("counts.csv", ","),
                                      ("counts.txt", "\t"), ("counts.tsv.gz", "\t"),
                                      ("counts.csv.gz", ",")])
def test_wide_taxa_rows_in_every_format(tmp_path, name, sep):
    path = write(tmp_path / name, taxa_rows(sep))
    dataset = only(read_datasets(path))
    assert_standard(dataset)
    assert dataset.name == "counts"
    assert not dataset.is_time_series
    assert dataset.source == (str(path),)


def test_wide_taxa_columns_detected_from_first_column_name(tmp_path):
    path = write(tmp_path / "c.csv", wide_text(COUNTS, SAMPLES, TAXA, "SampleID", ","))
    assert_standard(only(read_datasets(path)))


def test_orientation_from_metadata_ids(tmp_path):
    # first column name says nothing; the header matches metadata sample ids
    counts = write(tmp_path / "c.tsv", taxa_rows(first="id"))
    meta = write(tmp_path / "m.tsv", "sample\tgroup\n" + "".join(f"{s}\tg\n" for s in SAMPLES))
    assert_standard(only(read_datasets(counts, meta)))
    # same data transposed: the row ids match
    counts_t = write(tmp_path / "ct.tsv", wide_text(COUNTS, SAMPLES, TAXA, "id"))
    assert_standard(only(read_datasets(counts_t, meta)))


def test_orientation_heuristic_longer_axis_and_override(tmp_path):
    # 4 rows (taxa) x 5 columns: without a hint the longer axis (columns) is read as taxa
    path = write(tmp_path / "c.tsv", taxa_rows(first="id"))
    guessed = only(read_datasets(path))
    assert guessed.taxa == SAMPLES and guessed.samples == TAXA
    assert any("taxa as columns" in note for note in guessed.notes)
    # the override always wins
    assert_standard(only(read_datasets(path, orientation="taxa-rows")))
    named = write(tmp_path / "n.tsv", taxa_rows(first="taxon"))
    flipped = only(read_datasets(named, orientation="taxa-columns"))
    assert flipped.samples == TAXA


def test_long_table_with_missing_pairs_as_zero(tmp_path):
    rows = ["Sample,Taxon,Abundance"]
    rows += [f"{s},{t},{COUNTS[i, j]}" for i, s in enumerate(SAMPLES)
             for j, t in enumerate(TAXA) if COUNTS[i, j] > 0]
    path = write(tmp_path / "long.csv", "\n".join(rows) + "\n")
    dataset = only(read_datasets(path))
    assert dataset.taxa == ("Alpha_1", "Gamma_3", "Delta_4", "Beta_2")  # first appearance
    order = [dataset.taxa.index(t) for t in TAXA]
    np.testing.assert_array_equal(dataset.counts[:, order], COUNTS)
    assert dataset.samples == SAMPLES


def test_long_table_column_names_and_order(tmp_path):
    rows = ["reads\tOTU\tsample"]
    rows += [f"{COUNTS[i, j]}\t{t}\t{s}" for i, s in enumerate(SAMPLES) for j, t in enumerate(TAXA)]
    path = write(tmp_path / "long.tsv", "\n".join(rows) + "\n")
    assert_standard(only(read_datasets(path, layout="long")))


def test_file_conventions(tmp_path):
    """Comment line + '#OTU ID' header, BOM, CRLF, row-name header, trailing delimiter."""
    # Source: BIOM format, classic tab-separated form with '# Constructed from biom file'
    # and '#OTU ID' header lines; McDonald et al. (2012) GigaScience 1:7 (from memory)
    text = "# Constructed from biom file\n" + taxa_rows(first="#OTU ID")
    assert_standard(only(read_datasets(write(tmp_path / "biom.tsv", text))))
    crlf = "\ufeff" + taxa_rows(first="taxon").replace("\n", "\r\n")
    assert_standard(only(read_datasets(write(tmp_path / "crlf.tsv", crlf))))
    # a header without the row-name field (one field short of every row)
    short = taxa_rows().split("\n", 1)
    rownames = short[0].split("\t", 1)[1] + "\n" + short[1]
    assert_standard(only(read_datasets(write(tmp_path / "r.tsv", rownames),
                                       orientation="taxa-rows")))
    trailing = "".join(line + ",\n" for line in taxa_rows(",").splitlines())
    assert_standard(only(read_datasets(write(tmp_path / "t.csv", trailing))))


@pytest.mark.parametrize("name, encoding", [("Bacillus sp.\u2026", "cp1252"),
                                            ("Nitrosom\u00f6nas", "cp1252"),
                                            ("Bacillus\u2028sp", "utf-8"),
                                            ("Bacillus\x0csp", "utf-8")])
def test_taxon_names_in_single_byte_encodings_or_with_odd_breaks(tmp_path, name, encoding):
    # Windows-1252 writes the ellipsis as byte 0x85, which is NEL (a line break to Python)
    # in Latin-1 (Microsoft's code page 1252 table, from memory); U+2028 and form feed are
    # line breaks to str.splitlines but not to a table.
    text = "taxon\tS1\tS2\tS3\nA\t1\t2\t3\n" + name + "\t4\t5\t6\n"
    path = tmp_path / "names.tsv"
    path.write_bytes(text.encode(encoding))
    assert only(read_datasets(path)).taxa == ("A", name)


def test_lineage_column_is_not_read_as_a_sample(tmp_path):
    lines = taxa_rows().splitlines()
    text = lines[0] + "\ttaxonomy\n" + "".join(f"{line}\tk__Bacteria\n" for line in lines[1:])
    dataset = only(read_datasets(write(tmp_path / "c.tsv", text)))
    assert_standard(dataset)
    assert any("'taxonomy'" in note for note in dataset.notes)


def test_all_zero_taxa_are_dropped_and_counted(tmp_path):
    values = np.column_stack([COUNTS, np.zeros(5, dtype=int)])
    text = wide_text(values.T, TAXA + ("Zero_5",), SAMPLES, "taxon")
    dataset = only(read_datasets(write(tmp_path / "c.tsv", text)))
    assert_standard(dataset)
    assert dataset.dropped_taxa == 1
    assert "dropped 1 taxa with no reads" in dataset.notes


# --- metadata, datasets, times -----------------------------------------------------------

def metadata_file(tmp_path: Path, header: str, rows: list[str], name: str = "meta.tsv") -> Path:
    return write(tmp_path / name, header + "\n" + "\n".join(rows) + "\n")


def test_metadata_join_strips_whitespace_and_warns_on_extra_rows(tmp_path):
    counts = write(tmp_path / "c.tsv", taxa_rows())
    meta = metadata_file(tmp_path, "sample\tsite",
                         [f" {s} \tx" for s in SAMPLES] + ["S99\tx", "S98\tx"])
    dataset = only(read_datasets(counts, meta))
    assert_standard(dataset)
    assert len(dataset.warnings) == 1
    assert "2 metadata row(s)" in dataset.warnings[0] and "'S99'" in dataset.warnings[0]


def test_sample_id_column_and_dataset_by_one_column(tmp_path):
    counts = write(tmp_path / "c.tsv", taxa_rows())
    meta = metadata_file(tmp_path, "site\tlabel",
                         ["north\tS1", "south\tS2", "north\tS3", "south\tS4", "north\tS5"])
    datasets = read_datasets(counts, meta, sample_id="label", dataset_by=["site"], min_samples=2)
    as_text = read_datasets(counts, meta, sample_id="label", dataset_by="site", min_samples=2)
    assert [d.samples for d in as_text] == [d.samples for d in datasets]
    assert [d.name for d in datasets] == ["north", "south"]
    north, south = datasets
    assert north.samples == ("S1", "S3", "S5") and south.samples == ("S2", "S4")
    np.testing.assert_array_equal(north.counts, COUNTS[[0, 2, 4]])
    np.testing.assert_array_equal(south.counts, COUNTS[[1, 3]])
    for d in datasets:
        np.testing.assert_array_equal(d.design.depths, d.counts.sum(axis=1))


def test_dataset_by_two_columns(tmp_path):
    counts = write(tmp_path / "c.tsv", taxa_rows())
    meta = metadata_file(tmp_path, "sample\tsubject\tsite",
                         ["S1\tB\tgut", "S2\tA\tgut", "S3\tB\tgut", "S4\tA\tskin", "S5\tA\tgut"])
    datasets = read_datasets(counts, meta, dataset_by=["subject", "site"], min_samples=1)
    assert [d.name for d in datasets] == ["A/gut", "A/skin", "B/gut"]
    assert [d.samples for d in datasets] == [("S2", "S5"), ("S4",), ("S1", "S3")]
    # A/skin holds S4 only, with counts (0, 9, 1, 7): Alpha_1 has no reads there and is dropped
    assert datasets[1].taxa == ("Beta_2", "Gamma_3", "Delta_4") and datasets[1].dropped_taxa == 1


def test_iso_dates_become_days_since_first_sample(tmp_path):
    counts = write(tmp_path / "c.tsv", taxa_rows())
    dates = ["2020-03-01", "2020-02-28", "2020-03-01T12:00", "2021-02-28", "2021-03-01"]
    meta = metadata_file(tmp_path, "sample\twhen", [f"{s}\t{d}" for s, d in zip(SAMPLES, dates)])
    dataset = only(read_datasets(counts, meta, time_by="when"))
    # Source: Gregorian calendar leap-year rule (2020 is a leap year: 29 February exists,
    # 2021 is not); reference values from the standard library's proleptic Gregorian dates.
    first = datetime.date(2020, 2, 28)
    expected = sorted([(datetime.date(2020, 3, 1) - first).days,
                       0.0,
                       (datetime.date(2020, 3, 1) - first).days + 0.5,
                       (datetime.date(2021, 2, 28) - first).days,
                       (datetime.date(2021, 3, 1) - first).days])
    np.testing.assert_allclose(dataset.design.times, expected)
    np.testing.assert_allclose(dataset.design.times, [0, 2, 2.5, 366, 367])
    assert dataset.samples == ("S2", "S1", "S3", "S4", "S5")
    np.testing.assert_array_equal(dataset.counts, COUNTS[[1, 0, 2, 3, 4]])
    assert any("days since the dataset's first sample (2020-02-28)" in n for n in dataset.notes)


def test_date_times_and_utc_offsets(tmp_path):
    counts = write(tmp_path / "c.tsv", taxa_rows())
    # Source: ISO 8601 time offsets: 10:00+02:00 is 08:00 UTC; 'Z' means UTC.
    stamps = ["2021-05-02T10:00+02:00", "2021-05-02T20:00Z", "2021-05-03 08:00:00",
              "2021-05-03T09:30:00.0", "2021-05-04"]
    meta = metadata_file(tmp_path, "sample\twhen", [f"{s}\t{d}" for s, d in zip(SAMPLES, stamps)])
    dataset = only(read_datasets(counts, meta, time_by="when"))
    np.testing.assert_allclose(dataset.design.times, [0, 0.5, 1, 1 + 1.5 / 24, 16 / 24 + 1],
                               rtol=0, atol=1e-12)


def test_century_leap_rule(tmp_path):
    # Source: Gregorian calendar (Inter gravissimas, 1582): 2000 is a leap year, 1900 is not.
    counts = write(tmp_path / "c.tsv", taxa_rows())
    meta = metadata_file(tmp_path, "sample\tdate\tyear",
                         ["S1\t1900-02-28\ta", "S2\t1900-03-01\ta", "S3\t2000-02-28\tb",
                          "S4\t2000-03-01\tb", "S5\t2000-03-02\tb"])
    a, b = read_datasets(counts, meta, time_by="date", dataset_by=["year"], min_samples=2)
    np.testing.assert_array_equal(a.design.times, [0, 1])
    np.testing.assert_array_equal(b.design.times, [0, 2, 3])


def test_numeric_times_sorted_per_dataset(tmp_path):
    counts = write(tmp_path / "c.tsv", taxa_rows())
    meta = metadata_file(tmp_path, "sample\tday", ["S1\t3.5", "S2\t-1", "S3\t0.25", "S4\t10",
                                                   "S5\t7"])
    dataset = only(read_datasets(counts, meta, time_by="day"))
    np.testing.assert_array_equal(dataset.design.times, [-1, 0.25, 3.5, 7, 10])
    assert dataset.samples == ("S2", "S3", "S1", "S5", "S4")
    np.testing.assert_array_equal(dataset.design.depths, dataset.counts.sum(axis=1))


def test_snapshot_keeps_file_order(tmp_path):
    counts = write(tmp_path / "c.tsv", taxa_rows())
    meta = metadata_file(tmp_path, "sample\tday", [f"{s}\t{5 - k}" for k, s in enumerate(SAMPLES)])
    dataset = only(read_datasets(counts, meta))
    assert dataset.design.times is None and dataset.samples == SAMPLES


# --- relative abundances -----------------------------------------------------------------

FRACTIONS = np.array([[0.5, 0.25, 0.25, 0.0],
                      [0.1, 0.2, 0.3, 0.4],
                      [0.123, 0.377, 0.0, 0.5],
                      [0.0, 0.0, 0.99, 0.01],
                      [0.25, 0.25, 0.25, 0.25]])


def test_fractions_with_one_depth(tmp_path):
    path = write(tmp_path / "rel.tsv", taxa_rows(values=FRACTIONS))
    dataset = only(read_datasets(path, depth=1000))
    # common practice: counts = round(fraction * depth)
    np.testing.assert_array_equal(dataset.counts, np.rint(FRACTIONS * 1000))
    np.testing.assert_array_equal(dataset.design.depths, [1000] * 5)
    assert any("fraction abundances to counts at depth 1000" in n for n in dataset.notes)
    assert any("as fractions" in n for n in dataset.notes)


def test_percent_with_depth_column(tmp_path):
    path = write(tmp_path / "rel.csv", taxa_rows(",", values=FRACTIONS * 100))
    depths = [2000, 500, 1000, 10000, 40]
    meta = metadata_file(tmp_path, "sample,reads", [f"{s},{d}" for s, d in zip(SAMPLES, depths)],
                         "m.csv")
    dataset = only(read_datasets(path, meta, depth_by="reads"))
    np.testing.assert_array_equal(dataset.counts, np.rint(FRACTIONS * np.array(depths)[:, None]))
    assert any("percent abundances to counts" in n and "column 'reads'" in n
               for n in dataset.notes)
    explicit = only(read_datasets(path, meta, depth_by="reads", abundance="percent"))
    np.testing.assert_array_equal(explicit.counts, dataset.counts)


def test_incomplete_fractions_pool_remainder_as_other(tmp_path):
    partial = FRACTIONS.copy()
    partial[:, 3] = 0  # the last taxon was cut from the table
    path = write(tmp_path / "rel.tsv", taxa_rows(values=partial))
    dataset = only(read_datasets(path, depth=1000))
    assert dataset.taxa == TAXA[:3] + ("other",)
    listed = np.rint(partial[:, :3] * 1000)
    np.testing.assert_array_equal(dataset.counts[:, :3], listed)
    np.testing.assert_array_equal(dataset.counts[:, 3], 1000 - listed.sum(axis=1))
    np.testing.assert_array_equal(dataset.design.depths, [1000] * 5)
    assert dataset.dropped_taxa == 1
    share = np.mean(1 - partial.sum(axis=1))  # the first sample is complete (share 0)
    assert f"(mean {share:.1%} of reads)" in " ".join(dataset.notes)
    assert read_datasets(path, depth=1000, remainder="pool")[0].counts.tolist() == \
        dataset.counts.tolist()


def test_sums_within_tolerance_are_complete(tmp_path):
    # rows summing to 1 within the relative tolerance 1e-3 get no remainder
    values = np.array([[0.5, 0.4995], [0.3, 0.7005], [0.25, 0.75]])
    text = wide_text(values.T, ("a", "b"), ("S1", "S2", "S3"), "taxon")
    dataset = only(read_datasets(write(tmp_path / "rel.tsv", text), depth=10000))
    assert dataset.taxa == ("a", "b")
    np.testing.assert_array_equal(dataset.design.depths, [9995, 10005, 10000])


def test_incomplete_fractions_renormalised(tmp_path):
    partial = FRACTIONS.copy()
    partial[:, 3] = 0
    path = write(tmp_path / "rel.tsv", taxa_rows(values=partial))
    dataset = only(read_datasets(path, depth=1000, remainder="renormalise"))
    assert dataset.taxa == TAXA[:3]
    expected = np.rint(partial[:, :3] / partial.sum(axis=1, keepdims=True) * 1000)
    np.testing.assert_array_equal(dataset.counts, expected)
    assert any(n.startswith("rescaled the listed abundances") for n in dataset.notes)


def test_depth_given_with_counts_is_not_used(tmp_path):
    path = write(tmp_path / "c.tsv", taxa_rows())
    agreeing = only(read_datasets(path, depth=16))  # not every total is 16
    assert_standard(agreeing)
    assert any("disagrees" in w for w in agreeing.warnings)
    meta = metadata_file(tmp_path, "sample\treads",
                         [f"{s}\t{t}" for s, t in zip(SAMPLES, COUNTS.sum(axis=1))])
    dataset = only(read_datasets(path, meta, depth_by="reads"))
    assert_standard(dataset)
    assert not dataset.warnings
    assert any("agrees with them and was not used" in n for n in dataset.notes)


# --- aggregation -------------------------------------------------------------------------

# Source: rank-prefixed lineage strings ('k__', 'p__', ... 'g__', 's__') as in the
# Greengenes taxonomy, McDonald et al. (2012) ISME J 6:610 (from memory); 'd__' for domain
# as in GTDB, Parks et al. (2018) Nat. Biotechnol. 36:996 (from memory).
LINEAGES = ("k__Bacteria; p__Firmicutes; c__Clostridia; o__Clostridiales; f__Lachnospiraceae; "
            "g__Blautia; s__obeum",
            "d__Bacteria;p__Firmicutes;c__Clostridia;o__Clostridiales;f__Lachnospiraceae;"
            "g__Blautia;s__",
            "k__Bacteria; p__Bacteroidetes; c__Bacteroidia; o__Bacteroidales; f__; g__; s__",
            "")


def lineage_table(tmp_path: Path, lineages: tuple[str, ...] = LINEAGES) -> Path:
    lines = taxa_rows().splitlines()
    text = lines[0] + "\tLineage\n" + "".join(f"{line}\t{lin}\n"
                                               for line, lin in zip(lines[1:], lineages))
    return write(tmp_path / "c.tsv", text)


def test_aggregate_by_lineage_rank(tmp_path):
    path = lineage_table(tmp_path)
    genus = only(read_datasets(path, lineage="Lineage", rank="genus"))
    assert genus.taxa == ("Blautia", "unassigned")
    np.testing.assert_array_equal(genus.counts, np.column_stack(
        [COUNTS[:, 0] + COUNTS[:, 1], COUNTS[:, 2] + COUNTS[:, 3]]))
    assert any("aggregated 4 taxa to 2 groups at rank 'genus'" in n for n in genus.notes)
    assert any("2 taxa without a group were pooled as 'unassigned'" in n for n in genus.notes)
    phylum = only(read_datasets(path, lineage="lineage", rank="Phylum"))
    assert phylum.taxa == ("Firmicutes", "Bacteroidetes", "unassigned")
    species = only(read_datasets(path, lineage="Lineage", rank="species"))
    assert species.taxa == ("Blautia obeum", "unassigned")
    np.testing.assert_array_equal(species.counts[:, 0], COUNTS[:, 0])


def test_aggregate_unprefixed_lineages_by_name_and_level(tmp_path):
    lineages = ("Bacteria;Firmicutes;Clostridia", "Bacteria;Firmicutes;Bacilli",
                "Bacteria;Proteobacteria", "Archaea")
    path = lineage_table(tmp_path, lineages)
    by_name = only(read_datasets(path, lineage="Lineage", rank="class"))
    assert by_name.taxa == ("Clostridia", "Bacilli", "unassigned")
    by_level = only(read_datasets(path, lineage="Lineage", rank="2"))
    assert by_level.taxa == ("Firmicutes", "Proteobacteria", "unassigned")
    np.testing.assert_array_equal(by_level.counts[:, 0], COUNTS[:, 0] + COUNTS[:, 1])


def test_aggregate_long_table_with_lineage(tmp_path):
    rows = ["sample\ttaxon\tcount\tlineage"]
    rows += [f"{s}\t{t}\t{COUNTS[i, j]}\t{LINEAGES[j]}" for i, s in enumerate(SAMPLES)
             for j, t in enumerate(TAXA)]
    path = write(tmp_path / "long.tsv", "\n".join(rows) + "\n")
    dataset = only(read_datasets(path, lineage="lineage", rank="family"))
    assert dataset.taxa == ("Lachnospiraceae", "unassigned")


@pytest.mark.parametrize("header", [True, False])
def test_aggregate_by_map_file(tmp_path, header):
    path = write(tmp_path / "c.tsv", taxa_rows())
    pairs = "Alpha_1\tfirst\nGamma_3\tfirst\nBeta_2\tsecond\nUnused_9\tthird\n"
    mapping = write(tmp_path / "map.tsv", ("taxon\tgroup\n" if header else "") + pairs)
    dataset = only(read_datasets(path, taxon_map=mapping))
    assert dataset.taxa == ("first", "second", "unassigned")
    np.testing.assert_array_equal(dataset.counts, np.column_stack(
        [COUNTS[:, 0] + COUNTS[:, 2], COUNTS[:, 1], COUNTS[:, 3]]))
    assert dataset.source == (str(path), str(mapping))
    assert any("with the taxon map" in n for n in dataset.notes)


def test_map_file_with_lineages_and_rank(tmp_path):
    path = write(tmp_path / "c.tsv", taxa_rows())
    mapping = write(tmp_path / "map.csv", "taxon,lineage\n" + "".join(
        f'{t},"{lin}"\n' for t, lin in zip(TAXA, LINEAGES)))
    dataset = only(read_datasets(path, taxon_map=mapping, rank="genus"))
    assert dataset.taxa == ("Blautia", "unassigned")


def test_remainder_other_is_not_aggregated(tmp_path):
    partial = FRACTIONS.copy()
    partial[:, 3] = 0
    path = write(tmp_path / "rel.tsv", taxa_rows(values=partial))
    mapping = write(tmp_path / "map.tsv", "taxon\tgroup\n" + "".join(f"{t}\tall\n" for t in TAXA))
    dataset = only(read_datasets(path, depth=1000, taxon_map=mapping))
    assert dataset.taxa == ("all", "other")
    np.testing.assert_array_equal(dataset.counts.sum(axis=1), [1000] * 5)


def test_remainder_joins_an_existing_other_taxon(tmp_path):
    values = np.array([[0.5, 0.1], [0.2, 0.2], [0.6, 0.4]])  # the 'other' row is incomplete
    text = wide_text(values.T, ("a", "other"), ("S1", "S2", "S3"), "taxon")
    dataset = only(read_datasets(write(tmp_path / "rel.tsv", text), depth=100))
    assert dataset.taxa == ("a", "other")
    np.testing.assert_array_equal(dataset.counts, [[50, 50], [20, 80], [60, 40]])
    assert any("existing taxon 'other'" in n for n in dataset.notes)


# --- round trip --------------------------------------------------------------------------

def make_dataset(name: str, counts: np.ndarray, times: np.ndarray | None, prefix: str) -> Dataset:
    taxa = tuple(f"taxon_{k}" for k in range(counts.shape[1]))
    samples = tuple(f"{prefix}{k}" for k in range(counts.shape[0]))
    return Dataset(name, counts, taxa, samples, Design(counts.sum(axis=1), times))


@pytest.mark.parametrize("suffix", ["tsv", "txt"])
def test_round_trip_time_series(tmp_path, suffix):
    rng = np.random.default_rng(7)
    written = []
    for k, name in enumerate(["subject B", "subject A/gut"]):
        counts = rng.poisson(3.0, size=(6, 5)) + np.eye(6, 5, dtype=np.int64)
        counts[:, 0] += 1
        times = np.cumsum(rng.uniform(0.1, 2.0, size=6)) - 0.3
        written.append(make_dataset(name, counts, times, f"d{k}_"))
    counts_path, meta_path = tmp_path / f"c.{suffix}", tmp_path / f"m.{suffix}"
    write_tables(written, counts_path, meta_path)
    back = read_datasets(counts_path, meta_path, dataset_by=["dataset"], time_by="day")
    assert [d.name for d in back] == sorted(d.name for d in written)
    for original in written:
        (copy,) = [d for d in back if d.name == original.name]
        assert copy.samples == original.samples
        np.testing.assert_array_equal(copy.counts, original.counts)
        np.testing.assert_array_equal(copy.design.times, original.design.times)  # exact
        assert copy.taxa == original.taxa


@settings(max_examples=25, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_round_trip_snapshots_property(tmp_path, data):
    n_sets = data.draw(st.integers(1, 3))
    written = []
    for k in range(n_sets):
        n_samples = data.draw(st.integers(3, 6))
        n_taxa = data.draw(st.integers(2, 5))
        counts = np.array(data.draw(st.lists(st.lists(st.integers(0, 10**6), min_size=n_taxa,
                                                      max_size=n_taxa),
                                             min_size=n_samples, max_size=n_samples)))
        counts[:, 0] += 1
        counts[0, :] += 1  # every taxon has reads, every sample has reads
        written.append(make_dataset(f"set{k}", counts, None, f"x{k}_"))
    write_tables(written, tmp_path / "c.tsv", tmp_path / "m.tsv")
    back = read_datasets(tmp_path / "c.tsv", tmp_path / "m.tsv", dataset_by=["dataset"])
    for original, copy in zip(written, back):
        assert copy.name == original.name and copy.samples == original.samples
        assert copy.taxa == original.taxa and copy.design.times is None
        np.testing.assert_array_equal(copy.counts, original.counts)
        np.testing.assert_array_equal(copy.design.depths, original.design.depths)


def test_write_tables_refuses_what_cannot_be_read_back(tmp_path):
    counts = np.array([[1, 2], [3, 4], [5, 6]])
    series = make_dataset("a", counts, np.array([0.0, 1.0, 2.0]), "s")
    snapshot = make_dataset("b", counts, None, "t")
    with pytest.raises(ValueError, match="time series and snapshot"):
        write_tables([series, snapshot], tmp_path / "c.tsv", tmp_path / "m.tsv")
    with pytest.raises(ValueError, match="distinct"):
        write_tables([series, make_dataset("c", counts, np.array([0.0, 1.0, 2.0]), "s")],
                     tmp_path / "c.tsv", tmp_path / "m.tsv")
    assert not (tmp_path / "c.tsv").exists()
