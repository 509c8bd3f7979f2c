"""Reduced bundles (manifest block `reduction`): encoder, latent levels, decoder.

The field system is 1-D heat conduction on a rod, u_t = κ u_xx with fixed end temperatures,
discretised by second-order central differences on n interior points: x' = A (x − x_eq) with
A = κ/h² tridiag(1, −2, 1) and x_eq the linear steady profile (common practice). With the
manifest mean at x_eq, z = (x − mean)/scale follows z' = S⁻¹ A S z exactly. A POD basis V
(numpy's SVD of z snapshots) gives the latent system A_r = Vᵀ S⁻¹ A S V; the reference is
its exact flow, scipy.linalg.expm(A_r t), decoded: x(t) = (V expm(A_r t) Vᵀ z0)·scale + mean.
"""

from __future__ import annotations

import dataclasses
import json
import pickle

import numpy as np
import pytest
from scipy.linalg import expm

from stridecast.runtime import (
    DECODER_FILE,
    ENCODER_FILE,
    BundleError,
    ExtrapolationError,
    ExtrapolationWarning,
    Manifest,
    ModelFormatError,
    load,
    parse_manifest,
    write_bundle,
)
from stridecast.runtime.describe import describe_bundle
from stridecast.runtime.manifest import LevelEntry, ModelFile, Reduction
from tests.builders import edit_manifest, linear_bundle, reduced_bundle

N, KAPPA, BASE_STEP, STRIDES, LATENT = 64, 1e-3, 0.1, (1, 4, 16, 64), 8
H = 1.0 / (N + 1)
GRID = np.arange(1, N + 1) * H
STEADY = 300.0 + 50.0 * GRID  # end temperatures 300 K and 350 K: the steady profile is linear
SCALE = 5.0 + 2.0 * np.sin(3.0 * GRID)


def heat_matrix() -> np.ndarray:
    return KAPPA / H**2 * (np.diag(-2.0 * np.ones(N)) + np.diag(np.ones(N - 1), 1)
                           + np.diag(np.ones(N - 1), -1))


def pod_system() -> tuple[np.ndarray, np.ndarray]:
    """(A_r, V): the POD basis of z snapshots from random starts and the latent system."""
    rng = np.random.default_rng(7)
    normalised = heat_matrix() * SCALE[None, :] / SCALE[:, None]  # S⁻¹ A S
    # Smooth starts (the first 12 sine modes, amplitudes falling as 1/k): the basis then holds
    # slow modes, so deviations from the steady profile last over the forecast times.
    waves = np.arange(1, 13)
    starts = np.sin(np.pi * np.outer(GRID, waves)) @ (rng.normal(size=(12, 12))
                                                      / waves[:, None])
    snapshots = np.hstack([expm(normalised * t) @ starts for t in (0.0, 1.0, 5.0, 20.0)])
    basis = np.linalg.svd(snapshots, full_matrices=False)[0][:, :LATENT]
    return basis.T @ normalised @ basis, basis


@pytest.fixture(scope="module")
def system():
    return pod_system()


@pytest.fixture(scope="module")
def bundle(tmp_path_factory, system):
    latent, basis = system
    return reduced_bundle(tmp_path_factory.mktemp("reduced") / "heat.bundle", latent, basis,
                          base_step=BASE_STEP, strides=STRIDES, mean=STEADY, scale=SCALE)


def reference(states: np.ndarray, times, system) -> np.ndarray:
    """The exact latent flow (scipy.linalg.expm) decoded: shape (T, B, d)."""
    latent, basis = system
    y0 = ((states - STEADY) / SCALE) @ basis  # (B, r)
    return np.stack([((y0 @ expm(latent * t).T) @ basis.T) * SCALE + STEADY for t in times])


def initial_states(count: int) -> np.ndarray:
    rng = np.random.default_rng(11)
    bumps = np.sin(np.pi * np.outer(rng.integers(1, 6, count), GRID))
    return STEADY + 20.0 * rng.normal(size=(count, 1)) * bumps + rng.normal(size=(count, N))


