"""The demo's evaluation: forecasts of held-out crane states by the runtime against SciPy truth.

Hierarchical plans, the finest-level rollout and hybrid stepping are compared on the same
states; everything here needs only NumPy and the runtime (SciPy for the truth).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from decimal import ROUND_CEILING, Decimal
from typing import Any

import numpy as np

from stridecast.runtime import Stepper

from . import crane
from .settings import (
    BASE_STEP,
    CHECK_STATES,
    CURVE_SPACING,
    EXAMPLE_MODES,
    GROUND_TRUTH_TOLERANCE,
    HELD_OUT_SEED,
    HORIZON,
    HYBRID_BELOW,
    TABLE_HORIZONS,
    TOLERANCE_FACTOR,
    DemoSettings,
)

# Added to the stated tolerance, so a horizon the bundle happens to hit almost exactly does
# not make the shipped-bundle test hinge on float32 rounding.
TOLERANCE_FLOOR = 1e-3  # m


@dataclass(frozen=True)
class Evaluation:
    """What the demo measured. Arrays are physical units; errors are position errors in m.

    Attributes
    ----------
    states : ndarray, shape (B, 4)
        Held-out initial states; row 0 is the example state of the plot.
    grid, truth, finest : ndarray
        Every base step up to `HORIZON` (T,), the SciPy truth (T, B, 4) and the finest-level
        rollout (T, B, 4).
    example_forecast : ndarray, shape (T, 4)
        The hierarchical forecast of the example state at every base step.
    table, hybrid : tuple of dict
        One JSON-ready row per table horizon.
    curves : dict
        Error against horizon (every `CURVE_SPACING`) for "hierarchical", "finest", "hybrid".
    check : dict
        States, horizons, errors and stated tolerances for the shipped-bundle test.
    strides : tuple of int
    validated_horizon : float or None
    envelope : (min, max) of tuples of 4 floats, or None
        The training data's box from the manifest, for the plots.
    """

    states: np.ndarray
    grid: np.ndarray
    truth: np.ndarray
    finest: np.ndarray
    example_forecast: np.ndarray
    table: tuple[dict[str, Any], ...]
    hybrid: tuple[dict[str, Any], ...]
    curves: dict[str, list[float]]
    check: dict[str, Any]
    strides: tuple[int, ...]
    validated_horizon: float | None
    envelope: tuple[tuple[float, ...], tuple[float, ...]] | None = None


def held_out_states(count: int) -> np.ndarray:
    """The example state followed by `count` − 1 random held-out states, shape (count, 4)."""
    rng = np.random.default_rng(HELD_OUT_SEED)
    example = crane.state_from_modes(**EXAMPLE_MODES)
    return np.vstack([example, crane.sample_initial_states(count - 1, rng)])


def ground_truth(states: np.ndarray, times: np.ndarray | list[float]) -> np.ndarray:
    """SciPy DOP853 at the demo's tolerances; shape (len(times), *states.shape)."""
    return crane.simulate(states, times, rtol=GROUND_TRUTH_TOLERANCE,
                          atol=GROUND_TRUTH_TOLERANCE)


def position_errors(prediction: np.ndarray, truth: np.ndarray) -> np.ndarray:
    """Distance between predicted and true load positions (m), over the last axis."""
    return np.hypot(prediction[..., 0] - truth[..., 0], prediction[..., 1] - truth[..., 1])


def _rms(values: np.ndarray) -> float:
    return float(np.sqrt(np.mean(np.square(values))))


def _best_time(function: Callable[[], Any], repeats: int = 3) -> tuple[Any, float]:
    """The result of `function` and its shortest wall time over `repeats` runs (s)."""
    best, result = math.inf, None
    for _ in range(repeats):
        started = time.perf_counter()
        result = function()
        best = min(best, time.perf_counter() - started)
    return result, best


