"""The validity contract: the deployed hierarchy's held-out error curve, the validated horizon
(first crossing of the tolerance), and how rough dense forecasts are inside and beyond it.

The curve is measured on a grid of multiples of the finest stride and written to the manifest's
`validation` block (thinned to at most `MANIFEST_POINTS`, keeping the first crossing exact).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .evaluation import HeldOut, Levels, forecasts, json_number, normalised_rms

METRIC = "normalised_rms"
# Horizons of the dense grid: every multiple of the finest stride up to this many, otherwise
# a power-of-two multiple of it spaced evenly, so the first crossing is found to within
# 1/DENSE_POINTS of the held-out span.
DENSE_POINTS = 2048
# Points of the curve written to manifest.json (the manifest is capped at 1 MiB).
MANIFEST_POINTS = 256


@dataclass(frozen=True)
class DenseRun:
    """Errors and dense jumps of one hierarchy on the grid, all in normalised units.

    Attributes
    ----------
    steps : ndarray of int64, shape (M,)
        Grid horizons in base steps (multiples of the finest stride, ascending).
    errors : ndarray, shape (M,)
        Normalised RMS at each horizon (inf: diverged).
    jump, reference_jump : ndarray, shape (M,)
        Largest jump, over the start states, between the forecasts at steps − finest and steps
        (RMS over components), and the same for the held-out truth on the same states.
    excess : ndarray, shape (M,)
        Largest, over the start states, of the part of the forecast's jump the truth does not
        make: |Δforecast − Δtruth| = |error(steps) − error(steps − finest)|, RMS over
        components. Where the plans of neighbouring times differ, this is the mismatch of the
        two plans.
    """

    steps: np.ndarray
    errors: np.ndarray
    jump: np.ndarray
    reference_jump: np.ndarray
    excess: np.ndarray


def dense_grid(longest: int, finest: int) -> np.ndarray:
    """Grid horizons (base steps) from `finest` to `longest`, spaced by finest · 2^j."""
    multiples = longest // finest
    if multiples < 1:
        return np.zeros(0, dtype=np.int64)
    # A power of two, so that with the usual stride ratios (2, 4, 8, ...) the grid hits every
    # multiple of the coarse strides, where the plans switch and dense forecasts jump.
    spacing = 1 << max(0, int(np.ceil(np.log2(multiples / DENSE_POINTS))))
    return np.arange(spacing, multiples + 1, spacing, dtype=np.int64) * finest


def dense_run(levels: Levels, held_out: HeldOut, steps: np.ndarray) -> DenseRun:
    """Forecast the held-out start states at `steps` and one finest stride before each."""
    finest = min(levels)
    targets = [int(n) for pair in zip(steps - finest, steps, strict=True) for n in pair]
    errors, jump, reference, excess = [], [], [], []
    previous = None
    for chunk, states in forecasts(levels, held_out.initial, targets):
        for steps_here, predicted in zip(chunk, states, strict=True):
            if previous is None:
                previous = (steps_here, predicted)
                continue
            earlier_truth, _ = held_out.truth(previous[0])
            truth, valid = held_out.truth(steps_here)
            errors.append(normalised_rms(predicted, truth, valid))
            jump.append(_largest_jump(predicted, previous[1], valid))
            reference.append(_largest_jump(truth, earlier_truth, valid))
            with np.errstate(over="ignore", invalid="ignore"):
                excess.append(_largest_jump(predicted - truth, previous[1] - earlier_truth,
                                            valid))
            previous = None
    return DenseRun(steps=np.asarray(steps, dtype=np.int64), errors=np.asarray(errors),
                    jump=np.asarray(jump), reference_jump=np.asarray(reference),
                    excess=np.asarray(excess))


def _largest_jump(later: np.ndarray, earlier: np.ndarray, valid: np.ndarray) -> float:
    if not valid.any():
        return float("nan")
    with np.errstate(over="ignore", invalid="ignore"):
        size = np.sqrt(np.mean((later[valid].astype(np.float64) - earlier[valid]) ** 2, axis=1))
    return float(np.max(np.where(np.isfinite(size), size, np.inf)))


def validated_horizon(times: Sequence[float], errors: Sequence[float], tolerance: float
                      ) -> float | None:
    """The longest time t in `times` with every error at or before t within `tolerance`.

    The first crossing counts (conservative): later points back under the tolerance do not
    extend it. 0.0 when the first point already exceeds; None without points. A NaN or
    infinite error counts as exceeding.
    """
    horizon = None
    for time, error in zip(times, errors, strict=True):
        if not (error is not None and np.isfinite(error) and error <= tolerance):
            return 0.0 if horizon is None else horizon
        horizon = float(time)
    return horizon


def manifest_indices(errors: np.ndarray, tolerance: float, limit: int = MANIFEST_POINTS
                     ) -> np.ndarray:
    """Indices of the curve points kept in the manifest: all, or a spread that keeps the last
    point within the tolerance and the first one beyond it, so the rule gives the same
    validated horizon on the thinned curve."""
    count = len(errors)
    if count <= limit:
        return np.arange(count)
    exceeds = ~(np.isfinite(errors) & (errors <= tolerance))
    crossing = int(np.argmax(exceeds)) if exceeds.any() else count
    # Half log-spaced (short horizons, where errors grow from 0) and half linear.
    spread = np.concatenate((np.geomspace(1, count, limit // 2), np.linspace(1, count, limit // 2)))
    keep = set((spread.round().astype(np.int64) - 1).tolist())
    keep |= {i for i in (crossing - 1, crossing) if 0 <= i < count}
    # Every point before `crossing` is within the tolerance, so the thinned curve's first
    # crossing is the same point and the validated horizon the same time.
    return np.array(sorted(keep), dtype=np.int64)


def curve_block(run: DenseRun, *, base_step: float, tolerance: float,
                reference_std: Sequence[float]) -> dict[str, Any]:
    """The manifest `validation` block (JSON-ready; errors null where diverged)."""
    keep = manifest_indices(run.errors, tolerance)
    return {
        "metric": METRIC,
        "tolerance": float(tolerance),
        "reference_std": [float(v) for v in reference_std],
        "times": [float(n * base_step) for n in run.steps[keep]],
        "errors": [json_number(e) for e in run.errors[keep]],
    }


def roughness(run: DenseRun, horizon_steps: float) -> dict[str, Any]:
    """Largest dense jumps against the held-out data's, inside and beyond the horizon."""
    inside = run.steps <= horizon_steps

    def region(mask: np.ndarray) -> dict[str, Any] | None:
        jumps = run.jump[mask]
        reference = run.reference_jump[mask]
        known = ~np.isnan(jumps) & ~np.isnan(reference)
        if not known.any():
            return None
        jumps, reference = jumps[known], reference[known]
        steps = run.steps[mask][known]
        excess = run.excess[mask][known]
        worst = int(np.argmax(np.where(np.isnan(jumps), np.inf, jumps)))
        largest, reference_largest = float(jumps[worst]), float(reference.max())
        return {
            "largest_jump": json_number(largest),
            "at_base_steps": int(steps[worst]),
            "reference_largest_jump": json_number(reference_largest),
            "ratio": json_number(largest / reference_largest) if reference_largest > 0
            else None,
            "largest_excess": json_number(float(np.max(np.where(np.isnan(excess), np.inf,
                                                                excess)))),
            "pairs": int(known.sum()),
        }

    return {"inside": region(inside), "beyond": region(~inside)}
