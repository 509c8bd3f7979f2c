"""argparse helpers of the CLI (stridecast/cli/parsing.py), checked against argparse itself:
what the standard parser does with the same tokens, its exit status 2 for usage errors
(argparse documentation) and its handling of `--opt=value`."""

from __future__ import annotations

import argparse

import pytest

from stridecast.caution import CAUTION
from stridecast.cli.parsing import (
    DeprecatedAlias,
    Parser,
    ShowCaution,
    add_command,
    add_state_options,
    join_negative_values,
)
from stridecast.runtime.validation import DTYPES, OFF_GRID_POLICIES


def _parser() -> Parser:
    parser = Parser(prog="t")
    parser.add_argument("--caution-text", action=ShowCaution, help="show it")
    parser.add_argument("-v", "--verbose", action="store_true")
    subparsers = parser.add_subparsers(dest="command")
    command = add_command(subparsers, "advance", "Advance a state.", "t advance --state=1",
                          "handle_advance")
    add_state_options(command)
    command.add_argument("--time", type=float)
    command.add_argument("--t", dest="time", type=float, action=DeprecatedAlias,
                         new_name="--time")
    return parser


@pytest.mark.parametrize("value", ["-3.6,0,0,0", "-.5", "-inf", "-NaN,1", "-0"])
def test_negative_values_are_joined_to_their_option(value):
    parser = _parser()
    argv = ["advance", "--state", value, "--time", "-2.5"]
    joined = join_negative_values(parser, argv)
    assert joined == ["advance", f"--state={value}", "--time=-2.5"]
    # Reference: argparse reads `--opt=value` as the value, whatever it starts with.
    arguments = parser.parse_args(joined)
    assert arguments.state == [value] and arguments.time == -2.5


def test_options_without_values_and_option_like_tokens_are_left_alone():
    parser = _parser()
    argv = ["advance", "--json", "-5", "--state", "-x", "--off-grid", "error", "-v"]
    # --json takes no value, and "-x" is not a number: argparse decides about them.
    assert join_negative_values(parser, argv) == argv
    assert join_negative_values(parser, ["--state"]) == ["--state"]  # no following token


def test_without_joining_argparse_rejects_a_negative_value_and_the_hint_says_why(capsys):
    with pytest.raises(SystemExit) as stopped:
        _parser().parse_args(["advance", "--state", "-3.6,0", "--time", "1"])
    assert stopped.value.code == 2
    error = capsys.readouterr().err
    assert "expected one argument" in error
    assert "a value starting with '-' is written with '=', e.g. `--state=-3.6,0,0,0`" in error


def test_other_usage_errors_get_no_hint(capsys):
    with pytest.raises(SystemExit) as stopped:
        _parser().parse_args(["advance", "--state", "1", "--off-grid", "sideways"])
    assert stopped.value.code == 2
    error = capsys.readouterr().err
    assert "invalid choice: 'sideways'" in error and "written with '='" not in error


def test_the_deprecated_alias_works_prints_its_note_and_is_hidden(capsys):
    parser = _parser()
    arguments = parser.parse_args(["advance", "--state", "1", "--t", "0.8"])
    assert arguments.time == 0.8
    assert capsys.readouterr().err == "stridecast: `--t` is deprecated; write `--time`.\n"
    parser.parse_args(["advance", "--state", "1", "--time", "0.8"])
    assert capsys.readouterr().err == ""  # the new name says nothing
    with pytest.raises(SystemExit):
        parser.parse_args(["advance", "--help"])
    text = capsys.readouterr().out
    assert "--time" in text and "--t " not in text and "--t T" not in text


def test_show_caution_prints_the_caution_and_exits_zero(capsys):
    with pytest.raises(SystemExit) as stopped:
        _parser().parse_args(["--caution-text"])
    assert stopped.value.code == 0
    assert capsys.readouterr().out == CAUTION + "\n"


def test_state_options_defaults_choices_and_exclusivity(capsys):
    parser = _parser()
    arguments = parser.parse_args(["advance", "--state", "1,2", "--state", "3,4"])
    assert arguments.state == ["1,2", "3,4"]  # repeatable for a batch
    assert (arguments.off_grid, arguments.dtype, arguments.json, arguments.caution) == (
        "interpolate", "float32", False, False)
    assert arguments.handler == "handle_advance"
    assert parser.parse_args(["advance", "--state-file", "s.npy"]).state_file == "s.npy"
    for argv in (["advance"], ["advance", "--state", "1", "--state-file", "s.npy"],
                 ["advance", "--state", "1", "--dtype", "float16"]):
        with pytest.raises(SystemExit) as stopped:
            parser.parse_args(argv)
        assert stopped.value.code == 2
    capsys.readouterr()
    with pytest.raises(SystemExit):
        parser.parse_args(["advance", "--help"])
    text = capsys.readouterr().out
    flat = " ".join(text.split())
    # The runtime's lists of choices, shown in help; the description carries the example.
    for choice in (*OFF_GRID_POLICIES, *DTYPES):
        assert choice in text
    assert "example:\n  t advance --state=1" in text and "(default: interpolate)" in flat


def test_the_parser_class_is_an_argparse_parser():
    assert issubclass(Parser, argparse.ArgumentParser)