def relative(mine: np.ndarray, exact: np.ndarray) -> float:
    """Largest error over the largest deviation from the steady profile (not over the
    temperatures themselves, which the mean of ~300 K would dominate)."""
    return float(np.max(np.abs(mine - exact)) / np.max(np.abs(exact - STEADY)))


@pytest.mark.parametrize("update", ["replace", "increment"])
def test_grid_forecast_matches_the_exact_latent_flow(tmp_path, system, update):
    latent, basis = system
    path = reduced_bundle(tmp_path / "b", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                          mean=STEADY, scale=SCALE, update=update)
    stepper = load(path, dtype="float64")
    assert stepper.state_dim == N and stepper.latent_dim == LATENT
    # A linear basis is one MatMul: the compiled path, normalisation folded in.
    assert stepper.reduction_paths == {"encoder": "affine-chain", "decoder": "affine-chain"}
    states = initial_states(5)
    times = [0.0, 0.1, 0.7, 6.4, 12.9, 100.0]
    result = stepper.forecast(states, times)
    assert result.shape == (len(times), 5, N)
    # Reference: scipy.linalg.expm of the latent system, decoded.
    assert relative(result, reference(states, times, system)) <= 1e-9
    single = stepper.advance(states[2], 12.9)
    assert single.shape == (N,)
    assert relative(single, reference(states[2:3], [12.9], system)[0, 0]) <= 1e-9


def test_interpreter_and_gemm_forms_agree_with_the_reference(tmp_path, system):
    latent, basis = system
    path = reduced_bundle(tmp_path / "b", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                          mean=STEADY, scale=SCALE, use_gemm=True)
    states = initial_states(3)
    exact = reference(states, [3.7], system)[0]
    for fast in (True, False):
        stepper = load(path, dtype="float64", fast_path=fast)
        expected_path = "affine-chain" if fast else "interpreter"
        assert set(stepper.reduction_paths.values()) == {expected_path}
        assert relative(stepper.advance(states, 3.7), exact) <= 1e-9


def test_states_in_the_span_of_exact_modes_follow_the_full_field(tmp_path):
    # The discrete Laplacian's eigenvectors are sin(jkπ/(n+1)), eigenvalues
    # −4κ/h² sin²(kπ/(2(n+1))) (standard result for the second-difference matrix). With a
    # uniform scale and this basis, the latent system is exact: a state in the span must
    # follow the full field's exact flow, scipy.linalg.expm(A t) on all 64 points.
    index = np.arange(1, N + 1)
    modes = np.arange(1, LATENT + 1)
    basis = np.sqrt(2.0 / (N + 1)) * np.sin(np.outer(index, modes) * np.pi / (N + 1))
    rates = -4.0 * KAPPA / H**2 * np.sin(modes * np.pi / (2 * (N + 1))) ** 2
    path = reduced_bundle(tmp_path / "b", np.diag(rates), basis, base_step=BASE_STEP,
                          strides=STRIDES, mean=STEADY, scale=np.full(N, 4.0))
    stepper = load(path, dtype="float64")
    x0 = STEADY + 4.0 * basis @ np.array([10.0, -3.0, 2.0, 0.5, 1.0, -1.0, 0.2, 0.1])
    for t in (1.6, 25.6, 80.0):
        full = expm(heat_matrix() * t) @ (x0 - STEADY) + STEADY
        assert relative(stepper.advance(x0, t), full) <= 1e-9


