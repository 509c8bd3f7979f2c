"""Tests of the NumPy Runge–Kutta integrators against SciPy and closed forms."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.linalg import expm

from stridecast.runtime.errors import NonFiniteError, OptionError, StateError, TimeError
from stridecast.runtime.integrate import DormandPrince54, integrate


def oscillator(states):
    """Harmonic oscillator x'' = -x as the first-order system (x, v)."""
    return np.stack([states[:, 1], -states[:, 0]], axis=1)


def lotka_volterra(states):
    prey, predator = states[:, 0], states[:, 1]
    return np.stack([1.5 * prey - prey * predator, -3.0 * predator + prey * predator], axis=1)


def test_dopri5_matches_closed_form_oscillator():
    # Expected: x(t) = x0 cos t + v0 sin t, v(t) = -x0 sin t + v0 cos t (closed form).
    initial = np.array([[1.0, 0.0], [0.3, -2.0], [0.0, 0.0]])
    duration = 7.3
    final, evaluations = integrate(oscillator, initial, duration, rtol=1e-10, atol=1e-12)
    cos, sin = np.cos(duration), np.sin(duration)
    expected = np.stack(
        [initial[:, 0] * cos + initial[:, 1] * sin, -initial[:, 0] * sin + initial[:, 1] * cos],
        axis=1,
    )
    np.testing.assert_allclose(final, expected, rtol=0, atol=1e-8)
    assert evaluations > 0


def test_dopri5_matches_matrix_exponential():
    # Expected: x(t) = expm(t·M) x0 for the linear system x' = M x (SciPy's expm).
    rng = np.random.default_rng(3)
    matrix = rng.normal(size=(4, 4)) - 2.0 * np.eye(4)
    initial = rng.normal(size=(5, 4))
    final, _ = integrate(lambda x: x @ matrix.T, initial, 2.5, rtol=1e-10, atol=1e-12)
    expected = initial @ expm(2.5 * matrix).T
    np.testing.assert_allclose(final, expected, rtol=1e-7, atol=1e-9)


def test_dopri5_matches_scipy_dop853():
    # Expected: SciPy's solve_ivp with DOP853 at tight tolerances.
    initial = np.array([[10.0, 5.0], [2.0, 1.0]])
    duration = 4.0
    final, _ = integrate(lotka_volterra, initial, duration, rtol=1e-10, atol=1e-12)
    for row, start in enumerate(initial):
        reference = solve_ivp(
            lambda t, y: lotka_volterra(y[None])[0],
            (0.0, duration),
            start,
            method="DOP853",
            rtol=1e-13,
            atol=1e-13,
        )
        np.testing.assert_allclose(final[row], reference.y[:, -1], rtol=1e-6)


def test_dopri5_evaluations_close_to_scipy_rk45():
    # Expected: SciPy's RK45 is the same Dormand–Prince pair with the same controller
    # (common practice), so step counts should be of the same size for one state.
    start = np.array([10.0, 5.0])
    reference = solve_ivp(
        lambda t, y: lotka_volterra(y[None])[0], (0.0, 4.0), start, rtol=1e-8, atol=1e-10
    )
    final, evaluations = integrate(lotka_volterra, start[None], 4.0, rtol=1e-8, atol=1e-10)
    assert 0.5 * reference.nfev < evaluations < 2.0 * reference.nfev
    np.testing.assert_allclose(final[0], reference.y[:, -1], rtol=1e-6)


def test_rk4_is_fourth_order():
    # Expected: global error of RK4 scales like h^4, so halving h divides it by about 16
    # (common practice); reference from the closed-form oscillator.
    initial = np.array([[1.0, 0.5]])
    duration = 3.0
    exact = np.array(
        [
            initial[0, 0] * np.cos(duration) + initial[0, 1] * np.sin(duration),
            -initial[0, 0] * np.sin(duration) + initial[0, 1] * np.cos(duration),
        ]
    )
    errors = []
    for step in (0.2, 0.1, 0.05):
        final, evaluations = integrate(oscillator, initial, duration, method="rk4", max_step=step)
        assert evaluations == 4 * round(duration / step)
        errors.append(np.abs(final[0] - exact).max())
    ratios = [errors[0] / errors[1], errors[1] / errors[2]]
    for ratio in ratios:
        assert 14.0 < ratio < 18.0


def test_rk4_lands_exactly_on_duration():
    # Expected: x' = 1 is integrated exactly by any RK method (consistency, common practice).
    final, evaluations = integrate(
        lambda x: np.ones_like(x), np.zeros((2, 3)), 1.0, method="rk4", max_step=0.3
    )
    np.testing.assert_allclose(final, 1.0, rtol=0, atol=1e-14)
    assert evaluations == 4 * 4  # ceil(1 / 0.3) = 4 equal steps


def test_dopri5_tables_are_consistent():
    # Expected: row sums of A equal C and weights sum to 1; error weights sum to 0
    # (order conditions, Hairer et al. I §II.1).
    method = DormandPrince54
    np.testing.assert_allclose(method.A.sum(axis=1), method.C, atol=1e-15)
    assert abs(method.B.sum() - 1.0) < 1e-15
    assert abs(method.E.sum()) < 1e-15


def test_zero_duration_returns_copy():
    state = np.array([[1.0, 2.0]], dtype=np.float32)
    final, evaluations = integrate(oscillator, state, 0.0)
    assert evaluations == 0
    assert final.dtype == np.float32
    np.testing.assert_array_equal(final, state)
    assert final is not state


def test_float32_state_keeps_dtype():
    final, _ = integrate(oscillator, np.array([[1.0, 0.0]], dtype=np.float32), 1.0)
    assert final.dtype == np.float32
    # Expected: cos(1), -sin(1) (closed form).
    np.testing.assert_allclose(final[0], [np.cos(1.0), -np.sin(1.0)], rtol=1e-6)


def test_max_step_is_respected():
    _, evaluations = integrate(oscillator, np.array([[1.0, 0.0]]), 10.0, max_step=0.1)
    assert evaluations >= 6 * 100  # at least 100 steps of six evaluations each


def test_non_finite_derivative_names_the_time():
    def blows_up(states):
        return np.where(states > 0.55, np.nan, 1.0)

    with pytest.raises(NonFiniteError, match=r"non-finite derivative at t = .*had reached t = "):
        integrate(blows_up, np.zeros((1, 1)), 2.0)
    with pytest.raises(NonFiniteError, match=r"had reached t = 0\.4\."):
        integrate(blows_up, np.zeros((1, 1)), 2.0, method="rk4", max_step=0.2)


def test_evaluation_budget():
    with pytest.raises(TimeError, match=r"more than 50 vector-field evaluations"):
        integrate(oscillator, np.array([[1.0, 0.0]]), 100.0, max_evaluations=50)
    with pytest.raises(TimeError, match=r"more than 10 vector-field evaluations"):
        integrate(oscillator, np.ones((1, 2)), 1.0, method="rk4", max_step=0.1, max_evaluations=10)


@pytest.mark.parametrize(
    ("kwargs", "error", "message"),
    [
        ({"duration": -1.0}, TimeError, r"`duration` must be finite and non-negative; got -1\.0"),
        ({"duration": np.inf}, TimeError, r"`duration` must be finite"),
        ({"method": "euler"}, OptionError, r"`method` must be one of \['dopri5', 'rk4'\]"),
        ({"method": "rk4"}, OptionError, r"`max_step` is required for method 'rk4'"),
        ({"max_step": 0.0}, OptionError, r"`max_step` must be a finite positive number; got 0\.0"),
        ({"rtol": 1e-20}, OptionError, r"`rtol` must be at least"),
        ({"state": np.ones(2)}, StateError, r"`state` must have shape \(B, d\); got .*\(2,\)"),
        ({"state": np.full((1, 2), np.nan)}, StateError, r"`state` must be finite"),
    ],
)
def test_bad_arguments(kwargs, error, message):
    arguments = {"state": np.ones((1, 2)), "duration": 1.0, **kwargs}
    state = arguments.pop("state")
    duration = arguments.pop("duration")
    with pytest.raises(error, match=message):
        integrate(oscillator, state, duration, **arguments)


def test_wrong_vector_field_shape():
    with pytest.raises(StateError, match=r"`vector_field` must return shape \(1, 2\); got \(2,\)"):
        integrate(lambda x: x[0], np.ones((1, 2)), 1.0)
