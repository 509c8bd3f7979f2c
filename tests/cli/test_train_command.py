"""`stridecast train`: every train_levels option with its default in --help, one-line errors
for malformed options, ragged data files, and the closing summary.

Trajectories are exact samples of a damped oscillator, x(t) = expm(A t) x0 (matrix-exponential
solution of x' = A x, scipy.linalg.expm).
"""

from __future__ import annotations

import inspect

import numpy as np
import pytest

from stridecast.cli import build_parser, main
from stridecast.cli.train_command import ACTIVATIONS, TRAINING_OPTIONS
from stridecast.runtime import load
from tests.systems import DAMPED_OSCILLATOR, linear_trajectories


def train_parser():
    parser = build_parser()
    subparsers = next(action for action in parser._actions if action.dest == "command")
    return subparsers.choices["train"]


def test_parser_defaults_are_those_of_train_levels():
    from stridecast.export import train_levels
    from stridecast.export.networks import ACTIVATIONS as NETWORK_ACTIVATIONS

    signature = inspect.signature(train_levels).parameters
    arguments = train_parser().parse_args(["data.npz", "--strides", "1", "-o", "out"])
    for name, keyword in TRAINING_OPTIONS.items():
        assert getattr(arguments, name) == signature[keyword].default, name
    assert tuple(sorted(NETWORK_ACTIVATIONS)) == ACTIVATIONS


def test_help_lists_every_option_with_its_default(capsys):
    with pytest.raises(SystemExit) as exit_info:
        main(["train", "--help"])
    assert exit_info.value.code == 0
    text = " ".join(capsys.readouterr().out.split())
    for flag, default in [("--learning-rate", "0.001"), ("--batch-size", "256"),
                          ("--validation-fraction", "0.1"), ("--rollout", "4"),
                          ("--epochs", "50"), ("--hidden", "128,128,128"),
                          ("--activation", "tanh"), ("--seed", "0"), ("--threads", "1"),
                          ("--max-windows-per-epoch", "65536"), ("--tolerance", "0.1"),
                          ("--patience", "10")]:
        assert flag in text
        after = text[text.rindex(flag + " "):]  # its entry, after the usage line
        assert f"(default: {default})" in after[:400], flag
    for flag in ("--horizon", "--keep-all-levels", "--time-unit", "--base-step"):
        assert flag in text
    assert "{" + ",".join(ACTIVATIONS) + "}" in text


@pytest.mark.parametrize(("options", "message"), [
    (["--hidden", "64x64"],
     "`--hidden` is '64x64'; expected comma-separated positive integers, e.g. 64,64."),
    (["--strides", "1,0"], "`--strides` is '1,0'; expected comma-separated positive integers"),
    (["--learning-rate", "fast"], "`--learning-rate` is 'fast'; expected a number in (0, inf)."),
    (["--validation-fraction", "1"],
     "`--validation-fraction` is '1'; expected a number in [0, 1)."),
    (["--tolerance", "0"], "`--tolerance` is '0'; expected a number in (0, inf)."),
    (["--horizon", "-2"], "`--horizon` is '-2'; expected a number in (0, inf) or none."),
    (["--epochs", "2.5"], "`--epochs` is '2.5'; expected an integer ≥ 1."),
    (["--patience", "0"], "`--patience` is '0'; expected an integer ≥ 1 or none/off/all."),
    (["--seed", "-1"], "`--seed` is '-1'; expected an integer ≥ 0."),
    (["--activation", "swish"], "argument --activation: invalid choice: 'swish'"),
    (["--base-step", "nan"], "`--base-step` is 'nan'; expected a number in (0, inf)."),
])
def test_malformed_options_end_in_one_line(options, message, capsys):
    arguments = ["train", "data.npz", "--strides", "1,4", "-o", "out", *options]
    with pytest.raises(SystemExit) as exit_info:
        main(arguments)
    assert exit_info.value.code == 2
    error = capsys.readouterr().err
    assert message in error and "Traceback" not in error


def test_optional_none_words():
    arguments = train_parser().parse_args(
        ["d.npz", "--strides", "1", "-o", "o", "--patience", "none", "--threads", "None",
         "--max-windows-per-epoch", "all", "--horizon", "12.5", "--keep-all-levels"])
    assert arguments.patience is None and arguments.threads is None
    assert arguments.max_windows_per_epoch is None and arguments.horizon == 12.5
    assert arguments.keep_all_levels is True


