"""One input check per entry point: the library names Python parameters, the command line
words them as options, and the parser offers the choices and ranges the library checks."""

from __future__ import annotations

import argparse

import pytest

from driftscreen.cli import build_parser, main, option_names
from driftscreen.errors import InputError
from driftscreen.intake import read_datasets
from driftscreen.intake.reader import CHOICES as INTAKE_CHOICES
from driftscreen.limits import SIGMA
from driftscreen.neutral.model import START_CHOICES
from driftscreen.power import ALTERNATIVES, PowerDesign, niche_alternative, power_curve
from driftscreen.screen import BACKENDS
from driftscreen.synthetic import MODELS

DESIGN = PowerDesign.from_numbers(n_taxa=5, n_samples=6, interval=1.0, depth=500)


def choices(command: str, option: str) -> tuple:
    parser = build_parser()
    [sub] = [a for a in parser._actions if isinstance(a, argparse._SubParsersAction)]
    [action] = [a for a in sub.choices[command]._actions if option in a.option_strings]
    return tuple(action.choices)


def test_the_parser_offers_the_choices_the_library_checks():
    for option, name in (("--abundance", "abundance"), ("--remainder", "remainder"),
                         ("--layout", "layout"), ("--orientation", "orientation")):
        assert choices("test", option) == INTAKE_CHOICES[name]
    assert choices("screen", "--backend") == BACKENDS
    assert choices("power", "--alternative") == ALTERNATIVES
    assert choices("simulate", "--model") == MODELS
    assert choices("test", "--start") == START_CHOICES


def test_library_errors_name_the_parameter():
    with pytest.raises(InputError) as caught:
        power_curve(DESIGN, "logistic", [0.1], n_datasets=1, replicates=9, alpha=1.5)
    assert caught.value.one_line().startswith("parameter alpha: alpha 1.5 is not between 0 and 1")
    with pytest.raises(InputError) as caught:
        niche_alternative("logistic", noise=0.1)
    assert caught.value.parameter == "noise"
    assert str(caught.value).startswith("parameter noise: ")


def test_the_command_line_words_parameters_as_options(capsys):
    names = option_names(build_parser())
    assert (names["alpha"], names["n_datasets"], names["strengths"]) == (
        "--alpha", "--datasets", "--strengths")
    assert main(["power", "--taxa", "5", "--samples", "6", "--interval", "1", "--depth", "500",
                 "--alpha", "1.5"]) == 2
    assert capsys.readouterr().err == ("driftscreen: error: option --alpha: alpha 1.5 is not "
                                       "between 0 and 1; give a level such as 0.05\n")


def test_sigma_excludes_two():
    """sigma / (2 - sigma) is the squared CV of the logistic taxon's Gamma law (Grilli 2020,
    Nat. Commun. 11:4743): finite only below 2."""
    assert 0.0 in SIGMA and 1.999 in SIGMA and 2.0 not in SIGMA and -0.1 not in SIGMA
    assert SIGMA.interval() == "[0, 2)" and SIGMA.describe() == "a number in [0, 2)"


def test_intake_names_the_parameter_and_the_command_line_the_option(tmp_path, capsys):
    counts = tmp_path / "counts.tsv"
    counts.write_text("taxon\tS1\tS2\tS3\nA\t1\t2\t3\nB\t4\t5\t6\n", encoding="utf-8")
    with pytest.raises(InputError) as caught:
        read_datasets(counts, rank="genus")
    assert str(caught.value).startswith("parameter rank: needs lineages to aggregate taxa")
    assert main(["test", str(counts), "--rank", "genus"]) == 2
    assert capsys.readouterr().err.startswith(
        "driftscreen: error: option --rank: needs lineages to aggregate taxa")
