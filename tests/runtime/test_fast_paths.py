"""The runtime's fast paths give the same answers as its general paths.

Expected values: onnxruntime for the tanh network, and the runtime's own general paths (the
batched kernel, per-time `advance`), themselves checked against SciPy's expm and onnxruntime in
test_stepper.py.
"""

from __future__ import annotations

import numpy as np
import onnxruntime
import pytest

from stridecast.runtime import NonFiniteError, load
from tests.builders import linear_bundle, tanh_bundle


def test_single_state_kernel_matches_onnxruntime_and_batch(tmp_path):
    path, files = tanh_bundle(tmp_path / "tanh.bundle")
    stepper = load(path)
    assert stepper.kernel_paths[1] == "affine-chain"
    states = np.random.default_rng(0).normal(0.5, 1.0, (3, 4)).astype(np.float32)
    batch = stepper.step(states, 1)
    session = onnxruntime.InferenceSession(files[1], providers=["CPUExecutionProvider"])
    for row, state in enumerate(states):
        single = stepper.step(state, 1)
        # Reference: onnxruntime on the ONNX file, with the manifest normalisation and the
        # increment update applied by hand: x' = x + scale * N((x - mean) / scale).
        z = ((state - 0.5) / 2.0)[None].astype(np.float32)
        expected = state + 2.0 * session.run(["next"], {"state": z})[0][0]
        np.testing.assert_allclose(single, expected, rtol=0, atol=1e-5)
        np.testing.assert_allclose(single, batch[row], rtol=0, atol=1e-6)


def test_grid_forecast_matches_advance_per_time(tmp_path):
    path, _ = tanh_bundle(tmp_path / "tanh.bundle")
    stepper = load(path)
    state = np.array([0.2, 0.9, -0.3, 0.5], dtype=np.float32)
    times = np.array([3.0, 0.1, 1.7, 3.0, 0.0, 2.5, 0.8])  # unsorted, repeated, zero
    forecast, info = stepper.forecast_with_info(state, times)
    assert info.methods == ("grid",)
    for t, answer in zip(times, forecast, strict=True):
        # Reference: `advance` to each time on its own.
        np.testing.assert_allclose(answer, stepper.advance(state, t), rtol=0, atol=1e-6)
    # One off-grid time sends every time through the per-time path; grid answers agree.
    mixed = stepper.forecast(state, np.append(times, 0.25))
    np.testing.assert_allclose(mixed[:-1], forecast, rtol=0, atol=1e-6)


def test_increment_overflow_found_after_the_plan_still_names_its_step(tmp_path):
    # x' = 100 x: each stride-8 step multiplies by e^80 ≈ 5.5e34 (exp of the diagonal
    # matrix), so from 1 the state overflows float32 (max ≈ 3.4e38) at step 2 exactly.
    system = np.array([[100.0, 0.0], [0.0, 100.0]])
    out = linear_bundle(tmp_path / "b.bundle", system, base_step=0.1, strides=(1, 8),
                        update="increment", dtype=np.float32)
    stepper = load(out)
    with pytest.raises(NonFiniteError, match=r"stride 8 produced non-finite values at step 2 "):
        stepper.advance(np.ones(2), 8.0)
