"""The same option means the same thing on every verb: ``-o`` is the short form of ``--out``
everywhere, ``--out`` is a folder for verbs writing a set of files and a file for the others,
``--seed`` defaults to 0, ``--bootstrap`` has one default per estimator (the library's), and
every verb that prints something has ``--quiet``. No physics here: the expected values are
the option contract of the README (common practice, no source)."""
from __future__ import annotations

import argparse
import inspect

import pytest

from povmfit.fitting.cli.main import VERBS, build_parser

FOLDER_VERBS = ("fit", "reconstruct", "batch", "demo")  # --out names a folder holding a set of files
FILE_VERBS = ("emulate", "simulate", "plan", "tally pulse-heights", "tally click-log")  # --out names one file


def _subparsers(parser: argparse.ArgumentParser) -> dict:
    actions = [a for a in parser._actions if isinstance(a, argparse._SubParsersAction)]
    return dict(actions[0].choices) if actions else {}


def leaf_parsers() -> dict:
    """{"verb" or "verb job": parser} for every command a user can run."""
    leaves = {}
    for verb, parser in _subparsers(build_parser()).items():
        jobs = _subparsers(parser)
        leaves.update({f"{verb} {job}": sub for job, sub in jobs.items()} if jobs else {verb: parser})
    return leaves


LEAVES = leaf_parsers()


def option(parser: argparse.ArgumentParser, flag: str):
    """The action of ``flag`` on ``parser``, or None."""
    return next((a for a in parser._actions if flag in a.option_strings), None)


def test_every_verb_is_covered():
    assert {name.split()[0] for name in LEAVES} == set(VERBS)
    assert set(LEAVES) == set(FOLDER_VERBS) | set(FILE_VERBS)


@pytest.mark.parametrize("name", sorted(LEAVES))
def test_short_o_is_the_same_option_as_out(name):
    out = option(LEAVES[name], "--out")
    assert out is not None, f"{name} has no --out"
    assert "-o" in out.option_strings, f"{name}: -o is missing as the short form of --out"


@pytest.mark.parametrize("name", sorted(LEAVES))
def test_out_is_a_folder_or_a_file_by_what_the_verb_writes(name):
    text = option(LEAVES[name], "--out").help.lower()
    expected = "folder" if name in FOLDER_VERBS else "file"
    assert expected in text, f"{name} --out help should say it is a {expected}: {text!r}"


SEEDED = sorted(name for name, parser in LEAVES.items() if option(parser, "--seed") is not None)


def test_the_verbs_that_draw_at_random_take_a_seed():
    # demo runs the fit with the fit's default seed; plan and tally draw nothing at random
    assert SEEDED == ["batch", "emulate", "fit", "reconstruct", "simulate"]


@pytest.mark.parametrize("name", SEEDED)
def test_seed_defaults_to_zero_wherever_there_is_one(name):
    seed = option(LEAVES[name], "--seed")
    assert seed.default == 0 and seed.type is int


@pytest.mark.parametrize("name", sorted(LEAVES))
def test_every_verb_can_be_quiet(name):
    quiet = option(LEAVES[name], "--quiet")
    assert quiet is not None and quiet.default is False, f"{name} has no --quiet"


def _default(parser_name: str, flag: str):
    return option(LEAVES[parser_name], flag).default


def test_bootstrap_defaults_follow_the_estimator():
    from povmfit.fitting.cli.demo import fit_defaults
    from povmfit.fitting.tomography.model_free import RECONSTRUCTION_BOOTSTRAP, reconstruct_scan
    from povmfit.fitting.workflow.characterise import characterise

    # the fit's parametric bootstrap: `fit`, `demo` (the fit's own defaults) and `batch`
    # (calls characterise without one) all use the library's default
    fit_default = inspect.signature(characterise).parameters["bootstrap"].default
    assert _default("fit", "--bootstrap") == fit_default == fit_defaults().bootstrap
    assert option(LEAVES["batch"], "--bootstrap") is None and option(LEAVES["demo"], "--bootstrap") is None
    # the model-free reconstruction's bootstrap: `reconstruct` uses what `fit` uses for the same estimator
    assert _default("reconstruct", "--bootstrap") == RECONSTRUCTION_BOOTSTRAP
    assert inspect.signature(reconstruct_scan).parameters["bootstrap"].default == RECONSTRUCTION_BOOTSTRAP


def test_library_seeds_of_the_seeded_verbs_default_to_zero_too():
    from povmfit.fitting.cli.demo import fit_defaults
    from povmfit.fitting.tomography.model_free import reconstruct_scan
    from povmfit.fitting.workflow.batch import characterise_many
    from povmfit.fitting.workflow.characterise import characterise

    for function in (characterise, characterise_many, reconstruct_scan):
        assert inspect.signature(function).parameters["seed"].default == 0, function.__name__
    assert fit_defaults().seed == 0


@pytest.mark.parametrize("argv", [["emulate", "d.json", "-o", "x.csv"], ["simulate", "d.json", "--probes", "coherent=1",
                                  "--shots", "5", "-o", "x.csv"], ["plan", "threshold", "--target", "efficiency:0.01",
                                  "-o", "x.csv"], ["batch", "m.csv", "-o", "x"], ["demo", "-o", "x"],
                                  ["tally", "click-log", "p.csv", "-o", "x.csv"]])
def test_short_o_parses_into_out(argv):
    assert build_parser().parse_args(argv).out == argv[-1]
