"""BIOM tables (JSON 1.0, HDF5 2.1) and the classic tab-separated BIOM export.

BIOM files are written with the format's reference package (``biom-format``), read back
by intake, and compared with the datasets intake makes from the equivalent TSV table
and metadata file.
"""

from __future__ import annotations

import gzip
import hashlib
import json
import re
import sys
from pathlib import Path

import numpy as np
import pytest

from driftscreen.cli import build_parser, main, option_names
from driftscreen.dataset import Dataset
from driftscreen.errors import InputError
from driftscreen.intake import read_datasets

biom = pytest.importorskip("biom")
h5py = pytest.importorskip("h5py")

# Invented example: two compost reactors sampled on five days, six taxa.
TAXA = ("ASV_a", "ASV_b", "ASV_c", "ASV_d", "ASV_e", "ASV_f")
LINEAGES = (
    ("k__Bacteria", "p__Firmicutes", "c__Bacilli", "o__Bacillales", "f__Bacillaceae",
     "g__Bacillus"),
    ("k__Bacteria", "p__Firmicutes", "c__Bacilli", "o__Bacillales", "f__Bacillaceae",
     "g__Bacillus"),
    ("k__Bacteria", "p__Actinobacteria", "c__Actinobacteria", "o__Streptomycetales",
     "f__Streptomycetaceae", "g__Streptomyces"),
    ("k__Bacteria", "p__Proteobacteria", "c__Gammaproteobacteria", "o__Pseudomonadales",
     "f__Pseudomonadaceae", "g__Pseudomonas"),
    ("k__Bacteria", "p__Proteobacteria", "c__Gammaproteobacteria", "o__Pseudomonadales",
     "f__Pseudomonadaceae", "g__"),
    ("k__Archaea", "p__Euryarchaeota", "c__Methanomicrobia", "o__Methanosarcinales",
     "f__Methanosarcinaceae", "g__Methanosarcina"),
)
SAMPLES = tuple(f"{reactor}_d{day}" for reactor in ("R1", "R2") for day in (0, 2, 5, 9, 14))
REACTOR = tuple(s.split("_")[0] for s in SAMPLES)
DAY = tuple(int(s.split("_d")[1]) for s in SAMPLES)
COUNTS = np.random.default_rng(10).poisson(lam=[40, 5, 20, 12, 3, 8], size=(10, 6))
COUNTS[3, 1] = 0  # some absences, as in real tables
COUNTS[7, :2] = 0
OPTIONS = [dict(), dict(dataset_by=["reactor"], time_by="day"),
           dict(dataset_by=["reactor"], time_by="day", rank="genus")]


def reference_table(counts: np.ndarray = COUNTS, taxonomy: str = "list",
                    samples: tuple[str, ...] = SAMPLES, metadata: bool = True):
    """The example as a ``biom.Table``: sample metadata reactor/day/reads (the depths of
    ``COUNTS``), taxonomy."""
    lineages = [list(lineage) if taxonomy == "list" else "; ".join(lineage)
                for lineage in LINEAGES]
    sample_metadata = None
    if metadata:
        sample_metadata = [{"reactor": r, "day": d, "reads": int(total)}
                           for r, d, total in zip(REACTOR, DAY, COUNTS.sum(axis=1))]
    return biom.Table(np.asarray(counts).T, list(TAXA), list(samples),
                      observation_metadata=[{"taxonomy": lineage} for lineage in lineages],
                      sample_metadata=sample_metadata)


def write_json(table, path: Path) -> Path:
    path.write_text(table.to_json("driftscreen tests"))
    return path


def write_hdf5(table, path: Path) -> Path:
    with h5py.File(path, "w") as handle:
        table.to_hdf5(handle, "driftscreen tests")
    return path


WRITERS = {"json": write_json, "hdf5": write_hdf5}


