"""Train, export and judge a hierarchy on a published system, as a practitioner would.

Data: many short trajectories from states on the attractor (after the transient), reference
accuracy DOP853 rtol 1e-10 (`systems.py`). `train_levels` runs with its default settings
except the sizes in `Scale`; the bundle is exported, loaded by the NumPy runtime, and judged
on initial states from an independent orbit: median time to divergence (`divergence.py`) of
the deployed hierarchy against the finest level alone, the error at the bundle's validated
horizon against its tolerance, and whether `ExtrapolationWarning` fires past the horizon and
for a state far from the data.
"""

from __future__ import annotations

import math
import time
import warnings
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .divergence import (
    DIVERGENCE_THRESHOLD,
    bootstrap_interval,
    divergence_times,
    normalised_rms,
)
from .systems import PublishedSystem, attractor_states, trajectories

# The contract's default tolerance, used when a bundle records none (older exporters).
DEFAULT_TOLERANCE = 0.1
# Forecast times per evaluation (the divergence time resolution is horizon / this).
EVALUATION_POINTS = 400


@dataclass(frozen=True)
class Scale:
    """Sizes of one experiment.

    Attributes
    ----------
    trajectories : int
        Training trajectories (the trainer holds some out for its own validation).
    samples : int
        Samples per training trajectory.
    hidden : tuple of int or None
        Hidden widths; None keeps `train_levels`' default.
    epochs : int or None
        None keeps `train_levels`' default.
    test_states : int
        Initial states of the independent test orbit.
    lyapunov_times : float
        How far test forecasts run, in Lyapunov times.
    spacing : float
        Time between successive start states taken from an orbit.
    """

    trajectories: int
    samples: int
    hidden: tuple[int, ...] | None
    epochs: int | None
    test_states: int
    lyapunov_times: float
    spacing: float


@dataclass
class Outcome:
    """What one experiment measured (JSON-ready through `dataclasses.asdict`)."""

    system: str
    lyapunov_exponent: float
    lyapunov_time: float
    strides_trained: list[int]
    strides_kept: list[int]
    tolerance: float
    validated_horizon: float | None
    error_at_horizon: float | None
    bundle_error_at_horizon: float | None
    error_at_horizon_interval: tuple[float, float] | None
    median_divergence_hierarchy: float
    median_divergence_finest: float
    warned_past_horizon: bool
    warned_far_state: bool
    far_state_distance: float
    warned_inside: bool
    warning_messages: list[str] = field(default_factory=list)
    selection_scores: dict[str, float | None] = field(default_factory=dict)
    # The trainer's median held-out time to divergence of every subset tried (time units).
    selection_medians: dict[str, float | None] = field(default_factory=dict)
    seconds: dict[str, float] = field(default_factory=dict)

    def summary(self) -> str:
        """The figures the requirements are about, on one line."""
        def number(value: float | None) -> str:
            return "none" if value is None else f"{value:.4g}"

        return (f"{self.system}: kept {self.strides_kept} of {self.strides_trained}; median "
                f"divergence {self.median_divergence_hierarchy:.3f} (hierarchy) vs "
                f"{self.median_divergence_finest:.3f} (finest only) Lyapunov times; validated "
                f"horizon {number(self.validated_horizon)}, error there "
                f"{number(self.error_at_horizon)} on test states (90 % bootstrap interval "
                f"{self.error_at_horizon_interval}) and "
                f"{number(self.bundle_error_at_horizon)} by the bundle, tolerance "
                f"{self.tolerance}; warned past horizon {self.warned_past_horizon}, far state "
                f"{self.warned_far_state} (distance {self.far_state_distance:.3g})")

    @property
    def hierarchy_holds(self) -> bool:
        return self.median_divergence_hierarchy >= self.median_divergence_finest

    @property
    def horizon_holds(self) -> bool:
        return self.error_at_horizon is not None and self.error_at_horizon <= self.tolerance


def training_data(system: PublishedSystem, scale: Scale, *, seed: int) -> np.ndarray:
    """Training trajectories (N, T, d) from states spaced along one orbit on the attractor."""
    starts = attractor_states(system, scale.trajectories, spacing=scale.spacing, seed=seed)
    return trajectories(system, starts, scale.samples)


