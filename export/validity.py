"""The validity contract: the deployed hierarchy's held-out error curve, its bootstrap upper
confidence bound, the validated horizon (first crossing of the tolerance by the bound), and how
rough dense forecasts are inside and beyond it.

The curve is measured on a grid of multiples of the finest stride. The held-out start states
are few and correlated (several starts per trajectory), so the point estimate crosses the
tolerance where fresh states exceed it about half the time; the horizon is therefore judged on
an upper `CONFIDENCE` bound (`upper_bound`), which is what the manifest's `validation` block
records (thinned to at most `MANIFEST_POINTS`, keeping the first crossing exact).
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .divergence import normalised_errors
from .evaluation import HeldOut, Levels, forecasts, json_number, rms_over_states

METRIC = "normalised_rms"
# Horizons of the dense grid: every multiple of the finest stride up to this many, otherwise
# a power-of-two multiple of it spaced evenly, so the first crossing is found to within
# 1/DENSE_POINTS of the held-out span.
DENSE_POINTS = 2048
# Points of the curve written to manifest.json (the manifest is capped at 1 MiB).
MANIFEST_POINTS = 256
# The upper confidence bound: one-sided level, bootstrap resamples, fixed seed (the bundle is
# reproducible). 95 % is common practice for a one-sided bound; 1000 resamples put the 95th
# percentile within about ±0.7 percentile points (binomial standard error √(.95·.05/1000)).
CONFIDENCE = 0.95
RESAMPLES = 1000
BOOTSTRAP_SEED = 0
# Resampling units: the held-out trajectories when there are at least MIN_TRAJECTORIES (start
# states of one trajectory are correlated, different trajectories much less); otherwise
# BLOCKS contiguous blocks of start states (a block bootstrap, common practice for one
# series), so a single long series still gets a bound.
MIN_TRAJECTORIES = 10
BLOCKS = 16


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
    state_errors : ndarray, shape (M, B)
        Normalised error of each start state's forecast (NaN: no truth; inf: diverged);
        `errors` is its RMS over states.
    """

    steps: np.ndarray
    errors: np.ndarray
    jump: np.ndarray
    reference_jump: np.ndarray
    excess: np.ndarray
    state_errors: np.ndarray


def dense_grid(longest: int, finest: int, points: int = DENSE_POINTS) -> np.ndarray:
    """Grid horizons (base steps) from `finest` to `longest`, spaced by finest · 2^j, at most
    `points` of them."""
    multiples = longest // finest
    if multiples < 1:
        return np.zeros(0, dtype=np.int64)
    # A power of two, so that with the usual stride ratios (2, 4, 8, ...) the grid hits every
    # multiple of the coarse strides, where the plans switch and dense forecasts jump.
    spacing = 1 << max(0, int(np.ceil(np.log2(multiples / points))))
    return np.arange(spacing, multiples + 1, spacing, dtype=np.int64) * finest


def dense_run(levels: Levels, held_out: HeldOut, steps: np.ndarray) -> DenseRun:
    """Forecast the held-out start states at `steps` and one finest stride before each."""
    finest = min(levels)
    targets = [int(n) for pair in zip(steps - finest, steps, strict=True) for n in pair]
    per_state, jump, reference, excess = [], [], [], []
    previous = None
    for chunk, states in forecasts(levels, held_out.initial, targets,
                                   reduction=held_out.reduction):
        for steps_here, predicted in zip(chunk, states, strict=True):
            if previous is None:
                previous = (steps_here, predicted)
                continue
            earlier_truth, _ = held_out.truth(previous[0])
            truth, valid = held_out.truth(steps_here)
            per_state.append(np.where(valid, normalised_errors(
                predicted, truth, np.ones(truth.shape[-1])), np.nan))
            jump.append(_largest_jump(predicted, previous[1], valid))
            reference.append(_largest_jump(truth, earlier_truth, valid))
            with np.errstate(over="ignore", invalid="ignore"):
                excess.append(_largest_jump(predicted - truth, previous[1] - earlier_truth,
                                            valid))
            previous = None
    per_state = np.asarray(per_state, dtype=np.float64).reshape(len(steps), len(held_out.start))
    return DenseRun(steps=np.asarray(steps, dtype=np.int64), errors=rms_over_states(per_state),
                    jump=np.asarray(jump), reference_jump=np.asarray(reference),
                    excess=np.asarray(excess), state_errors=per_state)


def _largest_jump(later: np.ndarray, earlier: np.ndarray, valid: np.ndarray) -> float:
    if not valid.any():
        return float("nan")
    with np.errstate(over="ignore", invalid="ignore"):
        size = np.sqrt(np.mean((later[valid].astype(np.float64) - earlier[valid]) ** 2, axis=1))
    return float(np.max(np.where(np.isfinite(size), size, np.inf)))