def write_text_inputs(folder: Path, counts: np.ndarray = COUNTS) -> tuple[Path, Path]:
    """The same example as a wide TSV (taxa as rows, taxonomy column) and a metadata TSV
    (reads: the depths of ``COUNTS``)."""
    folder.mkdir(exist_ok=True)
    lines = ["taxon\t" + "\t".join(SAMPLES) + "\ttaxonomy"]
    lines += [f"{taxon}\t" + "\t".join(f"{v:g}" for v in column) + "\t" + "; ".join(lineage)
              for taxon, column, lineage in zip(TAXA, np.asarray(counts).T, LINEAGES)]
    table = folder / "counts.tsv"
    table.write_text("\n".join(lines) + "\n")
    meta = folder / "metadata.tsv"
    meta.write_text("sample\treactor\tday\treads\n" + "".join(
        f"{s}\t{r}\t{d}\t{total}\n" for s, r, d, total in zip(SAMPLES, REACTOR, DAY,
                                                              COUNTS.sum(axis=1))))
    return table, meta


def text_datasets(folder: Path, **options) -> list[Dataset]:
    """Datasets from the TSV inputs (``--lineage taxonomy`` where a rank is asked for)."""
    table, meta = write_text_inputs(folder)
    lineage = {"lineage": "taxonomy"} if "rank" in options else {}
    return read_datasets(table, meta, **options, **lineage)


def assert_same_datasets(found: list[Dataset], expected: list[Dataset]) -> None:
    """Same names, samples, taxa, counts, design and conversion record."""
    assert [d.name for d in found] == [d.name for d in expected]
    for a, b in zip(found, expected):
        assert a.samples == b.samples and a.taxa == b.taxa
        np.testing.assert_array_equal(a.counts, b.counts)
        np.testing.assert_array_equal(a.design.depths, b.design.depths)
        if b.design.times is None:
            assert a.design.times is None
        else:
            np.testing.assert_array_equal(a.design.times, b.design.times)
        assert (a.dropped_taxa, a.from_relative) == (b.dropped_taxa, b.from_relative)


def sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# --- the same datasets as from TSV + metadata -------------------------------------------

@pytest.mark.parametrize("version", sorted(WRITERS))
@pytest.mark.parametrize("options", OPTIONS, ids=["plain", "datasets-times", "genus"])
def test_biom_reads_to_the_datasets_of_tsv_and_metadata(tmp_path, version, options):
    path = WRITERS[version](reference_table(), tmp_path / "counts.biom")
    before = sha(path)
    found = read_datasets(path, **options)
    expected = text_datasets(tmp_path / "text", **options)
    assert_same_datasets(found, expected)
    assert found[0].source == (str(path),)
    assert sha(path) == before
    if "rank" in options:
        assert found[0].taxa[:3] == ("Bacillus", "Streptomyces", "Pseudomonas")
        assert [d.notes for d in found] == [d.notes for d in expected]


def write_gzipped_json(table, path: Path) -> Path:
    path.write_bytes(gzip.compress(table.to_json("driftscreen tests").encode()))
    return path


@pytest.mark.parametrize("writer,name", [(write_json, "table.json"), (write_hdf5, "table.h5"),
                                         (write_gzipped_json, "table.biom.gz")])
def test_biom_is_recognised_by_content_whatever_the_name(tmp_path, writer, name):
    path = writer(reference_table(), tmp_path / name)
    [dataset] = read_datasets(path)
    assert dataset.name == "table"
    np.testing.assert_array_equal(dataset.counts, COUNTS)


def test_taxonomy_as_a_semicolon_separated_string(tmp_path):
    (tmp_path / "list").mkdir()
    (tmp_path / "text").mkdir()
    as_list = write_json(reference_table(), tmp_path / "list" / "counts.biom")
    as_text = write_json(reference_table(taxonomy="text"), tmp_path / "text" / "counts.biom")
    assert '"taxonomy": "k__Bacteria; p__Firmicutes' in as_text.read_text()
    for rank in ("genus", "phylum"):
        assert_same_datasets(read_datasets(as_list, rank=rank), read_datasets(as_text, rank=rank))
    [phyla] = read_datasets(as_text, rank="phylum")
    assert phyla.taxa == ("Firmicutes", "Actinobacteria", "Proteobacteria", "Euryarchaeota")
    np.testing.assert_array_equal(phyla.counts[:, 0], COUNTS[:, :2].sum(axis=1))


