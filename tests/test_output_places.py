"""Output places: checked before any work, one-line errors, files written with the umask."""

from __future__ import annotations

import os
import stat

import pytest

from driftscreen import files
from driftscreen.errors import InputError
from driftscreen.files import (atomic_write_text, check_output_file, check_output_folder,
                               same_place)


def mode_of(path) -> int:
    return stat.S_IMODE(os.stat(path).st_mode)


@pytest.mark.parametrize("mask", [0o022, 0o002, 0o077])
def test_files_are_written_with_the_umask(tmp_path, mask):
    # Common practice (POSIX open(2)): a new file gets mode 0666 without the umask's bits.
    previous = os.umask(mask)
    try:
        path = atomic_write_text(tmp_path / "report.txt", "x\n")
    finally:
        os.umask(previous)
    assert mode_of(path) == 0o666 & ~mask


def test_umask_is_left_as_it_was(tmp_path):
    previous = os.umask(0o027)
    try:
        atomic_write_text(tmp_path / "a.txt", "x\n")
        assert files.current_umask() == 0o027
        assert os.umask(0o027) == 0o027
    finally:
        os.umask(previous)


def test_folder_that_cannot_be_written_is_refused(tmp_path, monkeypatch):
    # Root may write anywhere, so the permission the system reports is simulated.
    locked = tmp_path / "locked"
    locked.mkdir()
    real_access = os.access
    monkeypatch.setattr(files.os, "access",
                        lambda path, mode: False if str(path) == str(locked)
                        else real_access(path, mode))
    with pytest.raises(InputError) as caught:
        check_output_folder(locked / "out", "--out")
    assert caught.value.one_line() == (
        f"{locked / 'out'}: option --out: cannot write into the folder {locked} (permission "
        "denied); choose a folder you can write to")
    with pytest.raises(InputError, match="cannot write into the folder"):
        check_output_file(locked / "report.txt", "--output")


def test_new_places_in_new_folders_are_accepted(tmp_path):
    check_output_folder(tmp_path / "a" / "b", "--out", writes=("results.tsv",))
    check_output_file(tmp_path / "c" / "report.txt", "--output")
    assert not (tmp_path / "a").exists() and not (tmp_path / "c").exists()  # nothing made yet


def test_hard_link_to_an_input_is_refused(tmp_path):
    counts = tmp_path / "counts.tsv"
    counts.write_text("taxon\tS1\n", encoding="utf-8")
    os.link(counts, tmp_path / "copy.tsv")
    with pytest.raises(InputError, match=r"is the input file .*counts\.tsv"):
        check_output_file(tmp_path / "copy.tsv", "--output", [counts])


def test_same_place_sees_through_links_and_dots(tmp_path):
    (tmp_path / "sub").mkdir()
    (tmp_path / "link").symlink_to(tmp_path / "sub")
    assert same_place(tmp_path / "link" / "r.txt", tmp_path / "sub" / ".." / "sub" / "r.txt")
    assert not same_place(tmp_path / "sub" / "r.txt", tmp_path / "sub" / "t.txt")


def test_a_write_that_fails_anyway_is_one_line(tmp_path):
    (tmp_path / "a-file").write_text("keep\n", encoding="utf-8")
    with pytest.raises(InputError) as caught:
        atomic_write_text(tmp_path / "a-file" / "report.txt", "x\n")
    assert caught.value.one_line().startswith(f"{tmp_path / 'a-file' / 'report.txt'}: cannot "
                                              "write the file (")
    assert (tmp_path / "a-file").read_text(encoding="utf-8") == "keep\n"
