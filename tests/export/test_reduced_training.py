"""`train_levels(reduce=...)` → `export_bundle` → `stridecast.runtime.load` on a linear field.

The field is 1-D heat conduction u_t = u_xx on (0, 1) with u = 0 at both ends, discretised by
second-order central differences on n interior points: x' = A x, A = tridiag(1, −2, 1) / h².
The exact flow map over a time t is scipy.linalg.expm(A t) (SciPy's matrix exponential, the
reference throughout). Initial states hold the first three sine modes, which the closed form
of the discrete Laplacian's eigenvectors (φ_k[j] ∝ sin(jkπ/(n + 1)); e.g. LeVeque, "Finite
Difference Methods for Ordinary and Partial Differential Equations", SIAM 2007, §2.10; cited
from memory) shows A keeps: every state stays in a 3-dimensional subspace.
"""

from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import onnxruntime
import pytest
import torch
from scipy.linalg import expm, subspace_angles

from stridecast.export import TrainingError, export_bundle, train_levels
from stridecast.runtime import BundleError, load
from stridecast.runtime.graph import build_program
from stridecast.runtime.onnx_reader import read_model
from stridecast.runtime.reduction import make_map

N = 64
H = 1.0 / (N + 1)
BASE_STEP = 2e-4
STRIDES = (1, 4)
SAMPLES = 160
# The sine modes' amplitudes in the initial states (standard deviations of the draw).
AMPLITUDES = np.array([1.0, 0.5, 0.25])


def laplacian() -> np.ndarray:
    return (np.diag(-2.0 * np.ones(N)) + np.diag(np.ones(N - 1), 1)
            + np.diag(np.ones(N - 1), -1)) / H**2


def sine_modes(count: int) -> np.ndarray:
    j, k = np.arange(1, N + 1), np.arange(1, count + 1)
    return np.sqrt(2.0 / (N + 1)) * np.sin(np.outer(j, k) * np.pi / (N + 1))


