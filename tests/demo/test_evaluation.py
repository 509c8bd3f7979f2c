"""The demo's evaluation (stridecast/demo/evaluation.py) against SciPy ground truth.

References: `scipy.integrate.solve_ivp` with LSODA (ODEPACK's Adams/BDF, a method unlike the
module's DOP853) on the crane's equations; the energy of an elastic pendulum,
E = ½ m |v|² + ½ k (|r| − L0)² + m g z (textbook mechanics), conserved without damping;
`numpy.linalg.norm` for distances.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from stridecast.demo import crane
from stridecast.demo.evaluation import (
    TOLERANCE_FLOOR,
    evaluate,
    ground_truth,
    held_out_states,
    position_errors,
    round_up,
)
from stridecast.demo.settings import (
    BASE_STEP,
    CURVE_SPACING,
    EXAMPLE_MODES,
    HORIZON,
    QUICK,
    SHIPPED_BUNDLE,
    TABLE_HORIZONS,
    TOLERANCE_FACTOR,
)
from stridecast.runtime import load


def _energy(states: np.ndarray) -> np.ndarray:
    p = crane.DEFAULT_PARAMETERS
    x, z, vx, vz = np.moveaxis(states, -1, 0)
    stretch = np.hypot(x, z) - p.rest_length
    return 0.5 * p.mass * (vx**2 + vz**2) + 0.5 * p.stiffness * stretch**2 + p.mass * p.gravity * z


def test_held_out_states_start_with_the_example_state():
    states = held_out_states(5)
    assert states.shape == (5, 4)
    np.testing.assert_array_equal(states[0], crane.state_from_modes(**EXAMPLE_MODES))
    np.testing.assert_array_equal(states, held_out_states(5))  # a fixed seed


def test_ground_truth_agrees_with_an_independent_scipy_solver():
    states = held_out_states(3)
    times = np.array([0.0, 0.6, 2.2, 7.4])
    truth = ground_truth(states, times)
    assert truth.shape == (len(times), 3, 4)
    np.testing.assert_array_equal(truth[0], states)
    for row, state in enumerate(states):
        # Reference: SciPy LSODA at tight tolerances on the same equations.
        reference = solve_ivp(lambda _t, y: crane.vector_field(y), (0.0, times[-1]), state,
                              method="LSODA", t_eval=times, rtol=1e-11, atol=1e-11)
        np.testing.assert_allclose(truth[:, row], reference.y.T, rtol=0, atol=1e-6)
    # The undamped crane conserves energy (relative drift at the 1e-10 tolerances).
    energy = _energy(truth)
    np.testing.assert_allclose(energy, np.broadcast_to(energy[0], energy.shape), rtol=1e-8)


def test_position_errors_are_euclidean_distances_of_the_positions():
    rng = np.random.default_rng(0)
    prediction, truth = rng.normal(size=(2, 7, 3, 4))
    expected = np.linalg.norm(prediction[..., :2] - truth[..., :2], axis=-1)  # numpy reference
    np.testing.assert_allclose(position_errors(prediction, truth), expected, rtol=1e-15)


@pytest.mark.parametrize(("value", "expected"), [(0.01234, 0.013), (1.5, 1.5), (987.0, 990.0),
                                                 (0.0, 0.0), (-2.0, 0.0), (0.0101, 0.011)])
def test_round_up_keeps_two_significant_digits(value, expected):
    assert round_up(value) == pytest.approx(expected)


@pytest.mark.parametrize("value", [0.14, 0.28, 0.56, 1.1e-6, 2e-5, 990.0])
def test_round_up_leaves_a_two_digit_value_alone(value):
    # Rounding up to two significant digits is the identity on two-digit numbers (definition).
    assert round_up(value) == pytest.approx(value, rel=1e-12)


def test_evaluate_measures_the_shipped_bundle_against_scipy():
    stepper = load(SHIPPED_BUNDLE, on_extrapolation="ignore")
    settings = dataclasses.replace(QUICK, held_out_states=2)
    result = evaluate(stepper, settings)
    steps = round(HORIZON / BASE_STEP)
    assert result.states.shape == (2, 4) and result.grid.shape == (steps + 1,)
    assert result.truth.shape == result.finest.shape == (steps + 1, 2, 4)
    np.testing.assert_allclose(result.grid, np.arange(steps + 1) * BASE_STEP, rtol=1e-15)
    # The truth at each table horizon, recomputed by SciPy LSODA for this test.
    for row, horizon in zip(result.table, TABLE_HORIZONS, strict=True):
        index = round(horizon / BASE_STEP)
        reference = np.stack([
            solve_ivp(lambda _t, y: crane.vector_field(y), (0.0, horizon), state,
                      method="LSODA", rtol=1e-11, atol=1e-11).y[:, -1]
            for state in result.states])
        np.testing.assert_allclose(result.truth[index], reference, atol=1e-5)
        forecast = stepper.advance(result.states, horizon)
        distances = np.linalg.norm(forecast[:, :2] - reference[:, :2], axis=1)
        assert row["position_rmse"] == pytest.approx(math.sqrt(np.mean(distances**2)),
                                                     rel=1e-6, abs=1e-8)
        assert row["finest_evaluations"] == index  # the finest stride is one base step
        assert row["evaluations"] == stepper.plan(horizon).evaluations
    assert result.curves["times"] == pytest.approx(
        list(np.arange(1, round(HORIZON / CURVE_SPACING) + 1) * CURVE_SPACING))
    for errors, tolerance in zip(result.check["max_position_error_m"],
                                 result.check["position_tolerance_m"], strict=True):
        # The stated rule: factor × error + floor, rounded up to two significant digits.
        bound = TOLERANCE_FACTOR * errors + TOLERANCE_FLOOR
        assert bound <= tolerance <= bound * 1.1 + 1e-12
    assert result.strides == stepper.strides