def resampling_units(held_out: HeldOut) -> tuple[np.ndarray, str]:
    """The bootstrap's resampling unit of each start state (B,) and how they were formed.

    The held-out trajectories when there are at least `MIN_TRAJECTORIES`; otherwise `BLOCKS`
    contiguous blocks of the start states in (trajectory, time) order (fewer when there are
    fewer starts).
    """
    count = len(held_out.start)
    if len(held_out.lengths) >= MIN_TRAJECTORIES:
        return held_out.trajectory.astype(np.int64), "trajectories"
    blocks = min(BLOCKS, count)
    # Start states are stored in (trajectory, time) order: array_split keeps blocks contiguous.
    units = np.concatenate([np.full(len(part), index, dtype=np.int64) for index, part in
                            enumerate(np.array_split(np.arange(count), blocks))])
    return units, "blocks of start states"


def upper_bound(state_errors: np.ndarray, units: np.ndarray, *, confidence: float = CONFIDENCE,
                resamples: int = RESAMPLES, seed: int = BOOTSTRAP_SEED) -> np.ndarray:
    """Pointwise upper confidence bound of the normalised RMS over states, by the percentile
    bootstrap over resampling units (common practice; Efron & Tibshirani 1993, ch. 13).

    Each resample draws as many units as there are, with replacement (one draw of unit
    indices per resample, shared by every time, so a resample is one alternative held-out
    set); at each time its figure is √(Σ squared state errors / number of states with truth)
    over the drawn units' states, inf if a drawn state diverged. The bound is the
    `confidence` quantile of the resampled figures (numpy's "higher" method: an actual
    resampled value, never interpolated, so inf stays inf), and never below the point estimate.
    Resamples that draw no state with truth at a time are left out there.

    Parameters
    ----------
    state_errors : ndarray, shape (M, B)
        Per-state normalised errors at M times (NaN: no truth; inf: diverged).
    units : ndarray of int, shape (B,)
        Resampling unit of each state, labels 0 … U − 1.
    confidence : float
        One-sided level in (0, 1).
    resamples : int
    seed : int

    Returns
    -------
    ndarray, shape (M,)
        NaN where no resample has a state with truth.
    """
    errors = np.asarray(state_errors, dtype=np.float64)
    count = int(units.max()) + 1 if len(units) else 0
    valid = ~np.isnan(errors)
    diverged = np.isinf(errors)
    squares = np.where(valid & ~diverged, errors, 0.0) ** 2
    # Per unit and time: sum of squares, states with truth, any divergence. Shapes (U, M).
    member = np.zeros((count, len(units)))
    member[units, np.arange(len(units))] = 1.0
    unit_squares, unit_valid = member @ squares.T, member @ valid.T
    unit_diverged = (member @ diverged.T) > 0
    rng = np.random.default_rng(seed)
    picks = rng.integers(0, count, size=(resamples, count))
    weights = np.zeros((resamples, count))
    np.add.at(weights, (np.repeat(np.arange(resamples), count), picks.ravel()), 1.0)
    total, states = weights @ unit_squares, weights @ unit_valid
    with np.errstate(invalid="ignore", divide="ignore"):
        values = np.sqrt(total / states)
    values = np.where((weights > 0) @ unit_diverged > 0, np.inf, values)
    values = np.where(states > 0, values, np.nan)
    with warnings.catch_warnings():
        # Times where no resample has truth give NaN (the "All-NaN slice" warning).
        warnings.simplefilter("ignore", RuntimeWarning)
        bound = np.nanquantile(values, confidence, axis=0, method="higher")
    point = rms_over_states(errors)
    return np.where(np.isnan(bound), bound, np.fmax(bound, point))


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
                reference_std: Sequence[float], errors: np.ndarray | None = None
                ) -> dict[str, Any]:
    """The manifest `validation` block (JSON-ready; errors null where diverged).

    `errors` (M,) is the curve written, by default `run.errors`; the trainer passes the
    upper bound (`upper_bound`), the curve its validated horizon is judged on.
    """
    errors = run.errors if errors is None else np.asarray(errors, dtype=np.float64)
    keep = manifest_indices(errors, tolerance)
    return {
        "metric": METRIC,
        "tolerance": float(tolerance),
        "reference_std": [float(v) for v in reference_std],
        "times": [float(n * base_step) for n in run.steps[keep]],
        "errors": [json_number(e) for e in errors[keep]],
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