def test_named_lineage_field_and_missing_taxonomy(tmp_path):
    table = reference_table()
    path = write_json(table, tmp_path / "counts.biom")
    [named] = read_datasets(path, lineage="Taxonomy", rank="genus")
    [implicit] = read_datasets(path, rank="genus")
    assert named.taxa == implicit.taxa
    bare = biom.Table(COUNTS.T, list(TAXA), list(SAMPLES))
    bare_path = write_json(bare, tmp_path / "bare.biom")
    with pytest.raises(InputError, match=r"^.*bare\.biom: no taxonomy in the observation "
                                         r"metadata.*; give taxon_map FILE"):
        read_datasets(bare_path, rank="genus")
    with pytest.raises(InputError, match=r"no observation metadata field 'lineage' \(parameter "
                                         r"lineage\); use one of the fields 'taxonomy'"):
        read_datasets(path, lineage="lineage", rank="genus")


def test_taxon_map_groups_biom_taxa_as_it_groups_tsv_taxa(tmp_path):
    path = write_json(reference_table(), tmp_path / "counts.biom")
    taxon_map = tmp_path / "groups.tsv"
    taxon_map.write_text("taxon\tgroup\n" + "".join(
        f"{taxon}\t{'early' if k < 3 else 'late'}\n" for k, taxon in enumerate(TAXA)))
    found = read_datasets(path, taxon_map=taxon_map)
    expected = text_datasets(tmp_path / "text", taxon_map=taxon_map)
    assert_same_datasets(found, expected)
    assert found[0].taxa == ("early", "late")


def test_metadata_file_wins_over_the_metadata_inside_with_a_note(tmp_path):
    path = write_hdf5(reference_table(), tmp_path / "counts.biom")
    _, meta = write_text_inputs(tmp_path / "text")
    shifted = meta.read_text().replace("\t0\t", "\t1\t")  # day 0 -> day 1 in the file
    meta.write_text(shifted)
    inside = read_datasets(path, dataset_by=["reactor"], time_by="day")
    outside = read_datasets(path, meta, dataset_by=["reactor"], time_by="day")
    assert inside[0].design.times[0] == 0 and outside[0].design.times[0] == 1
    np.testing.assert_array_equal(inside[0].design.times[1:], outside[0].design.times[1:])
    note = f"the sample metadata inside {path} was not used: {meta} was given and wins"
    assert note in outside[0].notes and note not in " ".join(inside[0].notes)
    assert outside[0].source == (str(path), str(meta))


def test_metadata_file_joins_a_biom_without_sample_metadata(tmp_path):
    path = write_json(reference_table(metadata=False), tmp_path / "counts.biom")
    _, meta = write_text_inputs(tmp_path / "text")
    found = read_datasets(path, meta, dataset_by=["reactor"], time_by="day")
    assert_same_datasets(found, text_datasets(tmp_path / "text", dataset_by=["reactor"],
                                              time_by="day"))
    assert not any("was not used" in note for note in found[0].notes)


