"""End to end on physics: a frictionless pendulum, trained, exported, run by the runtime.

The reference trajectories come from SciPy's `solve_ivp` (DOP853, rtol 1e-10, atol 1e-12);
the period at amplitude θ0 from the standard mechanics-handbook formula
T = 4 √(L/g) K(m), m = sin²(θ0/2), with K the complete elliptic integral of the first kind
(scipy.special.ellipk, parameter convention m = k²).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.special import ellipk

from stridecast.export import export_bundle, train_levels
from stridecast.runtime import ExtrapolationWarning, load

GRAVITY, LENGTH = 9.81, 1.0
BASE_STEP = 0.01
STRIDES = (1, 4, 16)
# Training amplitudes go up to this angle (rad); the test amplitude 2.0 lies inside.
MAX_AMPLITUDE = 2.5


def vector_field(_, state):
    return [state[1], -GRAVITY / LENGTH * np.sin(state[0])]


def trajectory(initial, samples: int) -> np.ndarray:
    times = np.arange(samples) * BASE_STEP
    solution = solve_ivp(vector_field, (0.0, times[-1]), initial, method="DOP853", rtol=1e-10,
                         atol=1e-12, t_eval=times)
    return solution.y.T


def period(amplitude: float) -> float:
    return 4.0 * np.sqrt(LENGTH / GRAVITY) * ellipk(np.sin(amplitude / 2.0) ** 2)


def training_data(count: int = 96, samples: int = 200, seed: int = 1) -> np.ndarray:
    """Orbits with energies uniform up to that of MAX_AMPLITUDE, each from a random phase."""
    rng = np.random.default_rng(seed)
    energy = rng.uniform(0.02, 1.0, count) * (1.0 - np.cos(MAX_AMPLITUDE))
    amplitudes = np.arccos(1.0 - energy)
    data = []
    for amplitude, phase in zip(amplitudes, rng.uniform(0.0, 1.0, count), strict=True):
        start = solve_ivp(vector_field, (0.0, phase * period(amplitude)), [amplitude, 0.0],
                          method="DOP853", rtol=1e-10, atol=1e-12).y[:, -1]
        data.append(trajectory(start, samples))
    return np.stack(data)


@pytest.fixture(scope="module")
def stepper(tmp_path_factory):
    trained = train_levels(training_data(), base_step=BASE_STEP, strides=STRIDES,
                           hidden=(64, 64), epochs=20, learning_rate=1e-2, rollout=4,
                           validation_fraction=0.15, seed=0, progress=False,
                           state_names=["theta", "omega"], state_units=["rad", "rad/s"])
    bundle = export_bundle(trained, tmp_path_factory.mktemp("pendulum") / "pendulum.bundle")
    return load(bundle)


@pytest.mark.slow
def test_period_at_large_amplitude(stepper):
    amplitude = 2.0
    expected = period(amplitude)  # ≈ 2.67 s, a third longer than the 2.01 s of small swings
    times = np.arange(int(3.2 * expected / BASE_STEP)) * BASE_STEP
    # The held-out trajectories cover 2 s; the runtime says the later times are unvalidated.
    with pytest.warns(ExtrapolationWarning, match="beyond the validated horizon"):
        theta = stepper.forecast(np.array([amplitude, 0.0]), times)[:, 0].astype(np.float64)
    falling = np.flatnonzero((theta[:-1] > 0) & (theta[1:] <= 0))
    crossings = times[falling] + BASE_STEP * theta[falling] / (theta[falling] - theta[falling + 1])
    assert len(crossings) >= 3
    measured = np.mean(np.diff(crossings))
    assert abs(measured - expected) / expected < 0.02, (measured, expected)


@pytest.mark.slow
def test_hierarchy_beats_finest_level_at_long_horizon(stepper):
    horizon = 400  # base steps: 25 steps of the coarsest level, about 1.5 periods
    amplitudes = np.linspace(0.5, 2.2, 8)
    starts = np.stack([amplitudes, np.zeros_like(amplitudes)], axis=1)
    truth = np.stack([trajectory(start, horizon + 1)[-1] for start in starts])
    with pytest.warns(ExtrapolationWarning, match="beyond the validated horizon"):
        hierarchical = stepper.advance(starts, horizon * BASE_STEP).astype(np.float64)
    assert stepper.plan(horizon * BASE_STEP).steps == ((16, 25),)
    finest = starts.astype(np.float32)
    for _ in range(horizon):
        finest = stepper.step(finest, 1)
    hierarchical_error = np.sqrt(np.mean((hierarchical - truth) ** 2))
    finest_error = np.sqrt(np.mean((finest.astype(np.float64) - truth) ** 2))
    assert hierarchical_error < finest_error, (hierarchical_error, finest_error)


@pytest.mark.slow
def test_validity_and_envelope_travel_with_the_bundle(stepper):
    manifest = stepper.manifest
    curve = manifest.validation
    assert curve.metric == "normalised_rms" and curve.tolerance == 0.1
    horizon = manifest.validated_horizon
    assert horizon > 0
    # The first-crossing rule on the manifest's own curve.
    within = [t for t, e in zip(curve.times, curve.errors, strict=True) if t <= horizon]
    assert max(within) == horizon and all(
        e <= curve.tolerance for t, e in zip(curve.times, curve.errors, strict=True)
        if t <= horizon)
    assert stepper.expected_error(horizon) <= curve.tolerance
    assert manifest.envelope_samples.count > 100 and manifest.envelope_samples.radius > 0
    # Energy E = ω²/2 + (g/L)(1 − cos θ) (standard mechanics): the training orbits have
    # E ≤ (g/L)(1 − cos 2.5) ≈ 17.7. (θ, ω) = (2.4, 5.5) has E ≈ 32, far from every orbit,
    # yet each component lies inside the training range (|θ| ≤ 2.5, |ω| ≤ √(2 · 17.7) ≈ 5.9).
    far = np.array([2.4, 5.5])
    assert 0.5 * far[1] ** 2 + GRAVITY / LENGTH * (1 - np.cos(far[0])) > 30
    kinds = {finding.kind for finding in stepper.check(far)}
    assert "far_from_data" in kinds and "outside_box" not in kinds
    assert stepper.check(np.array([1.0, 0.0])) == ()
    with pytest.warns(ExtrapolationWarning):
        stepper.advance(np.array([1.0, 0.0]), 2.0 * horizon + 1.0)
