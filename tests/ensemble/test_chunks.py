"""`stridecast/ensemble/chunks.py`: one chunk of members forecast, with the runtime's flags.

Expected values: x(t) = expm(A t) x(0) (SciPy) for the states; the envelope box of the bundle
format (docs/bundle-format.md: a state is outside when any component is below `min` or above
`max`), applied by hand, for the flags.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.linalg import expm

from stridecast.ensemble.chunks import ChunkResult, forecast_chunk
from stridecast.runtime import ExtrapolationWarning, load
from tests.builders import linear_bundle, oscillator_matrix

LOWER, UPPER = np.array([-1.0, -2.0]), np.array([1.0, 2.0])
TIMES = np.array([0.0, 0.4, 1.0, 1.3])


@pytest.fixture(scope="module")
def stepper(tmp_path_factory):
    path = linear_bundle(tmp_path_factory.mktemp("chunks") / "osc.bundle", oscillator_matrix(),
                         base_step=0.1, strides=(1, 4), envelope=(LOWER, UPPER))
    return load(path, dtype="float64")


def outside(states: np.ndarray) -> np.ndarray:
    return ((states < LOWER) | (states > UPPER)).any(axis=-1).astype(np.int8)


def test_values_are_the_exact_flow_map_per_member_and_time(stepper):
    states = np.random.default_rng(0).uniform(-1.5, 1.5, size=(9, 2))
    result = forecast_chunk(stepper, states, TIMES, start=18)
    assert isinstance(result, ChunkResult)
    assert (result.start, result.stop) == (18, 27)
    assert result.values.shape == (9, len(TIMES), 2) and result.values.flags.c_contiguous
    exact = np.stack([states @ expm(oscillator_matrix() * t).T for t in TIMES], axis=1)
    np.testing.assert_allclose(result.values, exact, rtol=1e-10, atol=1e-12)


def test_flags_mark_the_states_outside_the_envelope_box(stepper):
    states = np.random.default_rng(1).uniform(-1.5, 1.5, size=(40, 2))
    with_warnings = forecast_chunk(stepper, states, TIMES, start=0)
    flags = with_warnings.flags
    assert set(flags) == {"outside_box", "far_from_data", "initial_outside_box",
                          "initial_far_from_data"}
    np.testing.assert_array_equal(flags["outside_box"], outside(with_warnings.values))
    np.testing.assert_array_equal(flags["initial_outside_box"], outside(states))
    assert flags["outside_box"].dtype == np.int8 and flags["outside_box"].shape == (40, 4)
    assert 0 < flags["outside_box"].sum() < flags["outside_box"].size  # both kinds present
    # No envelope samples in this bundle: nothing is ever far from data.
    assert not flags["far_from_data"].any()


def test_the_runtime_s_warnings_are_recorded_not_raised(stepper):
    far = np.array([[5.0, 5.0]])
    with pytest.warns(ExtrapolationWarning):  # what the runtime does on its own
        stepper.forecast(far, TIMES)
    with warnings.catch_warnings():
        warnings.simplefilter("error", ExtrapolationWarning)
        result = forecast_chunk(stepper, far, TIMES, start=0)
    assert result.flags["initial_outside_box"].tolist() == [1]
