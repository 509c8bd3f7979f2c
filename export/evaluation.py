"""Held-out figures for the manifest and report: one-step errors per level, hierarchical
forecast errors against the finest-level-only rollout, and optional level selection.

Hierarchical forecasts follow the runtime's own planner, so the figures describe the plans the
deployed bundle will run. All errors are RMSE in normalised units unless named `_physical`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import torch

from stridecast.runtime.planner import StridePlanner

from .trained import ForecastExample

# Horizons are a geometric ladder of about this many rungs from the finest stride to the
# longest held-out span, plus every stride.
HORIZON_RUNGS = 8
# Start states per held-out trajectory and horizon.
STARTS_PER_TRAJECTORY = 8
# Points of the forecast plot.
PLOT_POINTS = 200

Levels = Mapping[int, torch.nn.Module]


def advance(levels: Levels, states: torch.Tensor, plan: Sequence[tuple[int, int]]
            ) -> torch.Tensor:
    """Apply a ((stride, count), ...) plan, coarse first, to normalised states (B, d)."""
    with torch.no_grad():
        for stride, count in plan:
            for _ in range(count):
                states = states + levels[stride](states)
    return states


def horizons(held_out_steps: int, strides: Sequence[int]) -> list[int]:
    """Validation horizons in base steps: multiples of the finest stride within the data."""
    finest = min(strides)
    longest = ((held_out_steps - 1) // finest) * finest
    if longest < finest:
        return []
    ladder = np.geomspace(finest, longest, HORIZON_RUNGS)
    values = {int(v) // finest * finest for v in ladder} | {s for s in strides if s <= longest}
    return sorted(v for v in values | {longest} if v >= finest)


def _starts(held_out_steps: int, horizon: int) -> np.ndarray:
    room = held_out_steps - 1 - horizon
    count = min(STARTS_PER_TRAJECTORY, room + 1)
    return np.unique(np.linspace(0, room, count).round().astype(np.int64))


def _horizon_batch(held_out: torch.Tensor, horizon: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Start states and the true states `horizon` base steps later, over all trajectories."""
    starts = torch.from_numpy(_starts(held_out.shape[1], horizon))
    initial = held_out[:, starts].reshape(-1, held_out.shape[2])
    final = held_out[:, starts + horizon].reshape(-1, held_out.shape[2])
    return initial, final


def _rmse(prediction: torch.Tensor, truth: torch.Tensor) -> float:
    """RMSE over states and components; +inf when a forecast diverged (NaN or overflow)."""
    value = float(torch.sqrt(torch.mean((prediction.double() - truth.double()) ** 2)))
    return value if np.isfinite(value) else float("inf")


def _json_number(value: float) -> float | None:
    """JSON has no infinity: a diverged forecast is recorded as null."""
    return value if np.isfinite(value) else None


def hierarchical_errors(levels: Levels, held_out: torch.Tensor, steps: Sequence[int]
                        ) -> list[float]:
    """Hierarchical RMSE at each horizon in `steps`, using only the levels in `levels`."""
    planner = StridePlanner(levels)
    errors = []
    for horizon in steps:
        initial, final = _horizon_batch(held_out, horizon)
        errors.append(_rmse(advance(levels, initial, planner.steps(horizon)), final))
    return errors