def test_interpolation_and_steps_run_in_the_latent_space(bundle, system):
    stepper = load(bundle, dtype="float64")
    states = initial_states(2)
    # One stride through the level, encoded and decoded around it.
    assert relative(stepper.step(states, 4), reference(states, [0.4], system)[0]) <= 1e-9
    # Off the grid: Lagrange interpolation (the textbook formula, weights
    # Π_{j≠k} (t − t_j)/(t_k − t_j)) through the exact states at the plan's anchors; the
    # decoder is affine, so interpolating latent states and then decoding gives the same.
    for t in (0.05, 3.33):
        nodes = np.asarray(stepper.plan(t).anchors) * BASE_STEP
        assert len(nodes) > 1
        weights = [np.prod([(t - other) / (node - other) for other in nodes if other != node])
                   for node in nodes]
        expected = np.tensordot(weights, reference(states, nodes, system), axes=1)
        assert relative(stepper.forecast(states, [t])[0], expected) <= 1e-9


def test_envelope_samples_are_checked_on_latent_states(tmp_path, system):
    latent, basis = system
    states = initial_states(1)
    start = ((states - STEADY) / SCALE) @ basis
    # One latent sample at the encoded start: the start is near the data, later latent
    # states (the decay moves them away by more than the radius) are not.
    path = reduced_bundle(tmp_path / "b", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                          mean=STEADY, scale=SCALE, samples=start, radius=1e-3,
                          envelope=(start[0] - 1e3, start[0] + 1e3))  # a box that never binds
    stepper = load(path, dtype="float64")
    assert not stepper.outside_envelope(states[0])
    with pytest.warns(ExtrapolationWarning, match=r"far from the training data.*latent\["):
        stepper.advance(states[0], 20.0)
    assert stepper.check(states) == ()


def test_subsets_pickles_and_descriptions_keep_the_reduction(bundle, system, tmp_path):
    stepper = load(bundle, dtype="float64")
    states = initial_states(2)
    subset = stepper.with_levels([1, 16])
    assert subset.latent_dim == LATENT
    assert relative(subset.advance(states, 1.7), reference(states, [1.7], system)[0]) <= 1e-9
    again = pickle.loads(pickle.dumps(stepper))
    np.testing.assert_array_equal(again.advance(states, 6.5), stepper.advance(states, 6.5))
    assert describe_bundle(bundle)["manifest"]["reduction"]["latent_dim"] == LATENT


def test_reduced_manifest_round_trips(bundle):
    document = json.loads((bundle / "manifest.json").read_text())
    block = document["reduction"]
    assert block["latent_dim"] == LATENT
    assert block["encoder"]["file"] == ENCODER_FILE and block["decoder"]["file"] == DECODER_FILE
    assert parse_manifest(document).to_dict() == document


def test_bad_encoder_checksum_is_refused(tmp_path, system):
    latent, basis = system
    path = reduced_bundle(tmp_path / "b", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                          mean=STEADY, scale=SCALE)
    data = bytearray((path / ENCODER_FILE).read_bytes())
    data[-1] ^= 1
    (path / ENCODER_FILE).write_bytes(bytes(data))
    with pytest.raises(BundleError, match=r"checksum of .*encoder"):
        load(path)
    # `describe_bundle` (stridecast inspect) reports it instead of stopping.
    description = describe_bundle(path)
    assert not description["checksums_ok"]
    [files] = [item for item in description["files"] if item["what"] == "encoder and decoder"]
    assert files["checksum"] == "mismatch" and "encoder" in files["error"]


@pytest.mark.parametrize("file", ["../decoder.onnx", "/etc/passwd", "reduction\\d.onnx"])
def test_decoder_path_escape_is_refused(tmp_path, system, file):
    latent, basis = system
    path = reduced_bundle(tmp_path / "b", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                          mean=STEADY, scale=SCALE)
    edit_manifest(path, lambda d: d["reduction"]["decoder"].__setitem__("file", file))
    with pytest.raises(BundleError, match=r"reduction\.decoder\.file"):
        load(path)


def test_latent_dim_that_disagrees_with_the_networks_is_refused(tmp_path, system):
    latent, basis = system
    path = reduced_bundle(tmp_path / "b", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                          mean=STEADY, scale=SCALE)
    edit_manifest(path, lambda d: d["reduction"].__setitem__("latent_dim", LATENT + 1))
    with pytest.raises(ModelFormatError, match="encoder"):
        load(path)


