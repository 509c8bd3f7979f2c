"""export_bundle: round trips through both exporters, argument checks, atomic refusal."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import onnxruntime
import pytest
import torch
from torch import nn

from stridecast.export import Tolerance, TrainedLevels, VerificationError, export_bundle
from stridecast.export import bundle_export as bundle_export_module
from stridecast.runtime import BundleError, load

ACTIVATIONS = {
    "relu": nn.ReLU, "tanh": nn.Tanh, "sigmoid": nn.Sigmoid, "gelu": nn.GELU,
    "gelu_tanh": lambda: nn.GELU(approximate="tanh"), "silu": nn.SiLU, "elu": nn.ELU,
    "softplus": nn.Softplus, "leaky_relu": nn.LeakyReLU, "mish": nn.Mish,
}
MEAN = [1.0, -2.0, 300.0]
SCALE = [0.5, 2.0, 10.0]
# Tolerance of the independent check below, in normalised units: the float32 bound the exporter
# uses (docs/export.md), which is common practice for comparing float32 implementations.
TOLERANCE = Tolerance()


def mlp(activation: str, *, layer_norm: bool = True, dim: int = 3, seed: int = 0) -> nn.Module:
    torch.manual_seed(seed)
    layers = [nn.Linear(dim, 32)]
    if layer_norm:
        layers.append(nn.LayerNorm(32))
    layers += [ACTIVATIONS[activation](), nn.Linear(32, 32), ACTIVATIONS[activation](),
               nn.Linear(32, dim)]
    return nn.Sequential(*layers)


def reference_next(module: nn.Module, states: np.ndarray, update: str = "increment"
                   ) -> tuple[np.ndarray, np.ndarray]:
    """The normalised float32 input and torch's next normalised state (float64)."""
    z = ((states.astype(np.float64) - MEAN) / SCALE).astype(np.float32)
    with torch.no_grad():
        network = module(torch.from_numpy(z)).double().numpy()
    return z, (z + network if update == "increment" else network)


def check_against_references(bundle: Path, module: nn.Module, stride: int,
                             update: str = "increment") -> None:
    stepper = load(bundle)
    states = np.random.default_rng(5).uniform(
        np.subtract(MEAN, 3 * np.array(SCALE)), np.add(MEAN, 3 * np.array(SCALE)),
        size=(200, 3)).astype(np.float32)
    z, expected = reference_next(module, states, update)
    runtime = (stepper.step(states, stride).astype(np.float64) - MEAN) / SCALE
    session = onnxruntime.InferenceSession(
        (bundle / f"levels/stride-{stride:05d}.onnx").read_bytes(),
        providers=["CPUExecutionProvider"])
    network = session.run(None, {"state": z})[0].astype(np.float64)
    by_onnxruntime = z + network if update == "increment" else network
    bound = TOLERANCE.bound(expected, states, np.asarray(MEAN) + np.asarray(SCALE) * expected,
                            np.asarray(MEAN), np.asarray(SCALE))
    # Expected values: torch itself and onnxruntime (reference implementations).
    assert np.all(np.abs(runtime - expected) <= bound)
    assert np.all(np.abs(by_onnxruntime - expected) <= bound)
    assert np.all(np.abs(runtime - by_onnxruntime) <= bound)


@pytest.mark.parametrize("exporter", ["dynamo", "legacy"])
@pytest.mark.parametrize("activation", sorted(ACTIVATIONS))
def test_round_trip_each_activation(tmp_path, activation, exporter):
    module = mlp(activation)
    bundle = export_bundle({4: module}, tmp_path / "b", base_step=0.5, mean=MEAN, scale=SCALE,
                           exporter=exporter, verify_samples=256)
    check_against_references(bundle, module, 4)
    report = json.loads((bundle / "report.json").read_text())
    level = report["verification"]["levels"][0]
    assert level["exporter"] == exporter and level["opset"] >= 17
    assert 0 <= level["max_difference_over_tolerance"] <= 1
    assert level["max_abs_difference"]["torch_vs_onnxruntime"] is not None