def _finest_rollout(stepper: Stepper, states: np.ndarray, steps: int
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Every state of the finest-level rollout, and the cumulative wall time to each (s)."""
    finest = np.empty((steps + 1, *states.shape))
    finest[0] = states
    elapsed = np.zeros(steps + 1)
    current = states
    started = time.perf_counter()
    for step in range(1, steps + 1):
        current = stepper.step(current, stepper.strides[0])
        finest[step] = current
        elapsed[step] = time.perf_counter() - started
    return finest, elapsed


def _table_rows(stepper: Stepper, states: np.ndarray, truth: np.ndarray, finest: np.ndarray,
                elapsed: np.ndarray) -> tuple[list[dict], list[dict]]:
    table, hybrid = [], []
    for horizon in TABLE_HORIZONS:
        index = round(horizon / BASE_STEP)
        (forecast, plan), seconds = _best_time(
            lambda t=horizon: stepper.advance_with_plan(states, t))
        _, reference_seconds = _best_time(lambda t=horizon: ground_truth(states, [t]),
                                          repeats=1)
        table.append({
            "horizon": horizon, "evaluations": plan.evaluations,
            "plan": plan.to_dict()["steps"],
            "finest_evaluations": index // stepper.strides[0],
            "position_rmse": _rms(position_errors(forecast, truth[index])),
            "finest_position_rmse": _rms(position_errors(finest[index], truth[index])),
            "runtime_ms": 1e3 * seconds, "finest_ms": 1e3 * float(elapsed[index]),
            "reference_ms": 1e3 * reference_seconds,
        })
        (mixed, mixed_plan), mixed_seconds = _best_time(
            lambda t=horizon: stepper.advance_with_plan(
                states, t, vector_field=crane.vector_field, hybrid_below=HYBRID_BELOW))
        hybrid.append({
            "horizon": horizon, "evaluations": mixed_plan.evaluations,
            "plan": mixed_plan.to_dict()["steps"], "remainder": mixed_plan.remainder,
            "vector_field_evaluations": mixed_plan.integrator_evaluations,
            "position_rmse": _rms(position_errors(mixed, truth[index])),
            "runtime_ms": 1e3 * mixed_seconds,
        })
    return table, hybrid


def _curves(stepper: Stepper, states: np.ndarray, truth: np.ndarray,
            finest: np.ndarray) -> dict[str, list[float]]:
    spacing = round(CURVE_SPACING / BASE_STEP)
    indices = np.arange(spacing, round(HORIZON / BASE_STEP) + 1, spacing)
    times = indices * BASE_STEP
    hierarchical = stepper.forecast(states, times)
    hybrid = stepper.forecast(states, times, vector_field=crane.vector_field,
                              hybrid_below=HYBRID_BELOW)
    return {
        "times": times.tolist(),
        "hierarchical": [_rms(position_errors(hierarchical[row], truth[index]))
                         for row, index in enumerate(indices)],
        "finest": [_rms(position_errors(finest[index], truth[index])) for index in indices],
        "hybrid": [_rms(position_errors(hybrid[row], truth[index]))
                   for row, index in enumerate(indices)],
    }


def round_up(value: float, digits: int = 2) -> float:
    """`value` rounded up to `digits` significant digits (0 for values ≤ 0)."""
    if value <= 0:
        return 0.0
    # In decimal: dividing by an inexact power of ten (0.14 / 0.01 = 14.000000000000002)
    # would push a value that already has `digits` digits up by one in the last digit.
    exact = Decimal(repr(float(value)))  # the shortest decimal the float stands for
    step = Decimal(1).scaleb(exact.adjusted() - digits + 1)
    return float(exact.quantize(step, rounding=ROUND_CEILING))


def _check_figures(stepper: Stepper, states: np.ndarray, truth: np.ndarray) -> dict[str, Any]:
    """The shipped-bundle test's reference: held-out states, errors and stated tolerances."""
    errors = []
    for horizon in TABLE_HORIZONS:
        forecast = stepper.advance(states, horizon)
        index = round(horizon / BASE_STEP)
        errors.append(float(position_errors(forecast, truth[index]).max()))
    return {
        "states": states.tolist(), "horizons": list(TABLE_HORIZONS),
        "max_position_error_m": errors,
        "position_tolerance_m": [round_up(TOLERANCE_FACTOR * error + TOLERANCE_FLOOR)
                                 for error in errors],
        "ground_truth": {"method": "scipy.integrate.solve_ivp DOP853",
                         "rtol": GROUND_TRUTH_TOLERANCE, "atol": GROUND_TRUTH_TOLERANCE},
        "tolerance_rule": (f"{TOLERANCE_FACTOR:g} x the largest position error over these "
                           f"states when the bundle was made, plus {TOLERANCE_FLOOR:g} m, "
                           "rounded up to 2 significant digits"),
    }


def evaluate(stepper: Stepper, settings: DemoSettings) -> Evaluation:
    """Forecast held-out states with the runtime and compare with SciPy ground truth."""
    states = held_out_states(settings.held_out_states)
    steps = round(HORIZON / BASE_STEP)
    grid = np.arange(steps + 1) * BASE_STEP
    truth = ground_truth(states, grid)
    finest, elapsed = _finest_rollout(stepper, states, steps)
    table, hybrid = _table_rows(stepper, states, truth, finest, elapsed)
    return Evaluation(
        states=states, grid=grid, truth=truth, finest=finest,
        example_forecast=stepper.forecast(states[0], grid), table=tuple(table),
        hybrid=tuple(hybrid), curves=_curves(stepper, states, truth, finest),
        check=_check_figures(stepper, states[:CHECK_STATES], truth[:, :CHECK_STATES]),
        strides=stepper.strides, validated_horizon=stepper.manifest.validated_horizon,
        envelope=(None if stepper.manifest.envelope_min is None
                  else (stepper.manifest.envelope_min, stepper.manifest.envelope_max)),
    )