def test_encoder_that_disagrees_with_the_levels_is_refused(tmp_path, system):
    latent, basis = system
    wide = np.vstack([basis.T, basis.T[:1]])  # (r + 1, d)
    path = reduced_bundle(tmp_path / "b", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                          mean=STEADY, scale=SCALE, encoder_matrix=wide)
    with pytest.raises(ModelFormatError, match="encoder"):
        load(path)


def _manifest(**reduction) -> dict:
    document = {
        "format": "stridecast.bundle", "format_version": 1,
        "state": {"dim": 3, "names": ["a", "b", "c"]},
        "time": {"base_step": 0.1}, "normalization": {"mean": [0, 0, 0], "scale": [1, 1, 1]},
        "update": "increment",
        "levels": [{"stride": 1, "file": "levels/stride-00001.onnx", "sha256": "a" * 64}],
        "reduction": {"latent_dim": 2,
                      "encoder": {"file": ENCODER_FILE, "sha256": "b" * 64},
                      "decoder": {"file": DECODER_FILE, "sha256": "c" * 64}},
    }
    document["reduction"].update(reduction)
    return document


@pytest.mark.parametrize(("change", "message"), [
    ({"latent_dim": 0}, "reduction.latent_dim"),
    ({"latent_dim": True}, "reduction.latent_dim"),
    ({"basis": "pod"}, "unknown fields"),
    ({"encoder": {"file": ENCODER_FILE}}, "reduction.encoder"),
    ({"decoder": {"file": ENCODER_FILE, "sha256": "c" * 64}}, "two files"),
    ({"decoder": {"file": "levels/stride-00001.onnx", "sha256": "c" * 64}}, "file of a level"),
    ({"encoder": {"file": ENCODER_FILE, "sha256": "B" * 64}}, "hexadecimal"),
    ({"reconstruction": {"metric": "rms", "threshold": 0.1}}, "reconstruction.metric"),
    ({"reconstruction": {"metric": "normalised_rms", "threshold": 0}},
     r"reconstruction.threshold` must be > 0"),
    ({"reconstruction": {"metric": "normalised_rms", "threshold": "0.1"}},
     "reconstruction.threshold"),
    ({"reconstruction": {"metric": "normalised_rms"}}, "reduction.reconstruction"),
    ({"reconstruction": {"metric": "normalised_rms", "threshold": 0.1, "p": 95}},
     "unknown fields"),
])
def test_bad_reduction_blocks_are_refused(change, message):
    with pytest.raises(BundleError, match=message):
        parse_manifest(_manifest(**change))


def test_envelope_of_a_reduced_bundle_has_the_latent_length():
    document = _manifest()
    document["envelope"] = {"min": [0, 0, 0], "max": [1, 1, 1]}
    with pytest.raises(BundleError, match="list of 2 finite numbers"):
        parse_manifest(document)
    document["envelope"] = {"min": [0, 0], "max": [1, 1]}
    assert parse_manifest(document).envelope_min == (0.0, 0.0)


def test_write_bundle_needs_the_reduction_files(tmp_path):
    manifest = Manifest(
        state_names=("a", "b"), state_units=("", ""), base_step=0.1, mean=(0.0, 0.0),
        scale=(1.0, 1.0), levels=(LevelEntry(stride=1, file="", sha256="0" * 64),),
        reduction=Reduction(1, ModelFile(ENCODER_FILE, "0" * 64), ModelFile(DECODER_FILE,
                                                                            "0" * 64)))
    with pytest.raises(BundleError, match="extra_files"):
        write_bundle(tmp_path / "b", manifest, {1: b"x"},
                     extra_files={ENCODER_FILE: b"e"})
    assert not (tmp_path / "b").exists()


