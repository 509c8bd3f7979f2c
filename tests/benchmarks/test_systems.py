"""The published systems: equations as printed, batched reference data as SciPy gives it."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("scipy")
from scipy.integrate import solve_ivp

from stridecast.benchmarks.lyapunov import jacobian
from stridecast.benchmarks.systems import (
    attractor_states,
    hindmarsh_rose,
    lorenz63,
    lorenz96_two_scale,
    published_systems,
    trajectories,
)


def test_lorenz63_matches_the_printed_equations():
    # Lorenz (1963), eqs. 25-27 with σ = 10, ρ = 28, β = 8/3, evaluated by hand at (1, 2, 3).
    system = lorenz63()
    rate = system.vector_field(np.array([1.0, 2.0, 3.0]))
    np.testing.assert_allclose(rate, [10.0 * (2 - 1), 1 * (28 - 3) - 2, 1 * 2 - 8 / 3 * 3])


def test_hindmarsh_rose_matches_the_printed_equations():
    # Hindmarsh & Rose (1984) with a=1, b=3, c=1, d=5, s=4, x_R=-1.6, r=0.006, I=3.25,
    # evaluated by hand at (0.5, -1, 2).
    rate = hindmarsh_rose().vector_field(np.array([0.5, -1.0, 2.0]))
    np.testing.assert_allclose(rate, [-1 - 0.125 + 0.75 - 2 + 3.25, 1 - 1.25 + 1,
                                      0.006 * (4 * 2.1 - 2)])


def test_lorenz96_two_scale_matches_the_printed_equations():
    # Lorenz (1996): X_k' = -X_{k-1}(X_{k-2} - X_{k+1}) - X_k + F - (hc/b) Σ_j Y_{j,k},
    # Y_i' = -cb Y_{i+1}(Y_{i+2} - Y_{i-1}) - c Y_i + (hc/b) X_{k(i)}; written out term by term
    # with explicit cyclic indices (a loop, independent of the vectorised np.roll form).
    system = lorenz96_two_scale(slow=5, fast_per_slow=4)
    rng = np.random.default_rng(0)
    state = rng.standard_normal(system.dim)
    slow, fast, forcing, h, c, b = 5, 20, 10.0, 1.0, 10.0, 10.0
    big, small = state[:slow], state[slow:]
    expected = np.empty(system.dim)
    for k in range(slow):
        expected[k] = (-big[k - 1] * (big[k - 2] - big[(k + 1) % slow]) - big[k] + forcing
                       - h * c / b * small[4 * k:4 * k + 4].sum())
    for i in range(fast):
        expected[slow + i] = (-c * b * small[(i + 1) % fast] * (small[(i + 2) % fast]
                                                                - small[i - 1])
                              - c * small[i] + h * c / b * big[i // 4])
    np.testing.assert_allclose(system.vector_field(state), expected, rtol=1e-12)


def test_complex_step_jacobian_of_lorenz63_is_the_analytic_one():
    # ∂f/∂x of Lorenz (1963): [[-σ, σ, 0], [ρ - z, -1, -x], [y, x, -β]].
    x, y, z = 1.5, -2.0, 20.0
    expected = [[-10.0, 10.0, 0.0], [28.0 - z, -1.0, -x], [y, x, -8.0 / 3.0]]
    np.testing.assert_allclose(jacobian(lorenz63(), np.array([x, y, z])), expected,
                               rtol=1e-13, atol=1e-13)


@pytest.mark.parametrize("system", published_systems(), ids=lambda s: s.name)
def test_complex_step_jacobian_agrees_with_central_differences(system):
    # Central differences: error O(h²) (common practice), so agreement to ~1e-6 relative.
    state = np.asarray(system.initial_state) + 0.1
    step = 1e-5
    columns = [(system.vector_field(state + step * e) - system.vector_field(state - step * e))
               / (2 * step) for e in np.eye(system.dim)]
    np.testing.assert_allclose(jacobian(system, state), np.array(columns).T, rtol=1e-6,
                               atol=1e-6)


def test_batched_trajectories_match_one_solve_ivp_per_state():
    # SciPy's solve_ivp on each state alone at the same tolerance is the reference.
    system = lorenz63()
    initial = attractor_states(system, 3, spacing=0.7, seed=5)
    batch = trajectories(system, initial, 101)
    times = np.arange(101) * system.base_step
    for row, state in zip(batch, initial, strict=True):
        alone = solve_ivp(lambda _, s: system.vector_field(s), (0, times[-1]), state,
                          method="DOP853", rtol=1e-10, atol=1e-10, t_eval=times).y.T
        np.testing.assert_allclose(row, alone, rtol=0, atol=1e-7)


def test_attractor_states_lie_on_the_lorenz_attractor():
    # Lorenz (1963): every orbit enters and stays in a bounded region; on the attractor
    # 0 < z < 50 and |x|, |y| < 30 (bounds read off the classic figures, common knowledge).
    states = attractor_states(lorenz63(), 200, spacing=0.3, seed=1)
    assert states.shape == (200, 3)
    assert np.all((states[:, 2] > 0) & (states[:, 2] < 50))
    assert np.all(np.abs(states[:, :2]) < 30)
    other = attractor_states(lorenz63(), 200, spacing=0.3, seed=2)
    assert np.min(np.linalg.norm(states[:5] - other[:5], axis=1)) > 1e-3
