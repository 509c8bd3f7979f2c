"""Stepper against exact flow maps of linear systems.

Expected values: x(t) = expm(A t) x(0), the matrix-exponential solution of x' = A x
(scipy.linalg.expm), and cos/sin for the undamped harmonic oscillator (closed form).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.linalg import expm

from stridecast.runtime import NonFiniteError, StateError, TimeError, load
from tests.builders import linear_bundle, oscillator_matrix

RNG = np.random.default_rng(7)
SYSTEM = np.array([[-0.05, 1.0, 0.0], [-1.5, -0.1, 0.3], [0.0, -0.2, -0.02]])


def relative_error(actual: np.ndarray, expected: np.ndarray) -> float:
    return float(np.max(np.abs(actual - expected)) / np.max(np.abs(expected)))


@pytest.fixture(scope="module", params=[
    ((1, 2, 4, 8, 16, 32, 64, 128), "replace", False),
    ((1, 3, 7, 50), "increment", True),          # not divisible: greedy is not always optimal
    ((2, 5, 40), "replace", True),               # no stride 1: some base-step times unreachable
])
def linear_stepper(request, tmp_path_factory):
    strides, update, use_gemm = request.param
    out = tmp_path_factory.mktemp("bundles") / "linear.bundle"
    linear_bundle(out, SYSTEM, base_step=0.01, strides=strides, update=update,
                  use_gemm=use_gemm, mean=[0.3, -0.2, 1.0], scale=[2.0, 0.5, 3.0])
    return load(out, dtype="float64"), strides


def test_advance_matches_matrix_exponential(linear_stepper):
    stepper, _ = linear_stepper
    x0 = RNG.normal(size=(5, 3))
    for base_steps in (0, 10, 40, 97, 100, 1234, 5000):
        if not stepper._planner.is_reachable(base_steps):
            continue
        t = base_steps * 0.01
        # Reference: scipy.linalg.expm (matrix-exponential solution of x' = A x).
        expected = x0 @ expm(SYSTEM * t).T
        actual = stepper.advance(x0, t)
        assert relative_error(actual, expected) <= 1e-10
        assert stepper.advance(x0[0], t).shape == (3,)


def test_forecast_hundreds_of_times(linear_stepper):
    stepper, _ = linear_stepper
    x0 = RNG.normal(size=3)
    grid = [n for n in range(0, 3000, 7) if stepper._planner.is_reachable(n)]
    times = np.asarray(grid) * 0.01
    result = stepper.forecast(x0, times)
    assert result.shape == (len(times), 3)
    for t, state in zip(times, result, strict=True):
        # Reference: scipy.linalg.expm.
        assert relative_error(state, expm(SYSTEM * t) @ x0) <= 1e-10


def test_forecast_shares_steps_between_times(linear_stepper):
    stepper, _ = linear_stepper
    times = np.arange(0, 400) * 0.02
    _, info = stepper.forecast_with_info(np.ones(3), times, off_grid="nearest")
    separate = sum(stepper.plan(t, off_grid="nearest").evaluations for t in times)
    assert info.evaluations < separate / 3


def test_oscillator_against_closed_form(tmp_path):
    omega = 2.0
    out = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(omega), base_step=0.05,
                        strides=(1, 4, 16, 64))
    stepper = load(out, dtype="float64")
    times = np.arange(0, 2000, 3) * 0.05
    result = stepper.forecast(np.array([1.0, 0.0]), times)
    # Closed form of x'' = -ω² x with x(0) = 1, v(0) = 0: x = cos ωt, v = -ω sin ωt.
    expected = np.column_stack([np.cos(omega * times), -omega * np.sin(omega * times)])
    assert np.max(np.abs(result - expected)) <= 1e-10


def test_float32_is_close_and_float32(tmp_path):
    out = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.05,
                        strides=(1, 8, 64), dtype=np.float32)
    stepper = load(out)
    result = stepper.advance(np.array([1.0, 0.0]), 32.0)
    assert result.dtype == np.float32
    # Reference: scipy.linalg.expm; float32 rounding over ~13 steps (common practice: ~1e-5).
    assert np.allclose(result, expm(oscillator_matrix() * 32.0) @ [1.0, 0.0], atol=1e-4)


def test_plan_is_fewest_and_coarse_first(tmp_path):
    out = linear_bundle(tmp_path / "b.bundle", oscillator_matrix(), base_step=0.1,
                        strides=(1, 3, 4))
    stepper = load(out, dtype="float64")
    plan = stepper.plan(0.6)  # 6 base steps: 3+3 beats greedy 4+1+1 (a fact of coin change)
    assert plan.steps == ((3, 2),)
    assert plan.evaluations == 2 and plan.method == "grid" and plan.base_steps == 6
    # 0.3 / 0.1 is 2.9999999999999996 in binary floating point: still the grid time 3.
    assert stepper.plan(0.3).steps == ((3, 1),)


def test_off_grid_policies(tmp_path):
    omega = 1.0
    out = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(omega), base_step=0.1,
                        strides=(1, 10))
    stepper = load(out, dtype="float64")
    x0 = np.array([1.0, 0.0])
    t = 1.234
    expected = expm(oscillator_matrix(omega) * t) @ x0
    interpolated = stepper.advance(x0, t)
    # Cubic interpolation error ~ h^4 f''''/24 with h = 0.1 (polynomial interpolation bound).
    assert np.max(np.abs(interpolated - expected)) < 1e-5
    _, plan = stepper.advance_with_plan(x0, t, off_grid="nearest")
    assert plan.method == "nearest" and plan.base_steps == 12
    with pytest.raises(TimeError, match=r"not a reachable grid time.*1\.2.*1\.3"):
        stepper.advance(x0, t, off_grid="error")


def test_vector_field_finishes_remainder(tmp_path):
    system = oscillator_matrix(1.5, 0.05)
    out = linear_bundle(tmp_path / "osc.bundle", system, base_step=0.1, strides=(1, 10, 100))
    stepper = load(out, dtype="float64")
    x0 = np.array([[0.5, 0.2]])
    t = 17.3456
    result, plan = stepper.advance_with_plan(x0, t, vector_field=lambda x: x @ system.T)
    assert plan.method == "integrate" and plan.integrator_evaluations > 0
    # Reference: scipy.linalg.expm.
    assert np.max(np.abs(result - x0 @ expm(system * t).T)) < 1e-8
    hybrid, plan = stepper.advance_with_plan(x0, t, vector_field=lambda x: x @ system.T,
                                             hybrid_below=10)
    assert plan.method == "hybrid" and all(stride >= 10 for stride, _ in plan.steps)
    assert np.max(np.abs(hybrid - x0 @ expm(system * t).T)) < 1e-8


def test_unreachable_time_names_neighbours(tmp_path):
    out = linear_bundle(tmp_path / "b.bundle", oscillator_matrix(), base_step=1.0,
                        strides=(4, 6))
    stepper = load(out, dtype="float64")
    with pytest.raises(TimeError, match=r"nearest reachable times are 0\.0 and 4\.0"):
        stepper.advance(np.ones(2), 2.0, off_grid="error")


@pytest.mark.parametrize(("state", "message"), [
    (np.ones(3), r"expected \(2,\) or \(batch, 2\)"),
    (np.ones((2, 2, 2)), r"expected \(2,\) or \(batch, 2\)"),
    (np.array([1.0, np.nan]), r"`state` holds nan at index \[1\]; expected finite numbers"),
    (np.array([1e300, 0.0]), r"`state` holds 1e\+300 at index \[0\]; too large for float32"),
    (np.array(["a", "b"]), "expected real numbers"),
    (np.zeros((0, 2)), "empty batch"),
])
def test_bad_states(tmp_path, state, message):
    out = linear_bundle(tmp_path / "b.bundle", oscillator_matrix(), base_step=0.1,
                        strides=(1, 2), dtype=np.float32)
    stepper = load(out)
    with pytest.raises(StateError, match=message):
        stepper.advance(state, 1.0)


@pytest.mark.parametrize(("t", "message"), [
    (-1.0, "expected a finite time"), (float("nan"), "expected a finite time"),
    (float("inf"), "expected a finite time"), ("3", r"`t` is '3'; expected a finite time"),
    (True, r"`t` is True; expected a finite time ≥ 0 \(in s\)\."),
])
def test_bad_times(tmp_path, t, message):
    out = linear_bundle(tmp_path / "b.bundle", oscillator_matrix(), base_step=0.1, strides=(1,))
    stepper = load(out)
    with pytest.raises(TimeError, match=message):
        stepper.advance(np.ones(2), t)


def test_forecast_order_and_duplicates(tmp_path):
    out = linear_bundle(tmp_path / "b.bundle", oscillator_matrix(), base_step=0.1,
                        strides=(1, 4))
    stepper = load(out, dtype="float64")
    times = [0.8, 0.1, 0.8, 0.0]
    result = stepper.forecast(np.ones(2), times)
    for t, state in zip(times, result, strict=True):
        assert np.array_equal(state, stepper.advance(np.ones(2), t))
    with pytest.raises(TimeError, match="expected finite times"):
        stepper.forecast(np.ones(2), [0.1, -0.1])


def test_non_finite_step_names_level(tmp_path):
    # An unstable exact flow map (growth e^{100 t}) overflows float32 within a few strides.
    system = np.array([[100.0, 0.0], [0.0, 100.0]])
    out = linear_bundle(tmp_path / "b.bundle", system, base_step=0.1, strides=(1, 8),
                        dtype=np.float32)
    stepper = load(out)
    with pytest.raises(NonFiniteError, match=r"stride 8 produced non-finite values at step \d"):
        stepper.advance(np.ones(2), 8.0)


def test_fast_path_matches_interpreter(tmp_path):
    out = linear_bundle(tmp_path / "b.bundle", SYSTEM, base_step=0.01, strides=(1, 4, 16),
                        update="increment", mean=[1, 2, 3], scale=[0.5, 2, 4])
    fast = load(out, dtype="float64")
    slow = load(out, dtype="float64", fast_path=False)
    assert set(fast.kernel_paths.values()) == {"affine-chain"}
    assert set(slow.kernel_paths.values()) == {"interpreter"}
    x0 = RNG.normal(size=(4, 3))
    assert np.allclose(fast.advance(x0, 5.0), slow.advance(x0, 5.0), rtol=1e-12, atol=1e-12)


def test_forecast_with_vector_field_and_hybrid(tmp_path):
    system = oscillator_matrix(1.5, 0.05)
    out = linear_bundle(tmp_path / "osc.bundle", system, base_step=0.1, strides=(1, 10, 100))
    stepper = load(out, dtype="float64")
    x0 = np.array([[0.5, 0.2], [-0.1, 0.4]])
    times = np.concatenate([np.arange(0, 30, 0.37), np.arange(0, 30, 0.5)])
    field = lambda x: x @ system.T  # noqa: E731
    for options in ({}, {"hybrid_below": 10}, {"hybrid_below": 100}):
        result, info = stepper.forecast_with_info(x0, times, vector_field=field, **options)
        assert info.integrator_evaluations > 0
        for t, states in zip(times, result, strict=True):
            # Reference: scipy.linalg.expm; tolerance from the integrator's rtol 1e-8.
            assert np.max(np.abs(states - x0 @ expm(system * t).T)) < 1e-7


@pytest.mark.parametrize(("call", "message"), [
    (lambda s: s.step(np.ones(2), 3), r"`stride` is 3; this bundle has strides"),
    (lambda s: s.advance(np.ones(2), 0.35, vector_field="f"), r"`vector_field` must be a callable"),
    (lambda s: s.advance(np.ones(2), 0.4, hybrid_below=2),
     r"`hybrid_below` needs a `vector_field`"),
    (lambda s: s.advance(np.ones(2), 0.4, off_grid="round"), r"`off_grid` is 'round'"),
])
def test_bad_options_raise_option_error_not_time_error(tmp_path, call, message):
    # Faults of options, not of times: OptionError (a ValueError), never TimeError.
    from stridecast.runtime import OptionError

    out = linear_bundle(tmp_path / "b.bundle", oscillator_matrix(), base_step=0.1,
                        strides=(1, 4))
    stepper = load(out)
    with pytest.raises(OptionError, match=message) as caught:
        call(stepper)
    assert not isinstance(caught.value, TimeError)
