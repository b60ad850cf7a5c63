"""One-line input errors: the library names parameters, the command line their options."""

from __future__ import annotations

from driftscreen.errors import InputError, mention, worded

OPTIONS = {"depth": "--depth", "depth_by": "--depth-by", "lineage": "--lineage"}


def test_mentions_are_parameters_for_the_library_and_options_for_the_command_line():
    error = InputError(f"no column 'x' ({mention('lineage', named=True)})", file="t.tsv",
                       fix=f"give {mention('depth')} N or {mention('depth_by')} COLUMN")
    assert str(error) == "t.tsv: no column 'x' (parameter lineage); give depth N or depth_by COLUMN"
    assert error.one_line(OPTIONS) == ("t.tsv: no column 'x' (option --lineage); "
                                       "give --depth N or --depth-by COLUMN")
    assert error.fix == "give depth N or depth_by COLUMN" and "[[" not in error.problem


def test_a_parameter_without_an_option_keeps_its_name():
    assert worded(f"set {mention('alpha')}", OPTIONS) == "set alpha"
    assert worded(f"({mention('alpha', named=True)})", OPTIONS) == "(parameter alpha)"
    assert worded("no mention here [[ or ]] there") == "no mention here [[ or ]] there"


def test_the_place_and_the_parameter_are_worded_alike():
    error = InputError("holds other results", file="out", place=mention("depth", named=True),
                       parameter="lineage")
    assert str(error) == "parameter lineage: out: parameter depth: holds other results"
    assert error.one_line(OPTIONS) == "option --lineage: out: option --depth: holds other results"