def test_data(system: PublishedSystem, scale: Scale, lyapunov_time: float, *,
              seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Times (K,) on the finest grid and true states (K, M, d) from an independent orbit."""
    finest = min(system.strides)
    grid_step = finest * system.base_step
    last = max(1, math.ceil(scale.lyapunov_times * lyapunov_time / grid_step))
    grid = np.unique(np.linspace(0, last, EVALUATION_POINTS + 1).round().astype(np.int64))
    starts = attractor_states(system, scale.test_states, spacing=scale.spacing, seed=seed)
    truth = trajectories(system, starts, int(grid[-1]) * finest + 1)
    return grid * grid_step, truth[:, grid * finest].transpose(1, 0, 2)


def tolerance_of(stepper: Any) -> float:
    """The bundle's tolerance (the contract's default when it records no validation)."""
    validation = stepper.manifest.validation
    return DEFAULT_TOLERANCE if validation is None else float(validation.tolerance)


def far_state(train: np.ndarray) -> tuple[np.ndarray, float]:
    """A state inside the training box but far from the data, with its distance in units of
    the training standard deviation to the nearest training state.

    Candidates: the corners of the training box shrunk by 10 % towards its centre (inside
    the box, so a min/max check alone would not flag them); the one farthest from the data.
    """
    flat = train.reshape(-1, train.shape[-1])
    low, high = flat.min(axis=0), flat.max(axis=0)
    centre, half = (low + high) / 2, 0.9 * (high - low) / 2
    dim = flat.shape[1]
    rng = np.random.default_rng(0)
    signs = rng.choice([-1.0, 1.0], size=(min(2**dim, 256), dim))
    candidates = centre + signs * half
    std = flat.std(axis=0)
    sample = flat[:: max(1, len(flat) // 20000)] / std
    distances = np.array([np.min(np.linalg.norm(sample - c / std, axis=1))
                          for c in candidates])
    best = int(np.argmax(distances))
    return candidates[best], float(distances[best])


def _warnings_of(call) -> list[str]:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        call()
    return [f"{w.category.__name__}: {w.message}" for w in caught
            if w.category.__name__ == "ExtrapolationWarning"]


def run(system: PublishedSystem, scale: Scale, workdir: Path, *, lyapunov_exponent: float,
        seed: int = 0, train_options: dict[str, Any] | None = None) -> Outcome:
    """One experiment: data, training (defaults except `scale`), export, load, judgement."""
    from stridecast.export import export_bundle, train_levels
    from stridecast.runtime import load

    seconds = {}
    started = time.perf_counter()
    train = training_data(system, scale, seed=seed)
    lyapunov_time = 1.0 / lyapunov_exponent
    times, truth = test_data(system, scale, lyapunov_time, seed=seed + 1000)
    seconds["data"] = time.perf_counter() - started

    options = dict(train_options or {})
    if scale.hidden is not None:
        options["hidden"] = scale.hidden
    if scale.epochs is not None:
        options["epochs"] = scale.epochs
    started = time.perf_counter()
    trained = train_levels(train, base_step=system.base_step, strides=system.strides,
                           state_names=system.state_names, progress=False, seed=seed,
                           **options)
    seconds["training"] = time.perf_counter() - started
    started = time.perf_counter()
    bundle = export_bundle(trained, workdir / f"{system.name}.bundle", name=system.name,
                           overwrite=True)
    stepper = load(bundle)
    finest = stepper.with_levels((min(stepper.strides),))
    seconds["export"] = time.perf_counter() - started

    started = time.perf_counter()
    # The metric's reference: the bundle's own (the training split's std) when it has one.
    validation = stepper.manifest.validation
    reference_std = (train.reshape(-1, system.dim).std(axis=0) if validation is None
                     else np.asarray(validation.reference_std, dtype=np.float64))
    initial = truth[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        deployed = stepper.forecast(initial, times)
        alone = finest.forecast(initial, times)
    hierarchy_times = divergence_times(deployed, truth, times, reference_std)
    finest_times = divergence_times(alone, truth, times, reference_std)
    seconds["forecasts"] = time.perf_counter() - started

    horizon = stepper.manifest.validated_horizon
    tolerance = tolerance_of(stepper)
    error_at_horizon, interval = None, None
    if horizon is not None:
        index = int(np.argmin(np.abs(times - horizon)))
        if horizon > 0 and not math.isclose(times[index], horizon, rel_tol=1e-6):
            # The horizon is off the evaluation grid: forecast it directly.
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                exact = stepper.advance(initial, horizon)
            true_state = trajectories(system, initial, _grid_samples(horizon, system))[:, -1]
        else:
            exact, true_state = deployed[index], truth[index]
        error_at_horizon = normalised_rms(exact, true_state, reference_std)
        interval = bootstrap_interval(exact, true_state, reference_std)

    past = 2.0 * horizon if horizon else 2.0 * times[-1]
    state, distance = far_state(train)
    past_messages = _warnings_of(lambda: stepper.advance(initial[:4], past))
    far_messages = _warnings_of(lambda: stepper.advance(state, system.base_step * min(
        system.strides)))
    inside_messages = _warnings_of(lambda: stepper.advance(initial[:4], 0.5 * horizon)) \
        if horizon else []
    return Outcome(
        system=system.name, lyapunov_exponent=lyapunov_exponent, lyapunov_time=lyapunov_time,
        strides_trained=list(system.strides), strides_kept=list(stepper.strides),
        tolerance=tolerance, validated_horizon=horizon, error_at_horizon=error_at_horizon,
        error_at_horizon_interval=interval,
        bundle_error_at_horizon=None if horizon is None else float(
            stepper.expected_error(horizon)),
        median_divergence_hierarchy=float(np.median(hierarchy_times)) / lyapunov_time,
        median_divergence_finest=float(np.median(finest_times)) / lyapunov_time,
        warned_past_horizon=bool(past_messages), warned_far_state=bool(far_messages),
        far_state_distance=distance, warned_inside=bool(inside_messages),
        warning_messages=past_messages[:1] + far_messages[:1] + inside_messages[:1],
        seconds={key: round(value, 2) for key, value in seconds.items()},
        selection_scores=_selection_figures(trained.validation, "score"),
        selection_medians=_selection_figures(trained.validation, "median_divergence_time"),
    )


def _selection_figures(validation: Any, key: str) -> dict[str, float | None]:
    """One figure of every level subset the trainer tried ("1,4" -> value): its "score"
    (lower is better) or "median_divergence_time"."""
    selection = (validation or {}).get("selection") or {}
    return {",".join(map(str, c["strides"])): c.get(key)
            for c in selection.get("candidates", [])}


def _grid_samples(t: float, system: PublishedSystem) -> int:
    """Samples of a reference trajectory whose last sample lies at `t` (a base-step multiple)."""
    return round(t / system.base_step) + 1


def outcome_json(outcome: Outcome) -> dict[str, Any]:
    return {**asdict(outcome), "hierarchy_holds": outcome.hierarchy_holds,
            "horizon_holds": outcome.horizon_holds, "threshold": DIVERGENCE_THRESHOLD}
