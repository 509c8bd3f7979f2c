"""The field scenario's physics: the mooring line's vector field and its SciPy ground truth.

The reference values are published formulas for the linear limit (named beside each check);
the discretised line must reproduce them when simulated with SciPy.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from stridecast.demo import mooring

LINEAR = replace(mooring.DEFAULT_PARAMETERS, axial_stiffness=0.0, damping_rate=0.0)
SMALL = 1e-3  # m: amplitudes at which the line's geometric nonlinearity is ~1e-7 relative


def _tip_mass_roots(mass_ratio: float, count: int) -> np.ndarray:
    """Roots β of β tan β = μ L / M, the frequency equation of a taut string fixed at one end
    with a point mass M free to move transversely at the other: ω = β c / L.

    Source: the string with an end mass, e.g. Blevins, "Formulas for Natural Frequency and
    Mode Shape" (string tables) — from memory; it follows from the end condition
    M ü(L) = −T u_x(L) with u = sin(β x / L). The roots lie in ((n−1)π, (n−½)π).
    """
    from scipy.optimize import brentq

    def equation(beta: float) -> float:
        return beta * math.tan(beta) - mass_ratio

    return np.array([brentq(equation, (n - 1) * math.pi + 1e-12, (n - 0.5) * math.pi - 1e-9)
                     for n in range(1, count + 1)])


def _crossing_period(times: np.ndarray, signal: np.ndarray) -> float:
    """Mean period between upward zero crossings, located by linear interpolation."""
    upward = np.flatnonzero((signal[:-1] < 0) & (signal[1:] >= 0))
    fraction = -signal[upward] / (signal[upward + 1] - signal[upward])
    crossings = times[upward] + fraction * (times[upward + 1] - times[upward])
    return float(np.mean(np.diff(crossings)))


def _shape_state(beta: float, parameters: mooring.MooringParameters) -> np.ndarray:
    """The continuous mode sin(β x / L) at amplitude `SMALL`, released at rest."""
    displacement = SMALL * np.sin(beta * parameters.positions / parameters.length)
    return np.concatenate([displacement, np.zeros(parameters.nodes)])


# ------------------------------------------------------------------ published references
@pytest.mark.parametrize("mode", [0, 1, 2, 3])
def test_simulated_periods_match_the_string_with_an_end_mass(mode):
    # Reference: β tan β = μ L / M (see _tip_mass_roots), ω = β √(T/μ) / L. The simulated
    # line starts in the continuous mode shape; the discretisation shifts a mode's frequency by
    # about (β h / L)² / 24 relative (central differences), below 3e-4 for these modes, so the
    # measured period must agree within 2e-3 (also covering the zero-crossing interpolation).
    parameters = LINEAR
    beta = _tip_mass_roots(parameters.mass_ratio, 4)[mode]
    period = 2 * math.pi * parameters.length / (beta * parameters.wave_speed)
    step = period / 200
    times = np.arange(0.0, 3.2 * period, step)
    truth = mooring.simulate(_shape_state(beta, parameters), times, parameters=parameters,
                             rtol=1e-10, atol=1e-14)
    # Sampled where the mode moves most: the boat for the sway, the first antinode otherwise.
    node = (parameters.nodes - 1 if mode == 0
            else round(0.5 * math.pi / beta * parameters.nodes) - 1)
    measured = _crossing_period(times, truth[:, node])
    assert measured == pytest.approx(period, rel=2e-3)


def test_default_line_has_two_time_scales_far_apart():
    # Reference: the same frequency equation. The boat's sway is slow (about 20 s) and the
    # line's first string mode fast (about 0.57 s): a ratio above 30.
    parameters = mooring.DEFAULT_PARAMETERS
    betas = _tip_mass_roots(parameters.mass_ratio, 2)
    periods = 2 * math.pi * parameters.length / (betas * parameters.wave_speed)
    assert 15.0 <= periods[0] <= 25.0 and 0.4 <= periods[1] <= 0.7
    assert periods[0] / periods[1] > 30
    # The discrete linear modes the sampler uses agree with the formula too.
    np.testing.assert_allclose(2 * math.pi / mooring.linear_frequencies(parameters)[:2],
                               periods, rtol=1e-3)


def test_a_heavy_boat_gives_the_fixed_string_frequencies():
    # Reference: the taut string fixed at both ends, f_n = n / (2 L) · √(T/μ) (any vibration
    # text; from memory). A boat of 10^12 kg barely moves, so the line's end is fixed.
    parameters = replace(LINEAR, boat_mass=1e12)
    for n in (1, 2):
        expected = n / (2 * parameters.length) * parameters.wave_speed
        state = _shape_state(n * math.pi, parameters)
        step = 1 / (200 * expected)
        times = np.arange(0.0, 4.2 / expected, step)
        truth = mooring.simulate(state, times, parameters=parameters, rtol=1e-10, atol=1e-14)
        node = parameters.nodes // (2 * n) - 1  # the first antinode
        assert 1 / _crossing_period(times, truth[:, node]) == pytest.approx(expected, rel=2e-3)


def test_simulated_decay_matches_the_logarithmic_decrement():
    # Reference: a viscously damped oscillator ẍ + 2γẋ + ω²x = 0 has successive peaks in the
    # ratio e^{−γ T_d} (the logarithmic decrement; any vibration text, from memory). Damping
    # proportional to mass (c_j = 2γ m_j) keeps the undamped modes, each decaying at γ. The
    # decay rate fitted to the peaks must match γ within 1 %.
    gamma = 0.05
    parameters = replace(LINEAR, damping_rate=gamma)
    beta = _tip_mass_roots(parameters.mass_ratio, 2)[1]
    period = 2 * math.pi * parameters.length / (beta * parameters.wave_speed)
    times = np.arange(0.0, 12 * period, period / 100)
    truth = mooring.simulate(_shape_state(beta, parameters), times, parameters=parameters,
                             rtol=1e-10, atol=1e-14)
    signal = truth[:, parameters.nodes // 2 - 1]  # the antinode of the first string mode
    inner = np.flatnonzero((signal[1:-1] > signal[:-2]) & (signal[1:-1] >= signal[2:])) + 1
    # Parabola through each sampled peak and its neighbours: the peak's time and height.
    left, middle, right = signal[inner - 1], signal[inner], signal[inner + 1]
    offset = 0.5 * (left - right) / (left - 2 * middle + right)
    heights = middle - 0.25 * (left - right) * offset
    peak_times = times[inner] + offset * (times[1] - times[0])
    slope = np.polyfit(peak_times, np.log(heights), 1)[0]
    assert len(inner) >= 10
    assert -slope == pytest.approx(gamma, rel=1e-2)


# --------------------------------------------------------------------------- consistency
def test_energy_is_conserved_without_damping():
    # Reference: SciPy DOP853 on the undamped nonlinear line; the tension derives from the
    # potential T0 (ℓ − L) + EA (ℓ − L)² / (2 L), so E must stay constant (standard mechanics).
    parameters = replace(mooring.DEFAULT_PARAMETERS, damping_rate=0.0)
    states = mooring.sample_initial_states(3, np.random.default_rng(4), parameters=parameters)
    truth = mooring.simulate(states, np.linspace(0.0, 2.0, 5), parameters=parameters,
                             rtol=1e-10, atol=1e-12)
    energies = mooring.energy(truth, parameters)
    np.testing.assert_allclose(energies, np.broadcast_to(energies[0], energies.shape), rtol=1e-7)


def test_tension_grows_with_the_stretch():
    # Hooke's law for the line: a straight line to a boat displaced by Y has length √(L² + Y²).
    parameters = mooring.DEFAULT_PARAMETERS
    sway = 1.0
    state = np.concatenate([sway * parameters.positions / parameters.length,
                            np.zeros(parameters.nodes)])
    stretch = math.hypot(parameters.length, sway) - parameters.length
    expected = parameters.pretension + parameters.axial_stiffness * stretch / parameters.length
    assert mooring.tension(state) == pytest.approx(expected, rel=1e-12)
    assert 0.002 < expected / parameters.pretension - 1 < 0.01  # mild: below 1 %


def test_vector_field_vanishes_at_rest_and_accepts_a_batch():
    parameters = mooring.DEFAULT_PARAMETERS
    np.testing.assert_array_equal(mooring.vector_field(np.zeros(parameters.state_dim)), 0.0)
    states = mooring.sample_initial_states(4, np.random.default_rng(1))
    batch = mooring.vector_field(states)
    for row, derivative in zip(states, batch, strict=True):
        np.testing.assert_array_equal(mooring.vector_field(row), derivative)


def test_vector_field_refuses_a_wrong_state_shape():
    with pytest.raises(ValueError, match=r"`states` has shape \(3, 4\); expected \(256,\)"):
        mooring.vector_field(np.zeros((3, 4)))


def test_parameters_refuse_non_physical_values():
    with pytest.raises(ValueError, match=r"`pretension` is -1.0; expected a finite number > 0\."):
        mooring.MooringParameters(pretension=-1.0)
    with pytest.raises(ValueError, match=r"`damping_rate` is nan; expected a finite number ≥ 0"):
        mooring.MooringParameters(damping_rate=float("nan"))
    with pytest.raises(ValueError, match=r"`nodes` is 2; expected an integer ≥ 4\."):
        mooring.MooringParameters(nodes=2)


def test_sampled_states_stay_inside_the_stated_amplitudes():
    # Each excited mode's amplitude is at most its limit, so the field is bounded by their sum.
    initial_range = mooring.InitialRange()
    states = mooring.sample_initial_states(500, np.random.default_rng(2))
    assert states.shape == (500, 256)
    assert np.abs(states[:, :128]).max() <= sum(initial_range.amplitudes) + 1e-12
    # The boat moves with the sway mode only (string modes barely move it).
    assert np.abs(states[:, 127]).max() > 0.5 * initial_range.amplitudes[0]


def test_state_names_and_units_cover_the_field():
    names, units = mooring.state_names(), mooring.state_units()
    assert len(names) == len(units) == 256
    assert (names[0], names[127], names[128], names[255]) == ("u001", "u128", "v001", "v128")
    assert (units[0], units[255]) == ("m", "m/s")
