"""The demo scenario's physics: the elastic-pendulum crane load and its SciPy ground truth."""

from __future__ import annotations

import math

import numpy as np
import pytest

from stridecast.demo import crane

DEMO_HORIZON = 60.0  # seconds: the longest horizon `stridecast demo` forecasts


def _crossing_period(times: np.ndarray, signal: np.ndarray) -> float:
    """Mean period between upward zero crossings, located by linear interpolation."""
    upward = np.flatnonzero((signal[:-1] < 0) & (signal[1:] >= 0))
    fraction = -signal[upward] / (signal[upward + 1] - signal[upward])
    crossings = times[upward] + fraction * (times[upward + 1] - times[upward])
    return float(np.mean(np.diff(crossings)))


def test_default_crane_has_two_time_scales_at_least_twenty_apart():
    # Linearised small-oscillation formulas of the elastic pendulum (standard mechanics):
    # bob ω = √(k/m); swing ω = √(g / L_eq) with L_eq = L0 + m g / k.
    parameters = crane.DEFAULT_PARAMETERS
    assert parameters.bob_period == pytest.approx(2 * math.pi * math.sqrt(2000.0 / 5.0e5))
    assert parameters.equilibrium_length == pytest.approx(24.15 + 2000.0 * 9.81 / 5.0e5)
    assert parameters.swing_period == pytest.approx(
        2 * math.pi * math.sqrt(parameters.equilibrium_length / 9.81))
    assert 0.3 <= parameters.bob_period <= 0.5
    assert 8.0 <= parameters.swing_period <= 12.0
    assert parameters.swing_period / parameters.bob_period >= 20


def test_vector_field_vanishes_at_the_static_equilibrium():
    # Static equilibrium: the cable tension k (L_eq − L0) balances the weight m g.
    derivatives = crane.vector_field(crane.equilibrium_state())
    np.testing.assert_allclose(derivatives, 0.0, atol=1e-12)


def test_vector_field_accepts_one_state_or_a_batch():
    states = crane.sample_initial_states(5, np.random.default_rng(1))
    batch = crane.vector_field(states)
    assert batch.shape == (5, 4)
    for row, derivative in zip(states, batch, strict=True):
        np.testing.assert_array_equal(crane.vector_field(row), derivative)


def test_vector_field_refuses_a_wrong_state_shape():
    with pytest.raises(ValueError, match=r"`states` has shape \(2, 3\); expected \(4,\)"):
        crane.vector_field(np.zeros((2, 3)))


def test_parameters_refuse_non_physical_values():
    with pytest.raises(ValueError, match=r"`stiffness` is -1.0; expected a finite number > 0\."):
        crane.CraneParameters(stiffness=-1.0)
    with pytest.raises(ValueError, match=r"`damping` is -0.5; expected a finite number ≥ 0\."):
        crane.CraneParameters(damping=-0.5)


def test_state_from_modes_places_the_load_on_the_cable():
    # Polar to Cartesian: x = r sin θ, z = −r cos θ, radial speed ṙ, tangential speed r θ̇.
    state = crane.state_from_modes(0.1, 0.05, 0.02, -0.3)
    x, z, vx, vz = state
    length = crane.DEFAULT_PARAMETERS.equilibrium_length + 0.02
    assert math.hypot(x, z) == pytest.approx(length)
    assert math.atan2(x, -z) == pytest.approx(0.1)
    assert (x * vx + z * vz) / length == pytest.approx(-0.3)
    assert (-z * vx + x * vz) / length == pytest.approx(length * 0.05)


def test_sampled_states_stay_inside_the_stated_range():
    rng = np.random.default_rng(2)
    initial_range = crane.InitialRange()
    states = crane.sample_initial_states(2000, rng, initial_range=initial_range)
    parameters = crane.DEFAULT_PARAMETERS
    angle = np.arctan2(states[:, 0], -states[:, 1])
    stretch = np.hypot(states[:, 0], states[:, 1]) - parameters.equilibrium_length
    assert np.abs(angle).max() <= initial_range.max_swing + 1e-12
    assert np.abs(stretch).max() <= initial_range.max_bob + 1e-12
    # The cable stays taut: the bob never undoes the static stretch.
    assert stretch.min() > -parameters.static_stretch


def test_ground_truth_conserves_energy_over_the_demo_horizon():
    # Standard mechanics: without damping E = ½m|v|² + ½k(r − L0)² + m g z is conserved.
    # The drift is measured against the oscillation energy E − E_eq, stricter than against E.
    states = crane.sample_initial_states(3, np.random.default_rng(3))
    times = np.linspace(0.0, DEMO_HORIZON, 601)
    trajectory = crane.simulate(states, times, rtol=1e-11, atol=1e-11)
    energy = crane.energy(trajectory)
    oscillation = energy[0] - crane.energy(crane.equilibrium_state())
    drift = np.abs(energy - energy[0]).max(axis=0) / np.abs(oscillation)
    assert drift.max() <= 1e-8


def test_damping_only_removes_energy():
    # Common practice: viscous damping dissipates, dE/dt = −c ṙ² ≤ 0.
    parameters = crane.CraneParameters(damping=2.0e3)
    state = crane.state_from_modes(0.15, 0.0, 0.02, 0.0, parameters)
    times = np.linspace(0.0, 20.0, 401)
    energy = crane.energy(crane.simulate(state, times, parameters=parameters), parameters)
    assert np.all(np.diff(energy) <= 1e-9 * np.abs(energy[0]))
    assert energy[-1] < energy[0]


def test_bob_period_matches_the_linearised_formula():
    # Pure vertical motion on a linear spring is harmonic: period 2π √(m/k) (standard mechanics).
    parameters = crane.DEFAULT_PARAMETERS
    state = crane.state_from_modes(0.0, 0.0, 0.01, 0.0)
    times = np.linspace(0.0, 10.0, 5001)
    trajectory = crane.simulate(state, times)
    measured = _crossing_period(times, trajectory[:, 1] + parameters.equilibrium_length)
    assert measured == pytest.approx(parameters.bob_period, rel=0.01)


def test_both_periods_at_demo_amplitudes_are_near_the_linearised_values():
    # Linearised periods (bob 2π √(m/k), swing 2π √(L_eq/g)); at the demo's largest amplitudes
    # the nonlinear corrections stay within a few percent (pendulum: about θ0²/16 ≈ 0.25 %).
    parameters = crane.DEFAULT_PARAMETERS
    state = crane.state_from_modes(0.2, 0.0, 0.03, 0.0)
    times = np.linspace(0.0, DEMO_HORIZON, 30001)
    trajectory = crane.simulate(state, times)
    x, z, vx, vz = trajectory.T
    # The swing shows in x; the bob in the stretch rate ṙ, where the slow swing barely shows.
    stretch_rate = (x * vx + z * vz) / np.hypot(x, z)
    assert _crossing_period(times, x) == pytest.approx(parameters.swing_period, rel=0.03)
    assert _crossing_period(times, stretch_rate) == pytest.approx(parameters.bob_period, rel=0.03)


def test_simulate_refuses_times_that_do_not_increase():
    with pytest.raises(ValueError, match=r"`times` must be a non-empty, strictly increasing"):
        crane.simulate(crane.equilibrium_state(), [0.0, 2.0, 1.0])
