"""What the CLI calls: level files (.pt2, TorchScript) to bundles, data files to bundles."""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
from torch import nn

from stridecast.export.cli_support import (
    export_from_files,
    parse_level_option,
    read_normalization,
    train_from_file,
)
from stridecast.runtime import BundleError, StateError, load
from tests.systems import DAMPED_OSCILLATOR, linear_trajectories

MEAN, SCALE = [0.5, -1.0], [2.0, 4.0]


def network(seed: int) -> nn.Module:
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(2, 16), nn.Tanh(), nn.Linear(16, 2))


@pytest.fixture
def level_files(tmp_path) -> tuple[dict[int, Path], dict[int, nn.Module]]:
    fine, coarse = network(1), network(2)
    program = torch.export.export(coarse, (torch.zeros(4, 2),),
                                  dynamic_shapes=({0: torch.export.Dim("batch")},))
    torch.export.save(program, tmp_path / "coarse.pt2")
    with warnings.catch_warnings():
        # TorchScript is deprecated in torch but still a supported level file format.
        warnings.simplefilter("ignore", DeprecationWarning)
        torch.jit.trace(fine, torch.zeros(4, 2)).save(str(tmp_path / "fine.pt"))
    stats = tmp_path / "stats.json"
    stats.write_text(json.dumps({"mean": MEAN, "scale": SCALE, "state_names": ["q", "p"]}))
    return {1: tmp_path / "fine.pt", 8: tmp_path / "coarse.pt2"}, {1: fine, 8: coarse}


def test_parse_level_option():
    assert parse_level_option("4=levels/coarse.pt2") == (4, Path("levels/coarse.pt2"))
    for text, message in [("4", r"expected STRIDE=FILE"), ("x=a.pt2", r"'x' is not an integer"),
                          ("0=a.pt2", r"stride 0 must be a positive")]:
        with pytest.raises(BundleError, match=message):
            parse_level_option(text)


def test_export_from_files(tmp_path, level_files):
    files, modules = level_files
    bundle = export_from_files(files, tmp_path / "files.bundle", base_step=0.5,
                               normalization_json=tmp_path / "stats.json", name="from files")
    stepper = load(bundle)
    assert stepper.strides == (1, 8) and stepper.state_names == ("q", "p")
    assert stepper.manifest.name == "from files"
    assert stepper.manifest.producer["exporter"] == {"1": "legacy", "8": "dynamo"}
    states = np.random.default_rng(0).normal(size=(50, 2)).astype(np.float32)
    for stride, module in modules.items():
        z = torch.from_numpy(((states - MEAN) / np.array(SCALE)).astype(np.float32))
        with torch.no_grad():
            expected = MEAN + np.array(SCALE) * (z + module(z)).double().numpy()
        # Expected: torch on the original modules; float32 rounding allowed (docs/export.md).
        np.testing.assert_allclose(stepper.step(states, stride), expected, rtol=1e-5, atol=1e-5)


def test_refuses_pickled_module(tmp_path):
    torch.save(network(0), tmp_path / "pickled.pt")
    torch.save(network(0), tmp_path / "pickled.pt2")
    with pytest.raises(BundleError, match=r"level stride 1 .* cannot be read as a TorchScript "
                                          r"archive .*pickled modules are refused"):
        export_from_files({1: tmp_path / "pickled.pt"}, tmp_path / "b", base_step=1.0)
    with pytest.raises(BundleError, match=r"cannot be read as a torch\.export program"):
        export_from_files({1: tmp_path / "pickled.pt2"}, tmp_path / "b", base_step=1.0)
    with pytest.raises(BundleError, match=r"level stride 2 .* does not exist"):
        export_from_files({2: tmp_path / "missing.pt"}, tmp_path / "b", base_step=1.0)
    assert not (tmp_path / "b").exists()


def test_refuses_repeated_level(tmp_path, level_files):
    files, _ = level_files
    with pytest.raises(BundleError, match=r"`levels` repeats stride 8"):
        export_from_files([(8, files[8]), (8, files[8])], tmp_path / "b", base_step=1.0)


@pytest.mark.parametrize(("text", "message"), [
    ("{", r"is not valid JSON"),
    ("[1, 2]", r"must hold a JSON object"),
    ('{"mean": [0, 0]}', r"lacks \['scale'\]"),
    ('{"mean": [0], "scale": [1], "offset": 2}', r"has unknown keys \['offset'\]"),
])
def test_refuses_bad_normalization(tmp_path, text, message):
    path = tmp_path / "stats.json"
    path.write_text(text)
    with pytest.raises(BundleError, match=message):
        read_normalization(path)


def test_train_from_file(tmp_path):
    data = tmp_path / "data.npz"
    np.savez(data, trajectories=linear_trajectories(DAMPED_OSCILLATOR, base_step=0.1, count=12,
                                                    steps=30, seed=0),
             base_step=0.1, state_names=np.array(["q", "p"]), units=np.array(["m", "m/s"]))
    bundle, trained = train_from_file(data, tmp_path / "trained.bundle", strides=(1, 4),
                                      hidden=(8,), epochs=2, rollout=2, progress=False)
    stepper = load(bundle)
    assert stepper.strides == (1, 4) and stepper.state_units == ("m", "m/s")
    assert stepper.manifest.validated_horizon == trained.validated_horizon
    report = json.loads((bundle / "report.json").read_text())
    assert set(report) == {"verification", "validation", "training", "plots", "envelope"}
    assert report["plots"] == ["forecast.png", "error-vs-horizon.png"]
    for name in report["plots"]:
        assert (bundle / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert report["training"]["settings"]["strides"] == [1, 4]

    with pytest.raises(BundleError, match=r"already exists"):
        train_from_file(data, bundle, strides=(1,), epochs=1)
    with pytest.raises(StateError, match=r"`base_step` is 0\.2 but .* says 0\.1\."):
        train_from_file(data, tmp_path / "other", strides=(1,), base_step=0.2)
    np.save(tmp_path / "plain.npy", np.zeros((2, 30, 2)))
    with pytest.raises(StateError, match=r"holds no `base_step`; pass --base-step"):
        train_from_file(tmp_path / "plain.npy", tmp_path / "other", strides=(1,))
