"""Held-out forecasts run exactly as the runtime runs them, and their normalised RMS errors.

Forecasts from many start states to many horizons go through the runtime's own planner and
shared-prefix schedule (`StridePlanner`, `waves.build_schedule`/`run_schedule`), with the torch
networks as the step function, so the figures describe the plans a deployed bundle runs.

Errors are the contract's normalised RMS: error per component divided by the component's
standard deviation over the training split, root-mean-square over components and start states.
Held-out states here are already normalised by that deviation (z = (x − mean) / scale), so the
metric is the plain RMS of z errors.

For a reduced model (`LatentBasis`), the levels step latent states: start states are encoded,
and forecasts are decoded before any error is taken, so every figure is about full states.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Protocol

import numpy as np
import torch

from stridecast.runtime.planner import StridePlanner
from stridecast.runtime.waves import build_schedule, run_schedule

from .divergence import normalised_errors

Levels = Mapping[int, torch.nn.Module]
# Start states drawn from the held-out trajectories (evenly spaced in time within each).
# Every forecast batch carries them all, so this bounds the cost of each network call.
MAX_START_STATES = 256
# Values (targets · B · d) one schedule run may hold: about 64 MiB of float32 results. Runs
# are split into chunks of targets beyond it; each chunk re-runs the shared coarse prefixes,
# so bigger chunks waste less.
VALUES_PER_RUN = 1 << 24


class LatentBasis(Protocol):
    """The encoder and decoder of a reduced model, on normalised states (NumPy)."""

    def encode(self, z: np.ndarray) -> np.ndarray:
        """Normalised full states (..., d) → latent states (..., r)."""

    def decode(self, latent: np.ndarray) -> np.ndarray:
        """Latent states (..., r) → normalised full states (..., d)."""


@dataclass(frozen=True)
class HeldOut:
    """Normalised held-out trajectories and the fixed start states forecasts begin from.

    Attributes
    ----------
    flat : ndarray, shape (sum T_i, d), float32
        All held-out trajectories, one after the other.
    offsets, lengths : ndarray of int64, shape (N,)
        Where each trajectory starts in `flat`, and its number of samples.
    trajectory, start : ndarray of int64, shape (B,)
        Trajectory and sample index of each start state.
    reduction : LatentBasis or None
        For levels that step latent states: how forecasts enter and leave the latent space.
    """

    flat: np.ndarray
    offsets: np.ndarray
    lengths: np.ndarray
    trajectory: np.ndarray
    start: np.ndarray
    reduction: LatentBasis | None = None

    @property
    def initial(self) -> np.ndarray:
        """The start states, shape (B, d), float32."""
        return self.flat[self.offsets[self.trajectory] + self.start]

    @property
    def longest(self) -> int:
        """The longest span a held-out trajectory covers, in base steps."""
        return int(self.lengths.max()) - 1

    def truth(self, steps: int) -> tuple[np.ndarray, np.ndarray]:
        """True states `steps` base steps after each start (B, d) and which exist (B,)."""
        index = self.start + steps
        valid = index < self.lengths[self.trajectory]
        rows = self.offsets[self.trajectory] + np.minimum(index, self.lengths[self.trajectory] - 1)
        return self.flat[rows], valid


def prepare_held_out(trajectories: Sequence[torch.Tensor], *,
                     max_starts: int = MAX_START_STATES,
                     reduction: LatentBasis | None = None) -> HeldOut:
    """Held-out trajectories (a list of normalised tensors (T_i, d), ragged) with start states.

    With `reduction`, the trajectories are still full normalised states (the truth); the
    levels step latent states (see `forecasts`).

    Each trajectory gets starts evenly spaced over its samples but the last, in proportion to
    its length, at most `max_starts` in all and at least its first sample.
    """
    arrays = [np.ascontiguousarray(t.detach().cpu().numpy(), dtype=np.float32)
              for t in trajectories]
    lengths = np.array([len(a) for a in arrays], dtype=np.int64)
    offsets = np.concatenate(([0], np.cumsum(lengths)[:-1])).astype(np.int64)
    usable = np.maximum(lengths - 1, 1)
    share = np.maximum(1, np.floor(max_starts * usable / usable.sum())).astype(np.int64)
    trajectory, start = [], []
    for index, (count, room) in enumerate(zip(share, usable, strict=True)):
        picks = np.unique(np.linspace(0, room - 1, min(count, room)).round().astype(np.int64))
        trajectory.append(np.full(len(picks), index, dtype=np.int64))
        start.append(picks)
    return HeldOut(flat=np.concatenate(arrays), offsets=offsets, lengths=lengths,
                   trajectory=np.concatenate(trajectory), start=np.concatenate(start),
                   reduction=reduction)


def advance(levels: Levels, states: torch.Tensor, plan: Sequence[tuple[int, int]]
            ) -> torch.Tensor:
    """Apply a ((stride, count), ...) plan, coarse first, to normalised states (B, d)."""
    with torch.no_grad():
        for stride, count in plan:
            for _ in range(count):
                states = states + levels[stride](states)
    return states


def forecasts(levels: Levels, initial: np.ndarray, targets: Sequence[int], *,
              reduction: LatentBasis | None = None
              ) -> Iterator[tuple[list[int], np.ndarray]]:
    """Runtime-style forecasts of normalised `initial` (B, d) at `targets` (base steps).

    With `reduction`, `initial` is encoded once, the levels step latent states, and the
    forecasts are decoded (a diverged latent forecast decodes to inf, never to NaN, which
    would read as "no truth").

    Yields
    ------
    chunk : list of int
        Consecutive targets of the request (as many as fit in `VALUES_PER_RUN`).
    states : ndarray, shape (len(chunk), B, d), float32
        The forecasts, inf or NaN where a forecast diverged.
    """
    planner = StridePlanner(levels)

    def step(stride: int, states: np.ndarray, _depth: int) -> np.ndarray:
        with torch.no_grad():
            z = torch.from_numpy(np.ascontiguousarray(states))
            return (z + levels[stride](z)).numpy()

    initial = np.ascontiguousarray(initial, dtype=np.float32)
    targets = list(targets)
    per_run = max(1, VALUES_PER_RUN // initial.size)
    start = initial if reduction is None else np.ascontiguousarray(
        reduction.encode(initial), dtype=np.float32)
    for first in range(0, len(targets), per_run):
        chunk = targets[first:first + per_run]
        states = run_schedule(build_schedule(chunk, planner), start, step)
        yield chunk, states if reduction is None else decoded(reduction, states)


def decoded(reduction: LatentBasis, latent: np.ndarray) -> np.ndarray:
    """Latent states (..., r) decoded to full normalised float32 states (..., d); inf where a
    latent state is not finite."""
    finite = np.isfinite(latent).all(axis=-1)
    with np.errstate(over="ignore", invalid="ignore"):
        full = np.asarray(reduction.decode(np.where(finite[..., None], latent, 0.0)),
                          dtype=np.float32)
    full[~finite] = np.inf
    return full


def normalised_rms(prediction: np.ndarray, truth: np.ndarray, valid: np.ndarray | None = None
                   ) -> float:
    """RMS over states and components of normalised errors (B, d); inf if any diverged.

    NaN (no valid state) when `valid` selects nothing.
    """
    if valid is not None:
        prediction, truth = prediction[valid], truth[valid]
    if prediction.size == 0:
        return float("nan")
    with np.errstate(over="ignore", invalid="ignore"):
        value = float(np.sqrt(np.mean((prediction.astype(np.float64) - truth) ** 2)))
    return value if np.isfinite(value) else float("inf")


def state_errors(levels: Levels, held_out: HeldOut, targets: Sequence[int]) -> np.ndarray:
    """Normalised error of every start state's forecast at each target (base steps).

    Returns
    -------
    ndarray, shape (M, B)
        RMS over components of the z error (`divergence.normalised_errors` with unit
        deviations, the states being normalised); inf where a forecast diverged, NaN where the
        start's trajectory ends before the target.
    """
    rows = []
    for chunk, states in forecasts(levels, held_out.initial, targets,
                                   reduction=held_out.reduction):
        for steps, predicted in zip(chunk, states, strict=True):
            truth, valid = held_out.truth(steps)
            errors = normalised_errors(predicted, truth, np.ones(truth.shape[-1]))
            rows.append(np.where(valid, errors, np.nan))
    return np.asarray(rows, dtype=np.float64).reshape(len(rows), len(held_out.start))


def rms_over_states(errors: np.ndarray) -> np.ndarray:
    """Normalised RMS over the start states of per-state errors (M, B) -> (M,).

    Equal to `normalised_rms` of the forecasts: inf if any valid state diverged, NaN where no
    state is valid (NaN entries are the states without truth).
    """
    valid = ~np.isnan(errors)
    count = valid.sum(axis=1)
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        squares = np.where(valid, errors, 0.0) ** 2
        value = np.sqrt(squares.sum(axis=1) / count)
    return np.where(count == 0, np.nan, value)


def error_curve(levels: Levels, held_out: HeldOut, targets: Sequence[int]) -> np.ndarray:
    """Normalised RMS of the hierarchy of `levels` at each target (base steps), shape (M,)."""
    return rms_over_states(state_errors(levels, held_out, targets))


def evaluations(levels: Levels, targets: Sequence[int]) -> float:
    """Mean network evaluations per forecast over `targets` (plans' step counts)."""
    planner = StridePlanner(levels)
    return float(np.mean([sum(count for _, count in planner.steps(int(n))) for n in targets]))


def json_number(value: float) -> float | None:
    """JSON has no infinity or NaN: a diverged (or missing) figure is recorded as null."""
    return float(value) if np.isfinite(value) else None