def test_manifest_fields_and_replace_update(tmp_path):
    fine, coarse = mlp("tanh", seed=1), mlp("relu", layer_norm=False, seed=2)
    bundle = export_bundle(
        [(16, coarse), (1, fine)], tmp_path / "two.bundle", base_step=0.25, mean=MEAN,
        scale=SCALE, update="replace", state_names=["a", "b", "c"], units=["m", "m/s", "K"],
        time_unit="ms", description="test", envelope={"min": [0, -5, 280], "max": [2, 1, 320]},
        validation={"validated_horizon": 12.5, "note": "given"})
    document = json.loads((bundle / "manifest.json").read_text())
    assert document["name"] == "two"
    assert [level["stride"] for level in document["levels"]] == [1, 16]
    assert document["update"] == "replace"
    assert document["time"] == {"base_step": 0.25, "unit": "ms"}
    assert document["envelope"] == {"min": [0.0, -5.0, 280.0], "max": [2.0, 1.0, 320.0]}
    assert document["validated_horizon"] == 12.5
    assert document["producer"]["exporter"] == {"1": "dynamo", "16": "dynamo"}
    report = json.loads((bundle / "report.json").read_text())
    assert report["validation"]["note"] == "given"
    assert report["verification"]["states"] == "uniform in the envelope box"
    check_against_references(bundle, fine, 1, update="replace")
    check_against_references(bundle, coarse, 16, update="replace")


def test_module_is_not_modified(tmp_path):
    module = mlp("tanh").double().train()
    export_bundle({1: module}, tmp_path / "b", base_step=1.0, mean=MEAN, scale=SCALE,
                  exporter="legacy")
    assert module.training and next(module.parameters()).dtype == torch.float64


def test_state_dimension_inferred_from_module(tmp_path):
    bundle = export_bundle({2: mlp("tanh", dim=2)}, tmp_path / "b", base_step=1.0,
                           exporter="legacy")
    document = json.loads((bundle / "manifest.json").read_text())
    assert document["state"]["names"] == ["x0", "x1"]
    assert document["normalization"] == {"mean": [0.0, 0.0], "scale": [1.0, 1.0]}


# TorchScript is deprecated in torch but still a supported input format of the exporter.
@pytest.mark.filterwarnings("ignore:`torch.jit.script` is deprecated:DeprecationWarning")
def test_torchscript_and_program_levels(tmp_path):
    scripted = torch.jit.script(mlp("tanh", seed=3))
    example = torch.zeros(4, 3)
    program = torch.export.export(mlp("gelu", seed=4), (example,),
                                  dynamic_shapes=({0: torch.export.Dim("batch")},))
    bundle = export_bundle({1: scripted, 8: program}, tmp_path / "b", base_step=1.0, mean=MEAN,
                           scale=SCALE)
    exporters = json.loads((bundle / "manifest.json").read_text())["producer"]["exporter"]
    assert exporters == {"1": "legacy", "8": "dynamo"}
    check_against_references(bundle, scripted, 1)
    check_against_references(bundle, program.module(), 8)


# ------------------------------------------------------------------------------ bad arguments
def export_with(tmp_path, levels=None, **overrides):
    # The legacy exporter is the fast one; these tests are not about the exporter.
    arguments = {"base_step": 1.0, "mean": [0.0, 0.0, 0.0], "scale": [1.0, 1.0, 1.0],
                 "exporter": "legacy"}
    arguments.update(overrides)
    return export_bundle(levels if levels is not None else {1: mlp("tanh")}, tmp_path / "b",
                         **arguments)


