"""Held-out forecasts and the normalised RMS metric, on levels that are exact linear flow maps."""

from __future__ import annotations

import numpy as np
import torch
from scipy.linalg import expm

from stridecast.export.evaluation import (
    advance,
    error_curve,
    forecasts,
    normalised_rms,
    prepare_held_out,
)
from tests.systems import DAMPED_BASE_STEP as BASE_STEP
from tests.systems import DAMPED_OSCILLATOR, exact_level, held_out_list


def test_advance_composes_coarse_first():
    levels = {1: exact_level(1), 4: exact_level(4)}
    states = torch.tensor([[1.0, 0.0], [0.3, -0.7]])
    result = advance(levels, states, ((4, 2), (1, 1))).double().numpy()
    # Expected: expm(A · 9 Δt) (scipy.linalg.expm), float32 rounding allowed.
    expected = states.double().numpy() @ expm(DAMPED_OSCILLATOR * 9 * BASE_STEP).T
    np.testing.assert_allclose(result, expected, atol=1e-6)


def test_forecasts_follow_the_flow_map_at_every_target():
    levels = {1: exact_level(1), 4: exact_level(4), 16: exact_level(16)}
    initial = np.array([[1.0, 0.0], [0.3, -0.7]], dtype=np.float32)
    targets = [0, 1, 5, 16, 37, 63]
    ((chunk, states),) = list(forecasts(levels, initial, targets))
    assert chunk == targets and states.shape == (6, 2, 2)
    for target, predicted in zip(targets, states, strict=True):
        # Expected: expm(A n Δt) applied to the start (scipy.linalg.expm).
        expected = initial.astype(np.float64) @ expm(DAMPED_OSCILLATOR * target * BASE_STEP).T
        np.testing.assert_allclose(predicted, expected, atol=1e-5)


def test_normalised_rms_by_hand():
    rng = np.random.default_rng(0)
    prediction, truth = rng.normal(size=(5, 3)), rng.normal(size=(5, 3))
    valid = np.array([True, False, True, True, False])
    # Expected: the contract's definition computed directly with numpy: squared errors over
    # the valid states and all components, mean, square root.
    expected = np.sqrt(np.mean((prediction[valid] - truth[valid]) ** 2))
    assert normalised_rms(prediction, truth, valid) == expected
    broken = prediction.copy()
    broken[2, 1] = np.inf
    assert normalised_rms(broken, truth, valid) == np.inf
    assert np.isnan(normalised_rms(prediction, truth, np.zeros(5, dtype=bool)))


def test_ragged_held_out_starts_and_truth():
    ragged = [held_out_list(1, 30)[0], held_out_list(1, 12, seed=5)[0]]
    data = prepare_held_out(ragged, max_starts=21)
    assert data.longest == 29 and list(data.lengths) == [30, 12]
    # Starts in proportion to length (29 : 11 usable samples), evenly spaced, first included.
    assert list(data.start[data.trajectory == 0]) == list(np.linspace(0, 28, 15).round())
    assert list(data.start[data.trajectory == 1]) == list(np.linspace(0, 10, 5).round())
    truth, valid = data.truth(8)
    expected_valid = data.start + 8 < np.where(data.trajectory == 0, 30, 12)
    np.testing.assert_array_equal(valid, expected_valid)
    rows = np.flatnonzero(valid)
    for row in rows:
        source = ragged[data.trajectory[row]].numpy()
        np.testing.assert_array_equal(truth[row], source[data.start[row] + 8])


def test_error_curve_by_hand_with_a_perturbed_level():
    # A stride-4 level 2 % too strong: z(n) = expm(A n Δt) with the plan's stride-4 steps
    # scaled by 1.02 each; the expected errors are computed here with numpy from the plans.
    levels = {1: exact_level(1), 4: exact_level(4, factor=1.02)}
    ragged = held_out_list()
    data = prepare_held_out(ragged)
    targets = [1, 4, 9, 30]
    errors = error_curve(levels, data, targets)
    for target, error in zip(targets, errors, strict=True):
        fours = target // 4  # the fewest-steps plan for strides {1, 4}
        flow = 1.02**fours * expm(DAMPED_OSCILLATOR * target * BASE_STEP)
        truth, valid = data.truth(target)
        prediction = data.initial.astype(np.float64) @ flow.T
        expected = np.sqrt(np.mean((prediction[valid] - truth[valid]) ** 2))
        # float32 forecasts: agreement to float32 rounding of O(1) states.
        assert abs(error - expected) < 1e-5 + 1e-4 * expected, (target, error, expected)
    assert errors[0] < 1e-6 and errors[-1] > 0.05