def test_relative_abundances_with_depths_from_the_sample_metadata(tmp_path):
    fractions = COUNTS / COUNTS.sum(axis=1, keepdims=True)
    path = write_hdf5(reference_table(fractions), tmp_path / "fractions.biom")
    found = read_datasets(path, depth_by="reads", dataset_by=["reactor"])
    for dataset in found:
        assert dataset.from_relative
        members = [SAMPLES.index(s) for s in dataset.samples]
        kept = [TAXA.index(t) for t in dataset.taxa]
        np.testing.assert_array_equal(dataset.counts, COUNTS[np.ix_(members, kept)])
    table, meta = write_text_inputs(tmp_path / "text", fractions)
    assert_same_datasets(found, read_datasets(table, meta, depth_by="reads",
                                              dataset_by=["reactor"]))
    with pytest.raises(InputError, match=r"fractions\.biom: relative abundances \(fractions\) "
                                         r"need sequencing depths"):
        read_datasets(path)
    with pytest.raises(InputError, match=r"fractions\.biom: observation 'ASV_a', sample "
                                         r"'R1_d0': non-integer count 0\.\d+; round the counts"):
        read_datasets(path, abundance="counts")


# --- the examples of the published specification ---------------------------------------

# "Minimal sparse OTU table" and "Minimal dense OTU table", copied from the BIOM format's
# specification, "The biom file format: Version 1.0" (biom-format.org,
# documentation/format_versions/biom-1.0.html). Both encode the same 5 x 6 matrix.
SPEC_MINIMAL_SPARSE = """{
    "id":null,
    "format": "Biological Observation Matrix 0.9.1-dev",
    "format_url": "http://biom-format.org/documentation/format_versions/biom-1.0.html",
    "type": "OTU table",
    "generated_by": "QIIME revision 1.4.0-dev",
    "date": "2011-12-19T19:00:00",
    "rows":[
            {"id":"GG_OTU_1", "metadata":null},
            {"id":"GG_OTU_2", "metadata":null},
            {"id":"GG_OTU_3", "metadata":null},
            {"id":"GG_OTU_4", "metadata":null},
            {"id":"GG_OTU_5", "metadata":null}
        ],
    "columns": [
            {"id":"Sample1", "metadata":null},
            {"id":"Sample2", "metadata":null},
            {"id":"Sample3", "metadata":null},
            {"id":"Sample4", "metadata":null},
            {"id":"Sample5", "metadata":null},
            {"id":"Sample6", "metadata":null}
        ],
    "matrix_type": "sparse",
    "matrix_element_type": "int",
    "shape": [5, 6],
    "data":[[0,2,1],
            [1,0,5],
            [1,1,1],
            [1,3,2],
            [1,4,3],
            [1,5,1],
            [2,2,1],
            [2,3,4],
            [2,4,2],
            [3,0,2],
            [3,1,1],
            [3,2,1],
            [3,5,1],
            [4,1,1],
            [4,2,1]
           ]
}"""
SPEC_DENSE_DATA = """[[0,0,1,0,0,0],
              [5,1,0,2,3,1],
              [0,0,1,4,2,0],
              [2,1,1,0,0,1],
              [0,1,1,0,0,0]]"""
SPEC_MINIMAL_DENSE = (SPEC_MINIMAL_SPARSE.split('"matrix_type"')[0]
                      + '"matrix_type": "dense",\n    "matrix_element_type": "int",\n'
                      + '    "shape": [5,6],\n    "data":  ' + SPEC_DENSE_DATA + "\n}")
# Observation and sample metadata of the specification's "Rich dense OTU table" (same page):
# taxonomy as lists of ranks, and the body site of every sample.
SPEC_TAXONOMY = {
    "GG_OTU_1": ["k__Bacteria", "p__Proteobacteria", "c__Gammaproteobacteria",
                 "o__Enterobacteriales", "f__Enterobacteriaceae", "g__Escherichia", "s__"],
    "GG_OTU_2": ["k__Bacteria", "p__Cyanobacteria", "c__Nostocophycideae", "o__Nostocales",
                 "f__Nostocaceae", "g__Dolichospermum", "s__"],
    "GG_OTU_3": ["k__Archaea", "p__Euryarchaeota", "c__Methanomicrobia",
                 "o__Methanosarcinales", "f__Methanosarcinaceae", "g__Methanosarcina", "s__"],
    "GG_OTU_4": ["k__Bacteria", "p__Firmicutes", "c__Clostridia", "o__Halanaerobiales",
                 "f__Halanaerobiaceae", "g__Halanaerobium", "s__Halanaerobiumsaccharolyticum"],
    "GG_OTU_5": ["k__Bacteria", "p__Proteobacteria", "c__Gammaproteobacteria",
                 "o__Enterobacteriales", "f__Enterobacteriaceae", "g__Escherichia", "s__"],
}
SPEC_BODY_SITE = {"Sample1": "gut", "Sample2": "gut", "Sample3": "gut",
                  "Sample4": "skin", "Sample5": "skin", "Sample6": "skin"}


