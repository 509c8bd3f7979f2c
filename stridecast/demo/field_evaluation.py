"""The field scenario's evaluation: held-out line motions forecast by the runtime against SciPy.

Errors use the bundle's own metric (normalised RMS over components and states, with the
scale the exporter validated with), so they compare with the tolerance the bundle records.
Everything here needs only NumPy and the runtime (SciPy for the truth).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np

from stridecast.runtime import Stepper

from . import mooring
from .field_settings import (
    BASE_STEP,
    EXAMPLE_AMPLITUDES,
    GROUND_TRUTH_TOLERANCE,
    HELD_OUT_SEED,
    FieldSettings,
)


@dataclass(frozen=True)
class FieldEvaluation:
    """What the demo measured on held-out states.

    Attributes
    ----------
    states : ndarray, shape (B, 2N)
        Held-out initial states; row 0 is the example of the plots.
    grid : ndarray, shape (T,)
        Every base step up to the evaluation horizon, s.
    truth, forecast : ndarray, shape (T, B, 2N)
        SciPy ground truth and the runtime's forecast at every grid time.
    errors : ndarray, shape (T,)
        Normalised RMS error at each grid time (the bundle's metric).
    displacement_errors : ndarray, shape (T,)
        RMS displacement error over nodes and states, m.
    tolerance, validated_horizon : float or None
        From the manifest.
    seconds : dict
        Wall time of the runtime's forecast ("forecast") and of SciPy's integration of the
        full field ("scipy"), same states and times.
    evaluations, network_calls : int
        The forecast's state-steps through a network, and the batched calls that made them.
    """

    states: np.ndarray
    grid: np.ndarray
    truth: np.ndarray
    forecast: np.ndarray
    errors: np.ndarray
    displacement_errors: np.ndarray
    tolerance: float | None
    validated_horizon: float | None
    seconds: dict[str, float]
    evaluations: int
    network_calls: int

    def at(self, t: float) -> dict[str, float]:
        """Errors at the grid time nearest `t` (JSON-ready)."""
        index = int(np.argmin(np.abs(self.grid - t)))
        return {"t": float(self.grid[index]), "normalised_rms": float(self.errors[index]),
                "displacement_rms_m": float(self.displacement_errors[index])}

    def figures(self) -> dict[str, Any]:
        """The numbers the demo prints and records in report.json."""
        horizon = self.validated_horizon
        return {
            "states": len(self.states),
            "tolerance": self.tolerance,
            "validated_horizon": horizon,
            "at_validated_horizon": None if horizon is None else self.at(horizon),
            "at_longer_time": self.at(float(self.grid[-1])),
            "forecast_seconds": self.seconds["forecast"],
            "scipy_seconds": self.seconds["scipy"],
            "speedup": self.seconds["scipy"] / self.seconds["forecast"],
            "network_evaluations": self.evaluations,
            "network_calls": self.network_calls,
            "ground_truth": {"method": "scipy.integrate.ode dop853", **GROUND_TRUTH_TOLERANCE},
        }


def held_out_states(count: int) -> np.ndarray:
    """The example state followed by `count` − 1 random held-out states, shape (count, 2N)."""
    rng = np.random.default_rng(HELD_OUT_SEED)
    example = mooring.state_from_modes(np.array(EXAMPLE_AMPLITUDES),
                                       np.zeros(len(EXAMPLE_AMPLITUDES)))
    if count == 1:
        return example[None, :]
    return np.vstack([example, mooring.sample_initial_states(count - 1, rng)])


def ground_truth(states: np.ndarray, times: np.ndarray) -> np.ndarray:
    """SciPy DOP853 at the scenario's tolerances; shape (len(times), *states.shape)."""
    return mooring.simulate(states, times, **GROUND_TRUTH_TOLERANCE)


def normalised_rms(prediction: np.ndarray, truth: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """RMS over states and components of (prediction − truth) / scale; one value per time.

    The bundle's validation metric (`validation.metric`), with `scale` its `reference_std`.
    """
    difference = (prediction - truth) / scale
    return np.sqrt(np.mean(difference * difference, axis=tuple(range(1, difference.ndim))))


def evaluate(stepper: Stepper, settings: FieldSettings) -> FieldEvaluation:
    """Forecast held-out states with the runtime; compare with, and time against, SciPy."""
    states = held_out_states(settings.held_out_states)
    steps = round(settings.evaluation_horizon / BASE_STEP)
    grid = np.arange(steps + 1) * BASE_STEP
    started = time.perf_counter()
    truth = ground_truth(states, grid)
    scipy_seconds = time.perf_counter() - started
    forecast_seconds = math.inf
    for _ in range(3):  # the shortest of three: the machine is shared
        started = time.perf_counter()
        forecast, info = stepper.forecast_with_info(states, grid)
        forecast_seconds = min(forecast_seconds, time.perf_counter() - started)
    validation = stepper.manifest.validation
    if validation is not None:
        scale = np.asarray(validation.reference_std)
    else:  # a bundle without a validation block: the pooled scale of the truth itself
        scale = np.std(truth, axis=(0, 1))
    nodes = states.shape[1] // 2
    displacement = forecast[..., :nodes] - truth[..., :nodes]
    return FieldEvaluation(
        states=states, grid=grid, truth=truth, forecast=forecast,
        errors=normalised_rms(forecast, truth, scale),
        displacement_errors=np.sqrt(np.mean(displacement * displacement, axis=(1, 2))),
        tolerance=None if validation is None else validation.tolerance,
        validated_horizon=stepper.manifest.validated_horizon,
        seconds={"forecast": forecast_seconds, "scipy": scipy_seconds},
        evaluations=info.evaluations, network_calls=info.network_calls,
    )