@pytest.mark.parametrize(("levels", "message"), [
    ([(4, "a"), (4, "b")], r"`levels` repeats stride 4; strides must be distinct\."),
    ({0: None}, r"stride 0 must be a positive number of base steps\."),
    ({-3: None}, r"stride -3 must be a positive number of base steps\."),
    ({1.5: None}, r"stride 1\.5 is not an integer"),
    ({True: None}, r"stride True is not an integer"),
    ({}, r"`levels` is empty"),
    ({1: "not a module"}, r"level stride 1 is a str; expected a torch\.nn\.Module"),
])
def test_refuses_bad_levels(tmp_path, levels, message):
    with pytest.raises(BundleError, match=message):
        export_with(tmp_path, levels)
    assert not (tmp_path / "b").exists()


def test_refuses_wrong_output_shape(tmp_path):
    with pytest.raises(BundleError, match=r"level stride 2: the module maps a batch of shape "
                                          r"\(8, 3\) to shape \(8, 2\); expected \(8, 3\)"):
        export_with(tmp_path, {1: mlp("tanh"), 2: nn.Linear(3, 2)})


def test_refuses_tuple_output(tmp_path):
    class Pair(nn.Module):
        def forward(self, z):
            return z, z

    with pytest.raises(BundleError, match=r"level stride 1: the module returned a tuple"):
        export_with(tmp_path, {1: Pair()})


@pytest.mark.parametrize(("overrides", "message"), [
    ({"mean": [0.0, float("nan"), 0.0]}, r"`mean` must be finite; entry 1 is nan\."),
    ({"scale": [1.0, float("inf"), 1.0]}, r"`scale` must be finite; entry 1 is inf\."),
    ({"scale": [1.0, 0.0, 1.0]}, r"`scale` must be > 0 in every component; entry 1 is 0\.0\."),
    ({"scale": [1.0, 1.0, -2.0]}, r"`scale` must be > 0 in every component; entry 2 is -2\.0\."),
    ({"scale": [1.0, 1.0]}, r"`scale` has 2 entries; the state has 3\."),
    ({"base_step": 0.0}, r"`base_step` is 0\.0; expected a finite number > 0\."),
    ({"base_step": float("nan")}, r"`base_step` is nan; expected a finite number > 0\."),
    ({"base_step": None}, r"`base_step` is required"),
    ({"update": "add"}, r"`update` is 'add'; expected one of \['increment', 'replace'\]\."),
    ({"exporter": "onnx"}, r"`exporter` is 'onnx'; expected one of"),
    ({"state_names": ["a", "a", "b"]}, r"`state_names` must be distinct"),
    ({"units": ["m"]}, r"`units` is \['m'\]; expected a list of 3 strings\."),
    ({"envelope": ([0, 0, 0], [1, -1, 1])}, r"`envelope` min exceeds max in component 1"),
    ({"validation": {"x": float("nan")}}, r"`validation` must be JSON-serialisable"),
    ({"verify_samples": 1}, r"`verify_samples` is 1; expected an integer ≥ 2\."),
    ({"verify_states": np.zeros((4, 2))}, r"`verify_states` has shape \(4, 2\)"),
])
def test_refuses_bad_arguments(tmp_path, overrides, message):
    with pytest.raises(BundleError, match=message):
        export_with(tmp_path, **overrides)
    assert not (tmp_path / "b").exists()


def test_refuses_static_batch_program(tmp_path):
    program = torch.export.export(mlp("tanh"), (torch.zeros(4, 3),))
    with pytest.raises(BundleError, match=r"level stride 1: the torch\.export program has a "
                                          r"fixed batch size of 4; re-export it"):
        export_with(tmp_path, {1: program})


@pytest.mark.filterwarnings("ignore:`torch.jit.script` is deprecated:DeprecationWarning")
def test_refuses_torchscript_with_dynamo(tmp_path):
    with pytest.raises(BundleError, match=r"level stride 1 is a TorchScript module, which the "
                                          r"dynamo exporter cannot trace"):
        export_with(tmp_path, {1: torch.jit.script(mlp("tanh"))}, exporter="dynamo")