def spec_rich_dense() -> str:
    """The specification's rich dense table: the minimal one with its metadata filled in."""
    document = json.loads(SPEC_MINIMAL_DENSE)
    for row in document["rows"]:
        row["metadata"] = {"taxonomy": SPEC_TAXONOMY[row["id"]]}
    for column in document["columns"]:
        column["metadata"] = {"BODY_SITE": SPEC_BODY_SITE[column["id"]]}
    return json.dumps(document)


@pytest.mark.parametrize("text", [SPEC_MINIMAL_SPARSE, SPEC_MINIMAL_DENSE],
                         ids=["sparse", "dense"])
def test_specification_minimal_tables(tmp_path, text):
    path = tmp_path / "min_otu_table.biom"
    path.write_text(text)
    [dataset] = read_datasets(path)
    assert dataset.samples == tuple(f"Sample{k}" for k in range(1, 7))
    assert dataset.taxa == tuple(f"GG_OTU_{k}" for k in range(1, 6))
    np.testing.assert_array_equal(dataset.counts, np.array(json.loads(SPEC_DENSE_DATA)).T)
    np.testing.assert_array_equal(dataset.design.depths, [7, 3, 4, 6, 5, 2])
    assert dataset.name == "min_otu_table" and dataset.design.times is None


def test_specification_rich_table_body_sites_and_genera(tmp_path):
    path = tmp_path / "rich_dense_otu_table.biom"
    path.write_text(spec_rich_dense())
    gut, skin = read_datasets(path, dataset_by=["BODY_SITE"], rank="genus")
    assert (gut.name, skin.name) == ("gut", "skin")
    assert gut.samples == ("Sample1", "Sample2", "Sample3")
    # GG_OTU_1 and GG_OTU_5 are both Escherichia: rows 1 and 5 of the dense data, summed
    assert gut.taxa == ("Escherichia", "Dolichospermum", "Methanosarcina", "Halanaerobium")
    np.testing.assert_array_equal(gut.counts, [[0, 5, 0, 2], [1, 1, 0, 1], [2, 0, 1, 1]])
    assert skin.taxa == ("Dolichospermum", "Methanosarcina", "Halanaerobium")
    assert skin.dropped_taxa == 1  # Escherichia has no reads in the skin samples
    [species] = read_datasets(path, rank="species", min_taxa=1)
    assert species.taxa == ("Halanaerobiumsaccharolyticum", "unassigned")  # "s__" is no name


# --- the classic tab-separated export ----------------------------------------------------

def classic_export(table) -> str:
    """The reference package's tab-separated export with a taxonomy column, ranks joined
    by '; ' as its command-line converter writes them."""
    return table.delimited_self(header_key="taxonomy", header_value="taxonomy",
                                metadata_formatter=lambda lineage: "; ".join(lineage))


@pytest.mark.parametrize("name", ["counts.txt", "counts.tsv", "counts.biom"])
def test_classic_tsv_export_reads_as_its_wide_table(tmp_path, name):
    text = classic_export(reference_table())
    assert text.startswith("# Constructed from biom file\n#OTU ID\t")
    assert text.splitlines()[1].endswith("\ttaxonomy")
    path = tmp_path / name
    path.write_text(text + "\n")
    _, meta = write_text_inputs(tmp_path / "text")
    for options in OPTIONS:
        lineage = {"lineage": "taxonomy"} if "rank" in options else {}
        found = read_datasets(path, meta, **options, **lineage)
        assert "taxonomy" not in found[0].samples
        assert_same_datasets(found, text_datasets(tmp_path / "text", **options))
    [plain] = read_datasets(path, meta)
    assert any("column 'taxonomy' holds lineages and was not read as a sample" in note
               for note in plain.notes)


