"""The resume store: settings fingerprint, refusal of other settings, atomic records."""

from __future__ import annotations

import json
import re
import shutil

import pytest

from driftscreen import __version__
from driftscreen.cli import build_parser, option_names
from driftscreen.errors import InputError
from driftscreen.store import (STORE_FOLDER, ResultStore, differences, fingerprint_key,
                               record_file_name, settings_fingerprint)

#: The command line's words for the library's parameters.
OPTIONS = option_names(build_parser())


@pytest.fixture()
def inputs(tmp_path):
    counts = tmp_path / "counts.tsv"
    counts.write_text("taxon\ts1\ts2\na\t1\t2\nb\t3\t4\n", encoding="utf-8")
    metadata = tmp_path / "metadata.tsv"
    metadata.write_text("sample\tday\ns1\t0\ns2\t1\n", encoding="utf-8")
    return {"counts": counts, "metadata": metadata}


def fingerprint(inputs, **changes):
    options = dict(inputs=inputs, intake={"time_by": "day", "dataset_by": ["site"]},
                   replicates=49, groupings=20, seed=1, statistics=["A(x=1)", "B()"])
    options.update(changes)
    return settings_fingerprint(**options)


def test_fingerprint_holds_version_checksums_and_settings(inputs):
    # Source: FIPS 180-4 SHA-256 as implemented by hashlib; the checksum of a known string.
    known = inputs["counts"].parent / "abc.txt"
    known.write_bytes(b"abc")
    data = fingerprint({"counts": known})
    assert data["inputs"]["counts"]["sha256"] == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad")
    assert data["driftscreen_version"] == __version__
    assert (data["replicates"], data["groupings"], data["seed"]) == (49, 20, 1)
    assert data["statistics"] == ["A(x=1)", "B()"]


def test_new_store_writes_settings_and_reopens(tmp_path, inputs):
    out = tmp_path / "out"
    store = ResultStore.open(out, fingerprint(inputs))
    assert (out / STORE_FOLDER / "settings.json").is_file()
    store.save("site A", {"value": 1.5})
    again = ResultStore.open(out, fingerprint(inputs))
    assert again.finished() == {"site A": {"value": 1.5}}


def test_other_settings_are_refused_with_what_differs(tmp_path, inputs):
    out = tmp_path / "out"
    ResultStore.open(out, fingerprint(inputs))
    with pytest.raises(InputError) as caught:
        ResultStore.open(out, fingerprint(inputs, seed=2, replicates=99))
    message = caught.value.one_line(OPTIONS)
    assert "\n" not in message
    assert "--seed: 1 there, 2 now" in message
    assert "--replicates: 49 there, 99 now" in message
    assert "another --out" in message and str(out) in message


def test_changed_input_content_is_refused(tmp_path, inputs):
    out = tmp_path / "out"
    ResultStore.open(out, fingerprint(inputs))
    inputs["metadata"].write_text("sample\tday\ns1\t0\ns2\t2\n", encoding="utf-8")
    with pytest.raises(InputError, match="metadata file: file content"):
        ResultStore.open(out, fingerprint(inputs))


def test_moved_input_with_same_content_is_reused(tmp_path, inputs):
    out = tmp_path / "out"
    ResultStore.open(out, fingerprint(inputs)).save("x", {"v": 1})
    moved = tmp_path / "elsewhere.tsv"
    shutil.copy(inputs["counts"], moved)
    store = ResultStore.open(out, fingerprint({**inputs, "counts": moved}))
    assert store.finished() == {"x": {"v": 1}}


def test_intake_option_difference_is_named(tmp_path, inputs):
    old = fingerprint(inputs)
    new = fingerprint(inputs, intake={"time_by": None, "dataset_by": ["site"]})
    assert differences(old, new) == ["--time-by: day there, none now"]
    assert fingerprint_key(old) != fingerprint_key(new)


def test_records_of_other_settings_and_temporary_files_are_ignored(tmp_path, inputs):
    out = tmp_path / "out"
    store = ResultStore.open(out, fingerprint(inputs))
    store.save("good", {"v": 1})
    folder = store.records_folder
    (folder / record_file_name("stale")).write_text(
        json.dumps({"settings": "0" * 64, "name": "stale", "outcome": {}}), encoding="utf-8")
    (folder / ".good.json.x.part").write_text("half", encoding="utf-8")
    assert store.finished() == {"good": {"v": 1}}


@pytest.mark.parametrize("content", [b'{"settings": ', b"\xff\xfe{}", b"[1]",
                                     b'{"settings": 5, "name": [1]}',
                                     b'{"settings": "0", "name": "x", "outcome": 3}'])
def test_broken_records_are_refused_in_one_line(tmp_path, inputs, content):
    store = ResultStore.open(tmp_path / "out", fingerprint(inputs))
    store.save("good", {"v": 1})
    (store.records_folder / record_file_name("broken")).write_bytes(content)
    with pytest.raises(InputError) as caught:
        store.finished()
    message = caught.value.one_line(OPTIONS)
    assert "\n" not in message and "is not a resume store of this driftscreen version" in message
    assert message.endswith(f"give a new --out folder, or remove {store.folder} to start afresh")


def test_record_file_names_are_safe_and_distinct():
    names = ["a/b", "a_b", "../x", "site 1|day 2", "é", "", "." * 50, "a" * 300]
    files = [record_file_name(n) for n in names]
    assert len(set(files)) == len(files)
    for file in files:
        assert "/" not in file and not file.startswith(".") and len(file) < 80
        assert file.endswith(".json")


def test_save_is_atomic_and_leaves_no_temporary_files(tmp_path, inputs):
    store = ResultStore.open(tmp_path / "out", fingerprint(inputs))
    for k in range(5):
        store.save(f"d{k}", {"k": k})
    assert sorted(p.suffix for p in store.records_folder.iterdir()) == [".json"] * 5
    assert len(store.finished()) == 5


@pytest.mark.parametrize("content", [b"{", b"\xff\xfe{", b"null", b"[1, 2]", b"{}",
                                     b'{"inputs": [1]}', b'{"inputs": {"counts": 5}}',
                                     b'{"inputs": {"counts": {"sha256": 7}}}'])
def test_unreadable_or_misshapen_settings_are_refused_and_kept(tmp_path, inputs, content):
    out = tmp_path / "out"
    store = ResultStore.open(out, fingerprint(inputs))
    store.settings_path.write_bytes(content)
    with pytest.raises(InputError) as caught:
        ResultStore.open(out, fingerprint(inputs, seed=5))
    assert re.search(r"settings\.json is unreadable or of another layout\); give a new --out "
                     r"folder, or remove .*\.driftscreen", caught.value.one_line(OPTIONS))
    assert "give a new out folder" in str(caught.value)  # the library names the parameter
    assert store.settings_path.read_bytes() == content


def test_settings_file_that_is_a_folder_is_refused(tmp_path, inputs):
    out = tmp_path / "out"
    (out / STORE_FOLDER / "settings.json").mkdir(parents=True)
    with pytest.raises(InputError, match="not a resume store of this driftscreen version"):
        ResultStore.open(out, fingerprint(inputs))


def test_store_stopped_before_its_settings_starts_afresh(tmp_path, inputs):
    out = tmp_path / "out"
    (out / STORE_FOLDER).mkdir(parents=True)
    store = ResultStore.open(out, fingerprint(inputs))
    assert store.stored_fingerprint()["seed"] == 1


