"""Everything the held-out trajectories say about trained levels, in one pass for the trainer:
level selection, the deployed hierarchy's error curve and validated horizon, dense roughness,
one-step errors, hierarchy against finest-only, and the forecast plot's data.

All figures are normalised RMS (see `evaluation`); `_physical` ones are in data units. For a
reduced model they are measured on the decoded full states.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

from . import selection, validity
from .errors import TrainingError
from .evaluation import (
    HeldOut,
    LatentBasis,
    Levels,
    decoded,
    error_curve,
    evaluations,
    forecasts,
    json_number,
    prepare_held_out,
)
from .trained import ForecastExample

logger = logging.getLogger(__name__)
# The hierarchy-against-finest-only table: a geometric ladder of about this many horizons
# from the finest stride to the held-out span, plus every stride.
HORIZON_RUNGS = 8
# Points of the forecast plot.
PLOT_POINTS = 200


@dataclass(frozen=True)
class Validation:
    """The outcome of `validate`.

    Attributes
    ----------
    strides : tuple of int
        The levels to deploy.
    figures : dict
        JSON-ready figures for `TrainedLevels.validation` and report.json.
    curve : dict
        The manifest `validation` block.
    example : ForecastExample or None
        Data for the forecast plot.
    """

    strides: tuple[int, ...]
    figures: dict[str, Any]
    curve: dict[str, Any]
    example: ForecastExample | None


def ladder(longest: int, strides: Sequence[int]) -> list[int]:
    """Table horizons in base steps: multiples of the finest stride within the data."""
    finest = min(strides)
    last = longest // finest * finest
    if last < finest:
        return []
    rungs = np.geomspace(finest, last, HORIZON_RUNGS)
    values = {int(v) // finest * finest for v in rungs} | {s for s in strides if s <= last}
    return sorted(v for v in values | {last} if v >= finest)


def validate(levels: Levels, held_out: Sequence[torch.Tensor], *, base_step: float,
             mean: np.ndarray, scale: np.ndarray, tolerance: float, horizon: float | None,
             keep_all_levels: bool, reduction: LatentBasis | None = None) -> Validation:
    """Select levels, measure the deployed hierarchy, and gather the report's figures.

    Parameters
    ----------
    levels : mapping of int to module
        Every trained level (increment networks on normalised states).
    held_out : list of torch.Tensor, each (T_i, d), float32
        Normalised held-out trajectories (lengths may differ).
    base_step : float
    mean, scale : ndarray, shape (d,)
        The training split's normalisation; `scale` is the metric's `reference_std`.
    tolerance : float
        Normalised RMS the validated horizon keeps to.
    horizon : float or None
        Longest horizon (time units) the selection scores; None: the held-out span.
    keep_all_levels : bool
        Skip the selection.
    reduction : LatentBasis, optional
        The levels step latent states: forecasts start from encoded held-out states and are
        decoded before every error is taken.
    """
    strides = tuple(sorted(levels))
    finest = strides[0]
    data = prepare_held_out(held_out, reduction=reduction)
    if data.longest < finest:
        raise TrainingError(
            f"the held-out trajectories span {data.longest} base steps, less than the finest "
            f"stride {finest}; hold out more (`validation_fraction`) or longer trajectories."
        )
    horizon_steps, clipped = selection.horizon_in_steps(
        horizon, base_step=base_step, finest=finest, longest=data.longest)
    if clipped:
        logger.warning("`horizon` %s is longer than the held-out trajectories; level selection "
                       "scores up to their span, %s", horizon, horizon_steps * base_step)
    chosen = None
    if keep_all_levels:
        kept = strides
    else:
        chosen = selection.select_levels(levels, data, horizon_steps)
        kept = chosen.kept
        logger.info("level selection (%s, %d subsets): kept strides %s", chosen.method,
                    len(chosen.candidates), list(kept))
    deployed = {stride: levels[stride] for stride in kept}

    run = validity.dense_run(deployed, data, validity.dense_grid(data.longest, finest))
    units, unit_kind = validity.resampling_units(data)
    bound = validity.upper_bound(run.state_errors, units)
    # The manifest curve is the upper bound: `expected_error` then answers conservatively and
    # the contract's first-crossing rule on the manifest gives the horizon judged here.
    curve = validity.curve_block(run, base_step=base_step, tolerance=tolerance,
                                 reference_std=scale, errors=bound)
    horizon_time = validity.validated_horizon(curve["times"], curve["errors"], tolerance)
    horizon_steps_valid = round(horizon_time / base_step) if horizon_time else 0
    figures = {
        "metric": validity.METRIC,
        "units": "normalised RMS: error / training standard deviation per component, RMS over "
                 "components and start states",
        "tolerance": tolerance,
        "validated_horizon": horizon_time,
        "at_validated_horizon": _at_horizon(run, bound, horizon_steps_valid),
        "strides": list(kept),
        "trained_strides": list(strides),
        "horizon_requested": horizon,
        "horizon_used": horizon_steps * base_step,
        "held_out_trajectories": len(held_out),
        "held_out_samples": [int(n) for n in data.lengths],
        "start_states": len(data.start),
        "selection": None if chosen is None else chosen.to_dict(base_step),
        "curve": {"times": [float(n * base_step) for n in run.steps],
                  "errors": [json_number(e) for e in run.errors],
                  "upper_bound": [json_number(e) for e in bound],
                  "bound": {"confidence": validity.CONFIDENCE,
                            "method": "percentile bootstrap, pointwise, one-sided",
                            "resampled": unit_kind,
                            "units": int(units.max()) + 1,
                            "resamples": validity.RESAMPLES,
                            "seed": validity.BOOTSTRAP_SEED},
                  "horizon_rule": "first crossing of the tolerance by upper_bound"},
        "dense": {"finest_stride": finest,
                  **validity.roughness(run, horizon_steps_valid)},
        "one_step": _one_step(levels, data, scale),
        "horizons": _comparison(deployed, data, base_step),
    }
    figures["summary"] = _summary(figures, chosen, base_step)
    example = forecast_example(deployed, held_out[0], base_step=base_step, mean=mean,
                               scale=scale, reduction=reduction)
    return Validation(strides=kept, figures=figures, curve=curve, example=example)


def _at_horizon(run: validity.DenseRun, bound: np.ndarray, steps: int
                ) -> dict[str, Any] | None:
    """The held-out error (point estimate) and its upper bound at the validated horizon."""
    where = np.flatnonzero(run.steps == steps)
    if len(where) == 0:
        return None
    return {"estimate": json_number(run.errors[where[0]]),
            "upper_bound": json_number(bound[where[0]])}


def _one_step(levels: Levels, data: HeldOut, scale: np.ndarray) -> list[dict[str, Any]]:
    """Per trained level: RMS of one step from every held-out sample that has a successor."""
    rows = []
    for stride in sorted(levels):
        firsts = [data.offsets[i] + np.arange(n - stride)
                  for i, n in enumerate(data.lengths) if n > stride]
        if not firsts:
            rows.append({"stride": stride, "rmse": None, "rmse_physical": None})
            continue
        first = np.concatenate(firsts)
        initial = data.flat[first]
        if data.reduction is not None:
            initial = data.reduction.encode(initial).astype(np.float32)
        with torch.no_grad():
            start = torch.from_numpy(np.ascontiguousarray(initial))
            predicted = (start + levels[stride](start)).numpy()
        if data.reduction is not None:
            predicted = decoded(data.reduction, predicted)
        error = predicted.astype(np.float64) - data.flat[first + stride]
        per_component = np.sqrt(np.mean(error**2, axis=0))
        rows.append({"stride": stride, "rmse": json_number(float(np.sqrt(np.mean(error**2)))),
                     "rmse_physical": [json_number(v) for v in per_component * scale]})
    return rows


def _comparison(levels: Levels, data: HeldOut, base_step: float) -> list[dict[str, Any]]:
    """The deployed hierarchy against the finest level alone, on the table ladder."""
    strides = sorted(levels)
    finest = strides[0]
    steps = ladder(data.longest, strides)
    hierarchical = error_curve(levels, data, steps)
    finest_only = error_curve({finest: levels[finest]}, data, steps)
    rows = []
    for index, n in enumerate(steps):
        _, valid = data.truth(n)
        rows.append({
            "base_steps": n, "time": n * base_step,
            "evaluations": evaluations(levels, [n]),
            "hierarchical_rmse": json_number(hierarchical[index]),
            "finest_only_evaluations": n // finest,
            "finest_only_rmse": json_number(finest_only[index]),
            "start_states": int(valid.sum()),
        })
    return rows


def _summary(figures: dict[str, Any], chosen: selection.Selection | None,
             base_step: float) -> dict[str, Any]:
    """What the trainer prints: levels kept and why, the horizon, hierarchy vs finest-only."""
    if chosen is None:
        why = "all levels kept on request (keep_all_levels)"
    else:
        by_strides = {tuple(c.strides): c for c in chosen.candidates}
        best = by_strides[chosen.kept]
        alone = by_strides.get((min(chosen.kept),))
        eligible = sum(chosen.eligible(c) for c in chosen.candidates)
        why = (f"lowest held-out score of the {eligible} of {len(chosen.candidates)} subsets "
               f"({chosen.method}) whose median time to divergence is at least the finest "
               f"level's alone: {best.score:.3f}, median {best.median_divergence * base_step:.4g}"
               + ("" if alone is None else
                  f" (finest level alone: {alone.score:.3f}, median "
                  f"{alone.median_divergence * base_step:.4g})"))
    rows = [row for row in figures["horizons"] if row["time"] <= figures["horizon_used"] + 1e-9]
    last = rows[-1] if rows else None
    return {
        "kept": figures["strides"], "why": why,
        "tolerance": figures["tolerance"], "validated_horizon": figures["validated_horizon"],
        "at_horizon": None if last is None else {
            "time": last["time"], "hierarchical": last["hierarchical_rmse"],
            "finest_only": last["finest_only_rmse"]},
    }


def forecast_example(levels: Levels, trajectory: torch.Tensor, *, base_step: float,
                     mean: np.ndarray, scale: np.ndarray,
                     reduction: LatentBasis | None = None) -> ForecastExample | None:
    """Hierarchical and finest-only forecasts of one normalised trajectory (T, d) from t = 0
    (through the latent space with `reduction`)."""
    finest = min(levels)
    longest = (trajectory.shape[0] - 1) // finest * finest
    if longest < finest:
        return None
    grid = np.unique(np.linspace(0, longest // finest, PLOT_POINTS).round().astype(np.int64))
    targets = (grid * finest).tolist()
    initial = trajectory[:1].numpy()
    hierarchical = np.concatenate(
        [s for _, s in forecasts(levels, initial, targets, reduction=reduction)])[:, 0]
    alone = {finest: levels[finest]}
    finest_only = np.concatenate(
        [s for _, s in forecasts(alone, initial, targets, reduction=reduction)])[:, 0]

    def physical(values: np.ndarray) -> np.ndarray:
        return values.astype(np.float64) * scale + mean

    return ForecastExample(times=grid * finest * base_step,
                           truth=physical(trajectory.numpy()[grid * finest]),
                           hierarchical=physical(hierarchical), finest_only=physical(finest_only))
