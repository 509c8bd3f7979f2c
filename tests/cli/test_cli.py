"""The parser: renamed options and their hidden aliases, values starting with '-', exit codes.

Expected states come from scipy.linalg.expm (matrix-exponential solution of x' = A x).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.linalg import expm

from stridecast.cli import build_parser, main
from tests.builders import linear_bundle, oscillator_matrix


@pytest.fixture
def bundle(tmp_path):
    return linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                         strides=(1, 4))


def _answer(capsys) -> dict:
    return json.loads(capsys.readouterr().out)


def _help(command: str, capsys) -> str:
    with pytest.raises(SystemExit):
        main([command, "--help"])
    return capsys.readouterr().out


def test_time_option_and_its_deprecated_alias(bundle, capsys):
    assert main(["advance", str(bundle), "--state", "1,0", "--time", "0.8", "--json"]) == 0
    new = _answer(capsys)
    assert main(["advance", str(bundle), "--state", "1,0", "--t", "0.8", "--json"]) == 0
    captured = capsys.readouterr()
    assert json.loads(captured.out) == new
    assert "`--t` is deprecated; write `--time`." in captured.err
    # Reference: scipy.linalg.expm.
    assert np.allclose(new["state"], expm(oscillator_matrix() * 0.8) @ [1, 0], atol=1e-5)
    text = _help("advance", capsys)
    assert "--time T" in text and "--t " not in text


def test_a_state_starting_with_minus_is_a_value(bundle, capsys):
    assert main(["advance", str(bundle), "--state", "-1,0.5", "--time", "0.4", "--json"]) == 0
    spaced = _answer(capsys)
    assert main(["advance", str(bundle), "--state=-1,0.5", "--time", "0.4", "--json"]) == 0
    assert _answer(capsys) == spaced
    # Reference: scipy.linalg.expm.
    assert np.allclose(spaced["state"], expm(oscillator_matrix() * 0.4) @ [-1, 0.5], atol=1e-5)
    assert main(["forecast", str(bundle), "--state", "-.5,-1", "--times", "0.4", "--json"]) == 0
    assert np.allclose(_answer(capsys)["states"][0],
                       expm(oscillator_matrix() * 0.4) @ [-0.5, -1], atol=1e-5)


def test_a_value_taken_for_an_option_says_to_write_equals(bundle, capsys):
    with pytest.raises(SystemExit) as stop:
        main(["advance", str(bundle), "--state", "-x,0", "--time", "0.4"])
    assert stop.value.code == 2
    assert "written with '=', e.g. `--state=-3.6,0,0,0`" in capsys.readouterr().err


def test_forecast_takes_a_batch_of_repeated_states(bundle, capsys, tmp_path):
    arguments = ["forecast", str(bundle), "--state", "1,0", "--state", "0,1",
                 "--times", "0.4,0.8"]
    assert main([*arguments, "--json"]) == 0
    states = np.asarray(_answer(capsys)["states"])
    assert states.shape == (2, 2, 2)  # (times, members, components)
    for index, t in enumerate((0.4, 0.8)):
        # Reference: scipy.linalg.expm applied to each member.
        expected = (expm(oscillator_matrix() * t) @ np.eye(2)).T
        assert np.allclose(states[index], expected, atol=1e-5)
    out = tmp_path / "batch.csv"
    assert main([*arguments, "--out", str(out)]) == 0
    assert out.read_text().splitlines()[0] == "t,member,x0,x1"
    table = np.loadtxt(out, delimiter=",", skiprows=1)
    assert table[:, :2].tolist() == [[0.4, 0], [0.4, 1], [0.8, 0], [0.8, 1]]
    assert np.allclose(table[:, 2:], states.reshape(4, 2), atol=1e-6)
    capsys.readouterr()
    assert main(arguments) == 0
    assert "member" in capsys.readouterr().out.splitlines()[0]


def test_every_option_says_what_it_does():
    parser = build_parser()
    subparsers = next(action for action in parser._actions if action.choices
                      and isinstance(action.choices, dict))
    missing = [f"{name} {action.option_strings[0]}"
               for name, command in subparsers.choices.items()
               for action in command._actions
               if action.option_strings and not action.help]
    assert missing == []


def test_help_documents_the_exit_codes(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["--help"])
    assert stop.value.code == 0
    text = capsys.readouterr().out
    assert "0  success" in text and "1  failure" in text and "2  usage" in text