def test_bundle_without_reduction_is_unchanged(tmp_path):
    path = linear_bundle(tmp_path / "plain", np.array([[0.0, 1.0], [-1.0, 0.0]]),
                         base_step=0.1, strides=(1, 2))
    stepper = load(path, dtype="float64")
    assert stepper.latent_dim is None and stepper.reduction_paths == {}
    assert "reduction" not in json.loads((path / "manifest.json").read_text())


# ------------------------------------------------------------- full-space checks and speed
def _off_subspace(basis: np.ndarray, size: float) -> np.ndarray:
    """A normalised direction orthogonal to the basis, of normalised RMS `size`."""
    rng = np.random.default_rng(5)
    direction = rng.normal(size=N)
    direction -= basis @ (basis.T @ direction)
    return direction * size * np.sqrt(N) / np.linalg.norm(direction)


def test_envelope_box_is_checked_on_latent_states(tmp_path, system):
    latent, basis = system
    states = initial_states(1)
    start = ((states - STEADY) / SCALE) @ basis
    lower, upper = start[0] - 1e-3, start[0] + 1e-3  # only the start is inside
    path = reduced_bundle(tmp_path / "b", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                          mean=STEADY, scale=SCALE, envelope=(lower, upper))
    stepper = load(path, dtype="float64")
    assert not stepper.outside_envelope(states[0])
    with pytest.warns(ExtrapolationWarning, match=r"latent\["):
        stepper.advance(states[0], 20.0)
    assert stepper.check(states) == ()
    hot = states[0] + SCALE * (basis @ np.full(LATENT, 1.0))  # latent start moved by 1
    [finding] = stepper.check(hot)
    assert finding.kind == "outside_box" and finding.components[0].startswith("latent[")


def test_reconstruction_error_is_checked_on_the_given_states(tmp_path, system):
    latent, basis = system
    path = reduced_bundle(tmp_path / "b", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                          mean=STEADY, scale=SCALE, reconstruction=0.05)
    stepper = load(path, dtype="float64")
    assert stepper.manifest.reduction.reconstruction_threshold == 0.05
    inside = STEADY + SCALE * (basis @ np.linspace(-3.0, 3.0, LATENT))  # in the span: error 0
    off = inside + SCALE * _off_subspace(basis, 0.2)
    assert stepper.check(inside) == ()
    [finding] = stepper.check(np.stack([inside, off]))
    # Reference: for an orthonormal basis V, x̂ is the orthogonal projection, so the
    # normalised RMS error of `off` is |z⊥| / √d = 0.2 by construction (Pythagoras).
    assert finding.kind == "off_subspace" and finding.states == (1,)
    assert finding.amount == pytest.approx(0.2 / 0.05, rel=1e-9)
    assert "reconstruction error 0.2 vs 0.05 from the training data" in finding.message
    with pytest.warns(ExtrapolationWarning, match="not well represented by the bundle's reduced"):
        stepper.advance(off, 1.0)
    strict = load(path, dtype="float64", on_extrapolation="error")
    with pytest.raises(ExtrapolationError, match="reduced basis"):
        strict.forecast(off, [1.0, 2.0])
    strict.forecast(inside, [1.0, 2.0])  # no finding, no error
    # Without the threshold (older bundles), no check.
    plain = reduced_bundle(tmp_path / "p", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                           mean=STEADY, scale=SCALE)
    assert load(plain, dtype="float64").check(off) == ()


def _heat_field(states: np.ndarray) -> np.ndarray:
    """The full semi-discrete heat equation, x' = A (x − x_eq), for (B, d) states."""
    return (states - STEADY) @ heat_matrix().T


def _solve_full(start: np.ndarray, duration: float) -> np.ndarray:
    """SciPy's DOP853 over the full field (the reference for the integrator's remainder)."""
    from scipy.integrate import solve_ivp

    if duration == 0:
        return start
    rows = [solve_ivp(lambda _, x: _heat_field(x[None])[0], (0.0, duration), row,
                      method="DOP853", rtol=1e-12, atol=1e-12).y[:, -1] for row in start]
    return np.stack(rows)