def test_train_ragged_folder_prints_summary(tmp_path, capsys):
    folder = tmp_path / "runs"
    folder.mkdir()
    data = linear_trajectories(DAMPED_OSCILLATOR, base_step=0.1, count=12, steps=50, seed=5)
    for index, trajectory in enumerate(data):
        np.save(folder / f"run{index}.npy", trajectory[: 30 + 2 * index])
    out = tmp_path / "ragged.bundle"
    code = main(["train", str(folder), "--base-step", "0.1", "--time-unit", "min", "--strides",
                 "1,4", "--hidden", "8", "--epochs", "2", "--rollout", "2", "--patience", "none",
                 "--validation-fraction", "0.25", "-o", str(out), "--no-progress"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    stepper = load(out)
    assert stepper.base_step == 0.1 and stepper.manifest.time_unit == "min"
    lines = captured.out.splitlines()
    assert lines[0] == f"trained 2 levels and wrote the verified bundle {out}"
    assert lines[1].startswith("levels kept: ")
    assert any(line.startswith("validated horizon: ") for line in lines)
    assert any("hierarchy error" in line and "finest-only" in line for line in lines)


@pytest.mark.parametrize(("text", "value"), [("8", 8), ("0.999", 0.999), ("none", None)])
def test_reduce_takes_a_mode_count_or_an_energy_fraction(text, value):
    arguments = train_parser().parse_args(["d.npy", "--strides", "1", "-o", "o",
                                           "--reduce", text])
    assert arguments.reduce == value and type(arguments.reduce) is type(value)


@pytest.mark.parametrize("text", ["0", "1.0", "1.5", "-3", "many"])
def test_malformed_reduce_ends_in_one_line(text, capsys):
    with pytest.raises(SystemExit) as exit_info:
        main(["train", "data.npy", "--strides", "1", "-o", "out", "--reduce", text])
    assert exit_info.value.code == 2
    error = capsys.readouterr().err
    assert (f"`--reduce` is {text!r}; expected a number of modes (an integer ≥ 1, e.g. 8) or "
            "an energy fraction in (0, 1) (e.g. 0.999).") in error


def test_train_reduce_round_trip(tmp_path, capsys):
    """A field from the 1-D heat equation (u_t = u_xx, u = 0 at both ends, central
    differences on 32 points; flow map scipy.linalg.expm) whose states hold three sine modes,
    eigenvectors of the discrete Laplacian (closed form φ_k[j] ∝ sin(jkπ/(n + 1)))."""
    from scipy.linalg import expm

    points, base_step = 32, 5e-4
    spacing = 1.0 / (points + 1)
    laplacian = (np.diag(-2.0 * np.ones(points)) + np.diag(np.ones(points - 1), 1)
                 + np.diag(np.ones(points - 1), -1)) / spacing**2
    grid = np.arange(1, points + 1) * spacing
    modes = np.sin(np.pi * np.outer(grid, [1, 2, 3]))
    rng = np.random.default_rng(4)
    step = expm(laplacian * base_step)  # SciPy's matrix exponential: the exact flow map
    states = [rng.normal(size=(16, 3)) * [1.0, 0.5, 0.25] @ modes.T]
    for _ in range(59):
        states.append(states[-1] @ step.T)
    data = tmp_path / "field.npy"
    np.save(data, np.stack(states, axis=1))  # (N, T, d)
    out = tmp_path / "field.bundle"
    code = main(["train", str(data), "--base-step", str(base_step), "--strides", "1,4",
                 "--reduce", "0.999999", "--hidden", "8", "--epochs", "2", "--rollout", "2",
                 "--validation-fraction", "0.25", "-o", str(out), "--no-progress"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    stepper = load(out)
    assert stepper.latent_dim == 3 and stepper.state_dim == points
    assert stepper.manifest.reduction.reconstruction_threshold > 0
    line = next(line for line in captured.out.splitlines() if line.startswith("reduced: "))
    assert line.startswith(f"reduced: 3 latent coordinates for {points} components (POD), "
                           "energy kept ")
