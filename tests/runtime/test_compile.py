"""Real PyTorch exports through the runtime: fast path, interpreter, torch and onnxruntime agree.

References: torch's own forward pass and onnxruntime on the same ONNX bytes. Tolerance: float32
networks of this size differ by a few units of float32 rounding (eps ≈ 1.2e-7) per layer
between implementations that sum in different orders (common practice), so 2e-5 absolute on
outputs of order 1.
"""

from __future__ import annotations

import io
import logging
import warnings

import numpy as np
import onnxruntime
import pytest
import torch

from stridecast.runtime import LevelEntry, Manifest, load, write_bundle

ACTIVATIONS = {
    "tanh": torch.nn.Tanh, "relu": torch.nn.ReLU, "gelu": torch.nn.GELU, "silu": torch.nn.SiLU,
    "elu": torch.nn.ELU, "softplus": torch.nn.Softplus, "mish": torch.nn.Mish,
    "leaky_relu": torch.nn.LeakyReLU, "sigmoid": torch.nn.Sigmoid, "selu": torch.nn.SELU,
}
MEAN, SCALE = (0.5, -1.0, 2.0), (2.0, 0.5, 3.0)


def network(activation: str, layer_norm: bool) -> torch.nn.Module:
    torch.manual_seed(3)
    act = ACTIVATIONS[activation]
    layers = [torch.nn.Linear(3, 24), act()]
    if layer_norm:
        layers.append(torch.nn.LayerNorm(24))
    layers += [torch.nn.Linear(24, 24), act(), torch.nn.Linear(24, 3)]
    return torch.nn.Sequential(*layers).eval()


def export(module: torch.nn.Module, exporter: str) -> bytes:
    example = torch.randn(8, 3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        logging.disable(logging.WARNING)
        try:
            if exporter == "dynamo":
                program = torch.onnx.export(
                    module, (example,), dynamo=True, input_names=["state"],
                    output_names=["next"], dynamic_shapes=({0: torch.export.Dim("batch")},),
                    verbose=False)
                return program.model_proto.SerializeToString()
            buffer = io.BytesIO()
            torch.onnx.export(module, (example,), buffer, dynamo=False, input_names=["state"],
                              output_names=["next"],
                              dynamic_axes={"state": {0: "batch"}, "next": {0: "batch"}})
            return buffer.getvalue()
        finally:
            logging.disable(logging.NOTSET)


# Every activation without normalisation layers; LayerNorm with a few (it takes the
# interpreter path whatever the activation), each through both exporters.
CASES = [(name, False) for name in sorted(ACTIVATIONS)] + [
    ("tanh", True), ("gelu", True), ("silu", True)]


@pytest.mark.parametrize("exporter", ["legacy", "dynamo"])
@pytest.mark.parametrize(("activation", "layer_norm"), CASES)
def test_export_runs_identically(tmp_path, activation, layer_norm, exporter):
    module = network(activation, layer_norm)
    data = export(module, exporter)
    manifest = Manifest(state_names=("a", "b", "c"), state_units=("", "", ""), base_step=0.1,
                        mean=MEAN, scale=SCALE,
                        levels=(LevelEntry(stride=1, file="", sha256="0" * 64),))
    bundle = write_bundle(tmp_path / "b.bundle", manifest, {1: data})
    fast, interpreted = load(bundle), load(bundle, fast_path=False)
    if not layer_norm:
        # Plain MLPs must take the fast path whatever the exporter emits for the activation.
        assert fast.kernel_paths[1] == "affine-chain"
    states = np.random.default_rng(0).normal(size=(33, 3)).astype(np.float32)
    normalised = (states - np.float32(MEAN)) / np.float32(SCALE)
    with torch.no_grad():
        increment = module(torch.from_numpy(normalised)).numpy()
    session = onnxruntime.InferenceSession(data, providers=["CPUExecutionProvider"])
    ort_increment = session.run(None, {"state": normalised})[0]
    expected_torch = states + np.float32(SCALE) * increment
    expected_ort = states + np.float32(SCALE) * ort_increment
    for stepper in (fast, interpreted):
        result = stepper.advance(states, 0.1)
        np.testing.assert_allclose(result, expected_torch, atol=2e-5, rtol=0)
        np.testing.assert_allclose(result, expected_ort, atol=2e-5, rtol=0)
        # Batch of one (the small-batch kernel) equals the row of the batch.
        np.testing.assert_allclose(stepper.advance(states[5], 0.1), result[5], atol=2e-6)