def initial_states(count: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    # An offset in mode 1 gives the data a non-zero mean field, which the normalisation takes.
    amplitudes = rng.normal(size=(count, 3)) * AMPLITUDES + np.array([0.5, 0.0, 0.0])
    return amplitudes @ sine_modes(3).T


def trajectories(count: int, seed: int) -> np.ndarray:
    step = expm(laplacian() * BASE_STEP)
    states = np.empty((count, SAMPLES, N))
    states[:, 0] = initial_states(count, seed)
    for index in range(1, SAMPLES):
        states[:, index] = states[:, index - 1] @ step.T
    return states


@pytest.fixture(scope="module")
def trained():
    # 48 trajectories, a quarter held out: at least 10 held-out trajectories, so the error
    # bound is a bootstrap over trajectories (export/validity.py), which fresh trajectories
    # are comparable with.
    return train_levels(trajectories(48, seed=0), base_step=BASE_STEP, strides=STRIDES,
                        reduce=3, hidden=(32,), epochs=12, learning_rate=3e-3,
                        validation_fraction=0.25, progress=False, tolerance=0.05)


@pytest.fixture(scope="module")
def bundle(trained, tmp_path_factory):
    # The legacy exporter: the same graphs for these modules, many times faster than dynamo;
    # tests/export/test_bundle_export.py covers both exporters.
    return export_bundle(trained, tmp_path_factory.mktemp("reduced") / "heat.bundle",
                         exporter="legacy")


def test_trained_reduced_levels_carry_the_basis(trained) -> None:
    assert trained.latent_dim == 3
    assert set(trained.levels) <= set(STRIDES)
    # SciPy's principal angles: the basis (mapped back from normalised coordinates, a
    # uniform scale here) spans the three sine modes.
    assert np.max(subspace_angles(trained.basis.modes, sine_modes(3))) < 1e-6
    assert trained.reduction["energy_kept"] == pytest.approx(1.0, abs=1e-9)
    assert len(set(trained.scale)) == 1  # one pooled scale for the whole field
    assert len(trained.envelope_min) == 3 and trained.envelope_samples.shape[1] == 3
    assert trained.reconstruction_threshold > 0
    assert trained.settings["reduce"] == 3


def test_bundle_forecasts_follow_the_exact_flow(trained, bundle) -> None:
    # A few fresh states (a draw with a large amplitude) lie beyond the training states and
    # the envelope says so; the promise is checked on every state, as on held-out data.
    stepper = load(bundle, dtype="float64", on_extrapolation="ignore")
    manifest = stepper.manifest
    assert stepper.latent_dim == 3 and stepper.reduction_paths == {
        "encoder": "affine-chain", "decoder": "affine-chain"}
    assert manifest.reduction.reconstruction_threshold == trained.reconstruction_threshold
    assert len(manifest.envelope_min) == 3 and manifest.envelope_samples is not None
    horizon = manifest.validated_horizon
    assert horizon is not None and horizon > 0
    # Fresh start states drawn as the held-out ones are (export/evaluation.py): fresh
    # trajectories, starts evenly spread over each, and at a horizon of n base steps only the
    # starts at least n steps before the trajectory's end (the held-out truth ends there).
    runs = trajectories(32, seed=99)
    starts = np.linspace(0, SAMPLES - 2, 20).round().astype(int)
    scale = np.asarray(manifest.scale)
    for time in np.linspace(STRIDES[0] * BASE_STEP, horizon, 4):
        steps = round(time / BASE_STEP)
        fresh = runs[:, starts[starts + steps <= SAMPLES - 1]].reshape(-1, N)
        exact = fresh @ expm(laplacian() * steps * BASE_STEP).T  # SciPy: the exact flow
        forecast = stepper.advance(fresh, steps * BASE_STEP)
        error = float(np.sqrt(np.mean(((forecast - exact) / scale) ** 2)))
        # The bundle's promise: the held-out normalised RMS with a 95 % upper bound, within the
        # tolerance up to the validated horizon. The fresh trajectories are a sample of their
        # own (32 against 12 held out), so a factor 1.5 leaves room for their spread.
        assert error <= 1.5 * max(stepper.expected_error(steps * BASE_STEP), 1e-3), time
        assert error <= 1.5 * manifest.validation.tolerance


def test_exact_latent_levels_reproduce_the_matrix_exponential(trained, tmp_path) -> None:
    """With levels replaced by the exact latent flow maps, the exported basis carries the
    forecast to SciPy's expm within float32 weight rounding."""
    basis, mean = trained.basis, np.asarray(trained.mean)
    scale = np.asarray(trained.scale)
    encode = basis.modes / basis.latent_scale  # z → y
    decode = basis.modes * basis.latent_scale  # y → z (as columns: z = decode @ y)
    levels = {}
    for stride in STRIDES:
        flow = expm(laplacian() * stride * BASE_STEP)
        # x' = P x with x = s z + mean: z' = P z + (P − I) mean / s; in latent coordinates
        # y' = Eᵀ P D y + Eᵀ (P − I) mean / s (exact: the data and the mean lie in the span).
        weight = encode.T @ flow @ decode - np.eye(3)
        bias = encode.T @ ((flow - np.eye(N)) @ mean) / scale[0]
        layer = torch.nn.Linear(3, 3)
        with torch.no_grad():
            layer.weight.copy_(torch.from_numpy(weight))
            layer.bias.copy_(torch.from_numpy(bias))
        levels[stride] = layer
    exact_model = replace(trained, levels=levels)
    out = export_bundle(exact_model, tmp_path / "exact.bundle", exporter="legacy")
    # The trained validation curve and envelope came along; this checks arithmetic only.
    stepper = load(out, dtype="float64", on_extrapolation="ignore")
    fresh = initial_states(16, seed=5)
    for steps in (1, 4, 7, 40, 160):
        expected = fresh @ expm(laplacian() * steps * BASE_STEP).T  # SciPy's expm
        got = stepper.advance(fresh, steps * BASE_STEP)
        # float32 weights (relative rounding 2^-24 ≈ 6e-8) in encoder, decoder and levels,
        # compounded over at most 40 steps of a contraction: 1e-5 relative to the field's
        # size is a generous bound.
        assert np.max(np.abs(got - expected)) <= 1e-5 * np.max(np.abs(fresh)), steps


def test_onnxruntime_agrees_with_the_runtime_on_encoder_and_decoder(bundle) -> None:
    manifest = json.loads((bundle / "manifest.json").read_text())
    mean = np.asarray(manifest["normalization"]["mean"])
    scale = np.asarray(manifest["normalization"]["scale"])
    latent_dim = manifest["reduction"]["latent_dim"]
    states = initial_states(32, seed=3)
    z = ((states - mean) / scale).astype(np.float32)
    for side in ("encoder", "decoder"):
        path = bundle / manifest["reduction"][side]["file"]
        model = read_model(path.read_bytes())
        names = model.graph.inputs[0].name, model.graph.outputs[0].name
        program = build_program(model, input_name=names[0], output_name=names[1],
                                dtype=np.dtype(np.float64))
        runtime_map = make_map(program, side=side, mean=mean, scale=scale,
                               latent_dim=latent_dim)
        assert runtime_map.path == "affine-chain"
        session = onnxruntime.InferenceSession(path.read_bytes(),
                                               providers=["CPUExecutionProvider"])
        if side == "encoder":
            reference = session.run(None, {session.get_inputs()[0].name: z})[0]
            got = runtime_map(states)
            latent = reference
        else:
            reference = session.run(None, {session.get_inputs()[0].name: latent})[0]
            reference = reference.astype(np.float64) * scale + mean  # x = z · scale + mean
            got = runtime_map(latent.astype(np.float64))
        # onnxruntime computes in float32 (unit roundoff 6e-8), the runtime here in float64
        # with the normalisation folded into the weights: agreement to 1e-5 of the values'
        # size allows float32 sums of N = 64 terms (common practice for such comparisons).
        np.testing.assert_allclose(got, reference, atol=1e-5 * np.max(np.abs(reference)))


def test_report_records_the_basis_and_the_threshold(trained, bundle) -> None:
    report = json.loads((bundle / "report.json").read_text())
    reduction = report["reduction"]
    assert reduction["latent_dim"] == 3
    assert reduction["energy_kept"] == pytest.approx(trained.reduction["energy_kept"])
    assert reduction["spectrum"]["modes_for_energy"]["0.99"] <= 3
    assert reduction["reconstruction"]["threshold"] == trained.reconstruction_threshold
    manifest = json.loads((bundle / "manifest.json").read_text())
    assert manifest["reduction"]["reconstruction"] == {
        "metric": "normalised_rms", "threshold": trained.reconstruction_threshold}


def test_reduce_errors_name_the_parameter() -> None:
    data = trajectories(4, seed=1)
    with pytest.raises(TrainingError, match=r"`reduce` is 64; expected a number of modes "
                                            r"1 ≤ r < 64"):
        train_levels(data, base_step=BASE_STEP, strides=STRIDES, reduce=64, progress=False)
    with pytest.raises(TrainingError, match=r"`reduce` asks for 5 modes but the training "
                                            r"states span only 3 dimensions"):
        train_levels(data, base_step=BASE_STEP, strides=STRIDES, reduce=5, epochs=1,
                     progress=False)


def test_encoder_with_reduced_trained_levels_is_refused(trained, tmp_path) -> None:
    with pytest.raises(BundleError, match=r"`encoder`/`decoder` cannot be given with "
                                          r"TrainedLevels trained with `reduce`"):
        export_bundle(trained, tmp_path / "b", encoder=torch.nn.Linear(N, 3),
                      decoder=torch.nn.Linear(3, N))
