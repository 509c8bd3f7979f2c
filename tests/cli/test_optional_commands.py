"""`stridecast train`, `export` and `serve --help` from the command line.

Trajectories are exact samples of a damped oscillator, x(t) = expm(A t) x0 (matrix-exponential
solution of x' = A x, scipy.linalg.expm).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy.linalg import expm

from stridecast.cli import main
from stridecast.runtime import load
from tests.builders import oscillator_matrix


@pytest.fixture(scope="module")
def trajectory_file(tmp_path_factory):
    system = oscillator_matrix(1.0, 0.05)
    step = expm(system * 0.1)
    rng = np.random.default_rng(0)
    states = [rng.uniform(-1, 1, size=(24, 2))]
    for _ in range(80):
        states.append(states[-1] @ step.T)
    path = tmp_path_factory.mktemp("data") / "oscillator.npz"
    np.savez(path, trajectories=np.stack(states, axis=1), base_step=0.1)
    return path


def test_train_writes_a_loadable_bundle(trajectory_file, tmp_path, capsys):
    out = tmp_path / "trained.bundle"
    # --keep-all-levels: two epochs make weak levels, and selection may rightly drop one.
    code = main(["train", str(trajectory_file), "--strides", "1,4", "--hidden", "16,16",
                 "--epochs", "2", "--keep-all-levels", "-o", str(out), "--no-progress"])
    assert code == 0, capsys.readouterr().err
    stepper = load(out)
    assert stepper.strides == (1, 4) and stepper.base_step == 0.1
    assert main(["train", str(trajectory_file), "--strides", "1,4", "-o", str(out),
                 "--no-progress"]) == 1
    assert "already exists" in capsys.readouterr().err


def test_train_refuses_bad_data(tmp_path, capsys):
    path = tmp_path / "bad.npy"
    np.save(path, np.full((2, 10, 2), np.nan))
    assert main(["train", str(path), "--base-step", "0.1", "--strides", "1", "-o",
                 str(tmp_path / "x.bundle"), "--no-progress"]) == 1
    assert "NaN or infinity" in capsys.readouterr().err
    assert not (tmp_path / "x.bundle").exists()


def test_export_from_torch_export_programs(tmp_path, capsys):
    torch.manual_seed(0)
    files = []
    for stride in (1, 8):
        module = torch.nn.Sequential(torch.nn.Linear(2, 8), torch.nn.Tanh(),
                                     torch.nn.Linear(8, 2)).eval()
        program = torch.export.export(module, (torch.randn(4, 2),),
                                      dynamic_shapes=({0: torch.export.Dim("batch")},))
        path = tmp_path / f"level{stride}.pt2"
        torch.export.save(program, path)
        files += ["--level", f"{stride}={path}"]
    out = tmp_path / "exported.bundle"
    assert main(["export", *files, "--base-step", "0.05", "-o", str(out)]) == 0, \
        capsys.readouterr().err
    assert load(out).strides == (1, 8)
    assert main(["export", "--level", f"1={tmp_path / 'level1.pt2'}", "--level",
                 f"1={tmp_path / 'level1.pt2'}", "--base-step", "0.05", "-o",
                 str(tmp_path / "dup.bundle")]) == 1
    assert "stride" in capsys.readouterr().err


@pytest.mark.parametrize("command", ["demo", "train", "export", "serve", "bench"])
def test_help_has_example(command, capsys):
    with pytest.raises(SystemExit) as exit_info:
        main([command, "--help"])
    assert exit_info.value.code == 0
    assert "example:" in capsys.readouterr().out


@pytest.mark.parametrize(("flags", "expected"), [([], None), (["--threads", "3"], 3),
                                               (["--blas-threads", "2"], 2)])
def test_serve_passes_threads_per_worker_and_leaves_the_environment(monkeypatch, tmp_path,
                                                                      flags, expected):
    # `serve` hands the thread count to the runtime's policy (Settings.threads) instead of
    # setting BLAS variables; nothing in os.environ changes.
    import os

    from stridecast.service import server

    calls = []
    monkeypatch.setattr(server, "serve", lambda paths, **options: calls.append(options))
    before = dict(os.environ)
    assert main(["serve", str(tmp_path), *flags]) == 0
    assert dict(os.environ) == before
    assert calls[0].get("threads") == expected
