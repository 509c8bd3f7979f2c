"""`load` (runtime/loader.py): bundle → Stepper, checked against the exact flow map."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import expm

from stridecast.runtime import BundleError, ModelFormatError, load
from tests.builders import linear_bundle, oscillator_matrix

SYSTEM = oscillator_matrix(omega=2.0, damping=0.1)


@pytest.mark.parametrize("fast_path", [True, False])
@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_loaded_levels_compute_the_exact_flow_map(tmp_path, dtype, fast_path):
    bundle = linear_bundle(tmp_path / "b", SYSTEM, base_step=0.05, strides=(1, 8),
                           mean=(0.5, -0.25), scale=(2.0, 3.0), update="increment")
    stepper = load(bundle, dtype=dtype, fast_path=fast_path)
    state = np.array([1.0, -0.5])
    result = stepper.advance(state, 0.05 * 9)
    # Reference: x(t) = expm(A t) x(0), the standard solution of linear ODEs (SciPy's expm).
    expected = expm(SYSTEM * 0.05 * 9) @ state
    assert result.dtype == np.dtype(dtype)
    tolerance = 1e-5 if dtype == "float32" else 1e-12
    np.testing.assert_allclose(result, expected, rtol=tolerance, atol=tolerance)


def test_unknown_dtype_is_refused_with_the_choices(tmp_path):
    bundle = linear_bundle(tmp_path / "b", SYSTEM, base_step=0.05, strides=(1,))
    with pytest.raises(BundleError, match=r"`dtype` is 'float16'; expected one of"):
        load(bundle, dtype="float16")


def test_a_level_with_the_wrong_output_width_is_refused_naming_the_level(tmp_path):
    bundle = linear_bundle(tmp_path / "b", SYSTEM, base_step=0.05, strides=(1,),
                           name="wide")
    wide = linear_bundle(tmp_path / "w", np.zeros((3, 3)), base_step=0.05, strides=(1,))
    level = bundle / "levels" / "stride-00001.onnx"
    level.write_bytes((wide / "levels" / "stride-00001.onnx").read_bytes())
    with pytest.raises(ModelFormatError, match=r"level stride 1 \(levels/stride-00001\.onnx\)"):
        load(bundle, verify=False)