def test_refuses_program_with_legacy(tmp_path):
    program = torch.export.export(mlp("tanh"), (torch.zeros(4, 3),),
                                  dynamic_shapes=({0: torch.export.Dim("batch")},))
    with pytest.raises(BundleError, match=r"level stride 1 is a torch\.export program, which "
                                          r"only the dynamo exporter takes"):
        export_with(tmp_path, {1: program}, exporter="legacy")


def test_refuses_bad_tolerance():
    with pytest.raises(BundleError, match=r"`Tolerance\.relative` is -1\.0; expected a finite"):
        Tolerance(relative=-1.0)


def test_verifies_on_given_states(tmp_path):
    states = np.random.default_rng(2).normal(size=(40, 3))
    bundle = export_with(tmp_path, verify_states=states, verify_samples=16)
    verification = json.loads((bundle / "report.json").read_text())["verification"]
    assert verification["states"] == "given states" and verification["samples"] == 16
    assert verification["box"]["min"] >= list(states.min(axis=0))


def test_refuses_existing_target_without_overwrite(tmp_path):
    (tmp_path / "b").mkdir()
    with pytest.raises(BundleError, match=r"already exists; pass overwrite=True"):
        export_with(tmp_path)


# The runtime's probe at load divides 0 by 0 too; its NumPy warning is expected here.
@pytest.mark.filterwarnings("ignore:invalid value encountered:RuntimeWarning")
def test_refuses_non_finite_module_output(tmp_path):
    class Blows(nn.Module):
        def forward(self, z):
            return z / (z[:, :1] - z[:, :1])

    with pytest.raises(VerificationError, match=r"level stride 1: the torch module returns NaN"):
        export_with(tmp_path, {1: Blows()})
    assert sorted(path.name for path in tmp_path.iterdir()) == []


# ---------------------------------------------------------------------- refusal leaves nothing
class Skewed:
    """A loaded stepper whose level outputs are shifted: what a wrong runtime would return."""

    def __init__(self, stepper, shift):
        self._stepper, self._shift = stepper, shift

    def step(self, state, stride):
        return self._stepper.step(state, stride) + np.float32(self._shift)


def test_mismatch_refuses_and_leaves_nothing(tmp_path, monkeypatch):
    monkeypatch.setattr(bundle_export_module, "load", lambda path, **kw: Skewed(load(path), 1e-2))
    with pytest.raises(VerificationError, match=r"level stride 1: torch and runtime differ by "
                                                r"0\.01 \(normalised units\) in component"):
        export_with(tmp_path)
    assert list(tmp_path.iterdir()) == []


def test_interrupted_export_keeps_existing_bundle(tmp_path, monkeypatch):
    original = export_with(tmp_path)
    manifest = (original / "manifest.json").read_bytes()

    def crash(*args, **kwargs):
        raise KeyboardInterrupt("simulated interruption during verification")

    monkeypatch.setattr(bundle_export_module, "verify_levels", crash)
    with pytest.raises(KeyboardInterrupt):
        export_with(tmp_path, {1: mlp("relu")}, overwrite=True)
    assert sorted(path.name for path in tmp_path.iterdir()) == ["b"]
    assert (original / "manifest.json").read_bytes() == manifest
    load(original)


def test_overwrite_replaces_bundle(tmp_path):
    export_with(tmp_path)
    replaced = export_with(tmp_path, {1: mlp("relu"), 4: mlp("elu")}, overwrite=True)
    assert load(replaced).strides == (1, 4)
    assert sorted(path.name for path in tmp_path.iterdir()) == ["b"]


def trained_linear(curve_errors: list[float | None]) -> TrainedLevels:
    """Exact expm levels (scipy.linalg.expm) with a given validation curve and samples."""
    from tests.systems import DAMPED_BASE_STEP as BASE_STEP
    from tests.systems import exact_level

    samples = np.random.default_rng(3).normal(size=(300, 2)).astype(np.float32)
    times = [BASE_STEP * (i + 1) for i in range(len(curve_errors))]
    curve = {"metric": "normalised_rms", "tolerance": 0.1, "reference_std": [1.0, 1.0],
             "times": times, "errors": curve_errors}
    return TrainedLevels(
        levels={1: exact_level(1), 4: exact_level(4)}, mean=(0.0, 0.0), scale=(1.0, 1.0),
        base_step=BASE_STEP, envelope_min=(-3.0, -3.0), envelope_max=(3.0, 3.0),
        validation={"validated_horizon": 999.0}, validation_curve=curve,
        envelope_samples=samples, envelope_radius=0.4)