def held_out_figures(levels: Levels, held_out: torch.Tensor, *, base_step: float,
                     scale: np.ndarray) -> dict[str, Any]:
    """Validation figures (JSON-ready) on normalised held-out trajectories (N, T, d)."""
    strides = sorted(levels)
    finest = strides[0]
    planner = StridePlanner(strides)
    one_step = []
    for stride in strides:
        if held_out.shape[1] <= stride:
            one_step.append({"stride": stride, "rmse": None, "rmse_physical": None})
            continue
        initial = held_out[:, :-stride].reshape(-1, held_out.shape[2])
        truth = held_out[:, stride:].reshape(-1, held_out.shape[2])
        with torch.no_grad():
            error = (initial + levels[stride](initial)).double() - truth.double()
        per_component = torch.sqrt(torch.mean(error**2, dim=0)).numpy()
        one_step.append({
            "stride": stride, "rmse": _json_number(float(torch.sqrt(torch.mean(error**2)))),
            "rmse_physical": [_json_number(float(v)) for v in per_component * scale]})
    rows = []
    for horizon in horizons(held_out.shape[1], strides):
        initial, final = _horizon_batch(held_out, horizon)
        plan = planner.steps(horizon)
        rows.append({
            "base_steps": horizon,
            "time": horizon * base_step,
            "plan": [list(step) for step in plan],
            "evaluations": sum(count for _, count in plan),
            "hierarchical_rmse": _json_number(_rmse(advance(levels, initial, plan), final)),
            "finest_only_evaluations": horizon // finest,
            "finest_only_rmse": _json_number(
                _rmse(advance(levels, initial, [(finest, horizon // finest)]), final)),
            "start_states": int(initial.shape[0]),
        })
    finite = [row["time"] for row in rows if row["hierarchical_rmse"] is not None]
    return {
        "units": "RMSE in normalised units (z = (x - mean) / scale)",
        "held_out_trajectories": int(held_out.shape[0]),
        "held_out_samples": int(held_out.shape[1]),
        "one_step": one_step,
        "horizons": rows,
        "validated_horizon": max(finite) if finite else None,
    }


def select_levels(levels: Levels, held_out: torch.Tensor) -> tuple[tuple[int, ...], list[dict]]:
    """Drop coarse levels whose inclusion makes the held-out hierarchical error worse.

    Backward elimination, coarsest first; the finest level always stays (it makes every
    multiple of the finest stride reachable). The score is the mean hierarchical RMSE over
    the validation horizons.
    """
    strides = sorted(levels)
    steps = horizons(held_out.shape[1], strides)
    kept = list(strides)
    decisions = []
    if not steps:
        return tuple(kept), decisions
    def score(subset: list[int]) -> float:
        return float(np.mean(hierarchical_errors({s: levels[s] for s in subset}, held_out,
                                                 steps)))

    current = score(kept)
    for stride in reversed(strides[1:]):
        without = [s for s in kept if s != stride]
        candidate = score(without)
        keep = not candidate < current  # a diverged score is +inf, so it never wins
        decisions.append({"stride": stride, "mean_rmse_with": _json_number(current),
                          "mean_rmse_without": _json_number(candidate), "kept": keep})
        if not keep:
            kept, current = without, candidate
    return tuple(kept), decisions


def forecast_example(levels: Levels, trajectory: torch.Tensor, *, base_step: float,
                     mean: np.ndarray, scale: np.ndarray) -> ForecastExample | None:
    """Hierarchical and finest-only forecasts of one normalised trajectory (T, d) from t = 0."""
    strides = sorted(levels)
    finest = strides[0]
    longest = ((trajectory.shape[0] - 1) // finest) * finest
    if longest < finest:
        return None
    planner = StridePlanner(strides)
    grid = np.unique(np.linspace(0, longest // finest, PLOT_POINTS).round().astype(np.int64))
    targets = grid * finest
    initial = trajectory[:1]
    hierarchical = torch.cat([advance(levels, initial, planner.steps(int(n))) for n in targets])
    rollout, state = [initial], initial
    for _ in range(int(grid[-1])):
        state = advance(levels, state, [(finest, 1)])
        rollout.append(state)
    finest_only = torch.cat(rollout)[torch.from_numpy(grid)]

    def physical(values: torch.Tensor) -> np.ndarray:
        return values.double().numpy() * scale + mean

    return ForecastExample(times=targets * base_step, truth=physical(trajectory[targets]),
                           hierarchical=physical(hierarchical),
                           finest_only=physical(finest_only))