def test_vector_field_finishes_reduced_forecasts_in_the_full_space(bundle, system):
    stepper = load(bundle, dtype="float64")
    states = initial_states(2)
    for t in (0.05, 3.33, 6.4):
        result, plan = stepper.advance_with_plan(states, t, vector_field=_heat_field)
        anchor = plan.base_steps * BASE_STEP
        # Reference: the exact latent flow to the grid anchor (expm), decoded, then SciPy's
        # solve_ivp on the full field for the rest.
        expected = _solve_full(reference(states, [anchor], system)[0], t - anchor)
        assert plan.method == ("grid" if t == 6.4 else "integrate")
        # The runtime integrates with rtol 1e-8 of ~350 K temperatures: a few µK, against
        # deviations of tens of K.
        assert relative(result, expected) <= 2e-6
    # Hybrid: only strides ≥ 16 are used; the integrator covers the rest in full space.
    times = [0.0, 1.6, 2.5, 5.0, 7.3]
    result, info = stepper.forecast_with_info(states, times, vector_field=_heat_field,
                                              hybrid_below=16)
    assert info.integrator_evaluations > 0
    for index, t in enumerate(times):
        anchor = np.floor(t / 1.6 + 1e-9) * 1.6
        expected = _solve_full(reference(states, [anchor], system)[0], t - anchor)
        assert relative(result[index], expected) <= 2e-6
        single = stepper.advance(states[0], t, vector_field=_heat_field, hybrid_below=16)
        assert relative(single, expected[0]) <= 2e-6


class _Counting:
    """Wraps an encoder or decoder: counts the calls and the rows they carry."""

    def __init__(self, function):
        self.function, self.calls, self.rows = function, 0, 0

    def __call__(self, states):
        self.calls += 1
        self.rows += states.shape[0]
        return self.function(states)


def _counted(stepper):
    maps = stepper._reduction
    counted = dataclasses.replace(maps, encoder=_Counting(maps.encoder),
                                  decoder=_Counting(maps.decoder))
    stepper._reduction = counted  # the test's instrument; steppers are otherwise immutable
    return counted.encoder, counted.decoder


@pytest.mark.parametrize("reconstruction", [None, 0.05])
def test_encode_once_decode_each_distinct_time_once(tmp_path, system, reconstruction):
    latent, basis = system
    path = reduced_bundle(tmp_path / "b", latent, basis, base_step=BASE_STEP, strides=STRIDES,
                          mean=STEADY, scale=SCALE, reconstruction=reconstruction)
    stepper = load(path, dtype="float64", on_extrapolation="ignore")
    assert stepper.reduction_paths == {"encoder": "affine-chain", "decoder": "affine-chain"}
    encoder, decoder = _counted(stepper)
    states = initial_states(3)
    checks = 0 if reconstruction is None else 1  # the off-subspace check decodes the inputs
    times = [6.4, 0.05, 6.4, 3.33, 12.8, 0.05]  # 4 distinct, two off the grid
    result = stepper.forecast(states, times)
    assert (encoder.calls, encoder.rows) == (1, 3)
    assert (decoder.calls, decoder.rows) == (1 + checks, 4 * 3 + 3 * checks)
    # Against a direct composition: decoder(expm(A_r t) encoder(x)) (scipy.linalg.expm).
    exact = reference(states, [6.4, 12.8], system)
    assert relative(result[[0, 4]], exact) <= 1e-9
    np.testing.assert_array_equal(result[0], result[2])
    stepper.advance(states, 3.33)
    assert (encoder.calls, decoder.calls) == (2, 2 + 2 * checks)
    stepper.advance(states, 3.33, vector_field=_heat_field)
    assert (encoder.calls, decoder.calls) == (3, 3 + 3 * checks)