def test_trained_levels_round_trip_validation_and_samples(tmp_path):
    trained = trained_linear([0.01, 0.05, 0.2, None, 0.05])
    bundle = export_bundle(trained, tmp_path / "trained.bundle", exporter="legacy",
                           verify_samples=64)
    stepper = load(bundle)
    manifest = stepper.manifest
    # The first crossing of 0.1 is at the third point: validated up to the second (0.2),
    # whatever the figures' own field says.
    assert manifest.validated_horizon == pytest.approx(0.2)
    assert manifest.validation.metric == "normalised_rms"
    assert manifest.validation.errors[3] == float("inf")
    assert manifest.validation.times == pytest.approx((0.1, 0.2, 0.3, 0.4, 0.5))
    assert manifest.envelope_samples.count == 300 and manifest.envelope_samples.radius == 0.4
    written = np.load(bundle / manifest.envelope_samples.file, allow_pickle=False)
    np.testing.assert_array_equal(written, trained.envelope_samples)
    document = json.loads((bundle / "manifest.json").read_text())
    assert document["validation"]["errors"] == [0.01, 0.05, 0.2, None, 0.05]
    assert document["envelope"]["samples"]["file"] == "envelope/samples.npy"


def test_plain_modules_with_envelope_samples(tmp_path):
    rng = np.random.default_rng(4)
    physical = rng.normal(loc=MEAN, scale=SCALE, size=(5000, 3))
    bundle = export_bundle({4: mlp("tanh")}, tmp_path / "plain.bundle", base_step=0.5, mean=MEAN,
                           scale=SCALE, exporter="legacy", verify_samples=64,
                           envelope_samples=physical)
    manifest = load(bundle).manifest
    # Thinned to 2048 states, normalised with the bundle's mean and scale; the box is the
    # given states' range.
    assert manifest.envelope_samples.count == 2048 and manifest.envelope_samples.radius > 0
    written = np.load(bundle / "envelope/samples.npy", allow_pickle=False)
    z = (physical - MEAN) / SCALE
    assert np.all(written.min(axis=0) >= z.min(axis=0) - 1e-6)
    np.testing.assert_allclose(manifest.envelope_min, physical.min(axis=0))
    assert manifest.validation is None and manifest.validated_horizon is None

    bundle = export_bundle({4: mlp("tanh")}, tmp_path / "radius.bundle", base_step=0.5,
                           mean=MEAN, scale=SCALE, exporter="legacy", verify_samples=64,
                           envelope_samples=physical[:100], envelope_radius=0.25)
    assert load(bundle).manifest.envelope_samples.radius == 0.25


@pytest.mark.parametrize(("overrides", "message"), [
    ({"envelope_samples": np.zeros((4, 2))},
     r"`envelope_samples` has shape \(4, 2\); expected \(M, 3\) with M ≥ 1\."),
    ({"envelope_samples": np.full((4, 3), np.nan)}, r"`envelope_samples` holds NaN"),
    ({"envelope_samples": np.zeros((4, 3)), "envelope_radius": -1.0},
     r"`envelope_radius` is -1\.0; expected a finite number > 0\."),
    ({"envelope_radius": 0.5}, r"`envelope_radius` was given without `envelope_samples`"),
])
def test_refuses_bad_envelope_samples(tmp_path, overrides, message):
    with pytest.raises(BundleError, match=message):
        export_bundle({4: mlp("tanh")}, tmp_path / "b", base_step=0.5, mean=MEAN, scale=SCALE,
                      exporter="legacy", **overrides)
    assert not (tmp_path / "b").exists()


