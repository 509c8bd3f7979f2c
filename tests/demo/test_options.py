"""The options of `stridecast demo` (stridecast/demo/options.py), parsed by argparse itself."""

from __future__ import annotations

import argparse
from pathlib import Path

import pytest

from stridecast.demo.options import add_arguments


def _arguments(*argv: str) -> argparse.Namespace:
    parser = argparse.ArgumentParser(prog="demo")
    add_arguments(parser)
    return parser.parse_args(list(argv))


def test_options_and_their_defaults():
    arguments = _arguments()
    assert arguments.out is None  # each scenario has its own default folder
    assert arguments.scenario == "crane"
    assert (arguments.quick, arguments.overwrite, arguments.no_progress) == (False,) * 3
    assert arguments.plots_dir is None
    arguments = _arguments("--out", "x.bundle", "--quick", "--overwrite", "--no-progress",
                           "--plots-dir", "plots")
    assert (str(arguments.out), str(arguments.plots_dir)) == ("x.bundle", "plots")
    assert arguments.quick and arguments.overwrite and arguments.no_progress


def test_folders_are_paths_and_the_scenario_a_known_name():
    arguments = _arguments("--scenario", "mooring", "--out", "a/b.bundle", "--plots-dir", "p")
    assert isinstance(arguments.out, Path) and isinstance(arguments.plots_dir, Path)
    assert arguments.scenario == "mooring"


@pytest.mark.parametrize("argv", [["--quick", "yes"], ["--out"], ["--scenario"],
                                  ["--speed", "2"]])
def test_malformed_options_are_usage_errors(argv, capsys):
    # argparse's own convention: usage errors exit with status 2 and a message on stderr.
    with pytest.raises(SystemExit) as stopped:
        _arguments(*argv)
    assert stopped.value.code == 2
    assert "error:" in capsys.readouterr().err


def test_every_option_has_help_that_names_its_default(capsys):
    with pytest.raises(SystemExit) as stopped:
        _arguments("--help")
    assert stopped.value.code == 0
    text = capsys.readouterr().out
    for option in ("--scenario", "--out", "--quick", "--overwrite", "--no-progress",
                   "--plots-dir"):
        assert option in text
    assert "default: ./NAME-demo.bundle" in text and "default: the bundle folder" in text