def test_classic_tsv_export_and_biom_agree_on_genera(tmp_path):
    table = reference_table()
    export = tmp_path / "counts.txt"
    export.write_text(classic_export(table))
    _, meta = write_text_inputs(tmp_path / "text")
    from_export = read_datasets(export, meta, dataset_by=["reactor"], lineage="taxonomy",
                                rank="genus")
    from_biom = read_datasets(write_hdf5(table, tmp_path / "counts.biom"),
                              dataset_by=["reactor"], rank="genus")
    assert_same_datasets(from_export, from_biom)
    assert [d.notes for d in from_export] == [d.notes for d in from_biom]


# --- bad input -------------------------------------------------------------------------

def json_with(path: Path, change) -> Path:
    """A JSON BIOM file of the example, its document changed by ``change``."""
    document = json.loads(reference_table().to_json("driftscreen tests"))
    change(document)
    path.write_text(json.dumps(document))
    return path


def duplicate_observation_hdf5(path: Path) -> Path:
    write_hdf5(reference_table(), path)
    with h5py.File(path, "a") as handle:
        handle["observation/ids"][2] = handle["observation/ids"][0]
    return path


def truncated(writer, path: Path) -> Path:
    writer(reference_table(), path)
    path.write_bytes(path.read_bytes()[: len(path.read_bytes()) // 2])
    return path


def set_ids(document: dict, axis: str, k: int, value: str) -> None:
    document[axis][k]["id"] = value


def emptied(document: dict) -> None:
    document.update(rows=[], data=[], shape=[0, len(document["columns"])])


BAD = [
    ("truncated-json", lambda p: truncated(write_json, p), {},
     r"t\.biom: line 1, column \d+: not valid JSON \(.+\); write the BIOM file again"),
    ("truncated-hdf5", lambda p: truncated(write_hdf5, p), {},
     r"t\.biom: damaged HDF5 file \(.+\); write the BIOM file again"),
    ("not-biom-json", lambda p: (p.write_text('{"name": "x"}'), p)[1], {},
     r"t\.biom: the JSON is not a BIOM table \(no field 'rows', 'columns', 'shape', 'data'\); "
     r"give a BIOM 1\.0 \(JSON\) or 2\.1 \(HDF5\) file"),
    ("binary", lambda p: (p.write_bytes(b"\x00\x01\x02 binary"), p)[1], {},
     r"t\.biom: neither BIOM 2\.1 \(HDF5\) nor BIOM 1\.0 \(JSON\) content; give a BIOM"),
    ("empty-file", lambda p: (p.write_text(""), p)[1], {},
     r"t\.biom: the file is empty; give a BIOM table"),
    ("empty-table", lambda p: json_with(p, emptied), {},
     r"t\.biom: the table is empty \(0 observations, 10 samples\); give a BIOM table with at "
     r"least one observation and one sample"),
    ("duplicate-sample", lambda p: json_with(p, lambda d: set_ids(d, "columns", 3, "R1_d0")),
     {}, r"t\.biom: sample ids: duplicate sample id 'R1_d0'; give every sample a unique id"),
    ("duplicate-observation", duplicate_observation_hdf5, {},
     r"t\.biom: observation ids: duplicate observation id 'ASV_a'; give every observation a "
     r"unique id \(merge the duplicates\)"),
    ("non-integer", lambda p: json_with(p, lambda d: d["data"][0].__setitem__(2, 2.5)),
     {"abundance": "counts"},
     r"t\.biom: observation 'ASV_a', sample 'R1_d0': non-integer count 2\.5; round the counts"),
    ("negative", lambda p: json_with(p, lambda d: d["data"][1].__setitem__(2, -3)), {},
     r"t\.biom: observation 'ASV_a', sample '\w+': negative count -3; counts must be >= 0"),
    ("not-a-number", lambda p: json_with(p, lambda d: d["data"][1].__setitem__(2, np.nan)),
     {}, r"t\.biom: observation 'ASV_a', sample '\w+': value nan is not a number; write every "
         r"count as a finite number"),
    ("missing-field", lambda p: write_json(reference_table(), p), {"time_by": "date"},
     r"t\.biom: no sample metadata field 'date' \(option --time-by\); use one of the fields "
     r"'reactor', 'day', 'reads', or give --metadata FILE"),
    ("bad-time", lambda p: json_with(p, lambda d: d["columns"][4]["metadata"]
                                     .__setitem__("day", "late")), {"time_by": "day"},
     r"t\.biom: sample 'R1_d14', metadata field 'day': cannot read time 'late'"),
    ("no-sample-metadata", lambda p: write_json(reference_table(metadata=False), p),
     {"time_by": "day"}, r"option --time-by: needs a metadata table; give --metadata FILE"),
    ("layout", lambda p: write_json(reference_table(), p), {"layout": "long"},
     r"option --layout: applies to CSV/TSV tables only, but .*t\.biom is a BIOM table; drop it"),
    ("sample-id", lambda p: write_json(reference_table(), p), {"sample_id": "id"},
     r"option --sample-id: names a column of a --metadata file.*; drop it, or give --metadata"),
]


@pytest.mark.parametrize("make,options,pattern", [case[1:] for case in BAD],
                         ids=[case[0] for case in BAD])
def test_bad_biom_input_is_one_line_naming_file_place_and_fix(tmp_path, make, options,
                                                              pattern):
    path = make(tmp_path / "t.biom")
    before = sha(path)
    with pytest.raises(InputError) as caught:
        read_datasets(path, **options)
    message = caught.value.one_line(option_names(build_parser()))  # as the command line words it
    assert "\n" not in message and ";" in message
    assert re.search(pattern, message), message
    assert sha(path) == before


def test_without_the_extra_a_biom_input_names_the_pip_command(tmp_path, monkeypatch, capsys):
    path = write_json(reference_table(), tmp_path / "counts.biom")
    monkeypatch.setitem(sys.modules, "biom", None)  # import biom now fails
    with pytest.raises(InputError, match=r"counts\.biom: reading BIOM tables needs the "
                                         r"biom-format package; install the BIOM reader with: "
                                         r"pip install 'driftscreen\[biom\]'$"):
        read_datasets(path)
    assert main(["test", str(path), "--replicates", "9"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "pip install 'driftscreen[biom]'" in err
    assert "Traceback" not in err


def test_cli_reports_a_corrupt_biom_with_exit_status_2(tmp_path, capsys):
    path = truncated(write_hdf5, tmp_path / "counts.biom")
    assert main(["screen", str(path), "--dataset-by", "reactor", "--out",
                 str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("driftscreen: error: ") and err.count("\n") == 1
    assert "damaged HDF5 file" in err and "Traceback" not in err


def test_cli_tests_a_biom_time_series_with_its_own_metadata(tmp_path, capsys):
    path = write_hdf5(reference_table(), tmp_path / "counts.biom")
    assert main(["test", str(path), "--dataset-by", "reactor", "--dataset", "R2",
                 "--time-by", "day", "--rank", "genus", "--replicates", "9",
                 "--no-influence"]) == 0
    out = " ".join(capsys.readouterr().out.split())
    assert "neutrality test of dataset 'R2'" in out
    assert "time series, 5 samples over 14 days" in out
    assert "aggregated 6 taxa to 5 groups at rank 'genus'" in out