# --- reduced bundles: encoder and decoder -----------------------------------------------------

FIELD = 24
FIELD_MEAN = np.linspace(280.0, 320.0, FIELD)
FIELD_SCALE = np.full(FIELD, 4.0)


def reduced_modules(latent: int = 3) -> tuple[nn.Module, nn.Module, dict[int, nn.Module]]:
    torch.manual_seed(4)
    encoder, decoder = nn.Linear(FIELD, latent), nn.Linear(latent, FIELD)
    levels = {1: nn.Sequential(nn.Linear(latent, 16), nn.Tanh(), nn.Linear(16, latent)),
              4: nn.Linear(latent, latent)}
    return encoder, decoder, levels


@pytest.mark.parametrize("exporter", ["dynamo", "legacy"])
def test_reduced_round_trip_with_linear_encoder_and_decoder(tmp_path, exporter):
    encoder, decoder, levels = reduced_modules()
    bundle = export_bundle(levels, tmp_path / "field.bundle", base_step=0.1, mean=FIELD_MEAN,
                           scale=FIELD_SCALE, encoder=encoder, decoder=decoder,
                           exporter=exporter, verify_samples=128)
    document = json.loads((bundle / "manifest.json").read_text())
    assert document["reduction"]["latent_dim"] == 3
    assert document["state"]["dim"] == FIELD and document["envelope"] is None
    report = json.loads((bundle / "report.json").read_text())
    assert 0 <= report["verification"]["reduction"]["max_difference_over_tolerance"] <= 1
    stepper = load(bundle)
    # A torch Linear exports as one Gemm (or MatMul + Add): the compiled path.
    assert stepper.reduction_paths == {"encoder": "affine-chain", "decoder": "affine-chain"}
    states = np.random.default_rng(2).uniform(FIELD_MEAN - 8, FIELD_MEAN + 8, (50, FIELD))
    # Reference: torch itself, z → encoder → levels (increment) → decoder, in float64.
    z = torch.from_numpy((states - FIELD_MEAN) / FIELD_SCALE)
    with torch.no_grad():
        latent = encoder.double()(z)
        for stride in (4, 1):  # t = 0.5 is strides 4 + 1 (either order: same count)
            latent = latent + levels[stride].double()(latent)
        expected = decoder.double()(latent).numpy() * FIELD_SCALE + FIELD_MEAN
    result = stepper.advance(states.astype(np.float32), 0.5)
    # float32 evaluation of a few layers against float64: a common-practice bound.
    np.testing.assert_allclose(result, expected, rtol=0, atol=1e-4 * np.abs(expected).max())
    # The exported encoder, run by onnxruntime, gives the runtime's latent state.
    session = onnxruntime.InferenceSession((bundle / "reduction/encoder.onnx").read_bytes(),
                                           providers=["CPUExecutionProvider"])
    by_onnxruntime = session.run(None, {"state": z.float().numpy()})[0]
    with torch.no_grad():
        np.testing.assert_allclose(by_onnxruntime, encoder.float()(z.float()).numpy(),
                                   rtol=1e-5, atol=1e-5)


def test_reduced_export_refuses_half_pairs_and_wrong_widths(tmp_path):
    encoder, decoder, levels = reduced_modules()
    options = {"base_step": 0.1, "mean": FIELD_MEAN, "scale": FIELD_SCALE}
    with pytest.raises(BundleError, match="`encoder` was given without `decoder`"):
        export_bundle(levels, tmp_path / "a", encoder=encoder, **options)
    with pytest.raises(BundleError, match="the decoder"):
        export_bundle(levels, tmp_path / "b", encoder=encoder,
                      decoder=nn.Linear(3, FIELD + 1), **options)
    with pytest.raises(BundleError, match="level stride 4"):
        export_bundle({**levels, 4: nn.Linear(FIELD, FIELD)}, tmp_path / "c", encoder=encoder,
                      decoder=decoder, **options)
    assert not any(tmp_path.iterdir())
