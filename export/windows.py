"""Training data plumbing: ragged trajectories, the split, normalisation and rollout windows.

Trajectories of different lengths live in one flat array of states plus per-trajectory
offsets (`Ragged`), so cutting windows stays one vectorised gather. A window for stride k and
rollout R is the states x[t], x[t+k], ..., x[t+R·k] of ONE trajectory: its start t is chosen
so the window never crosses into the next trajectory.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

logger = logging.getLogger(__name__)
# A component whose spread is below this fraction of its magnitude is treated as constant.
_CONSTANT_SPREAD = 1e-12


@dataclass(frozen=True)
class Ragged:
    """Trajectories (T_i, d) stored back to back.

    Attributes
    ----------
    values : ndarray or Tensor, shape (sum T_i, d)
        All states, trajectory after trajectory.
    offsets : ndarray, shape (N + 1,), int64
        Trajectory i is ``values[offsets[i]:offsets[i + 1]]``; offsets[0] = 0.
    """

    values: Any
    offsets: np.ndarray

    @classmethod
    def from_arrays(cls, arrays: Sequence[np.ndarray]) -> Ragged:
        """Concatenate (T_i, d) arrays (same d) into one `Ragged`."""
        lengths = [len(array) for array in arrays]
        offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
        return cls(np.concatenate(list(arrays), axis=0), offsets)

    @property
    def count(self) -> int:
        return len(self.offsets) - 1

    @property
    def lengths(self) -> np.ndarray:
        return np.diff(self.offsets)

    @property
    def dim(self) -> int:
        return int(self.values.shape[1])

    def trajectory(self, index: int) -> Any:
        return self.values[int(self.offsets[index]):int(self.offsets[index + 1])]

    def to_list(self) -> list[Any]:
        return [self.trajectory(index) for index in range(self.count)]

    def select(self, indices: Sequence[int]) -> Ragged:
        """The trajectories at `indices`, in that order."""
        return Ragged.from_arrays([self.trajectory(index) for index in indices])

    def map(self, function: Callable[[Any], Any]) -> Ragged:
        """Apply `function` to the flat states (it must keep their number)."""
        return Ragged(function(self.values), self.offsets)


@dataclass(frozen=True)
class Split:
    """Training and held-out trajectories (held-out may be None) and how they were chosen."""

    train: Ragged
    held_out: Ragged | None
    description: dict[str, Any]


def split_trajectories(data: Ragged, fraction: float, seed: int) -> Split:
    """Hold out whole trajectories; a single trajectory is split in time instead.

    Parameters
    ----------
    data : Ragged
        N trajectories (T_i, d).
    fraction : float
        Share of the trajectories held out, in [0, 1). At least one is held out when > 0 and
        N ≥ 2, and at least one stays for training.
    seed : int
        Seeds the choice of held-out trajectories.
    """
    if fraction <= 0:
        return Split(data, None, {"method": "none"})
    if data.count == 1:
        steps = int(data.lengths[0])
        cut = round((1.0 - fraction) * steps)
        logger.info("one trajectory: holding out its last %d of %d samples", steps - cut, steps)
        series = data.trajectory(0)
        return Split(Ragged.from_arrays([series[:cut]]), Ragged.from_arrays([series[cut:]]),
                     {"method": "time", "train_samples": cut, "held_out_samples": steps - cut})
    held = min(data.count - 1, max(1, round(fraction * data.count)))
    order = np.random.default_rng(seed).permutation(data.count)
    held_out, train = np.sort(order[:held]), np.sort(order[held:])
    return Split(data.select(train), data.select(held_out),
                 {"method": "trajectory", "train_trajectories": train.tolist(),
                  "held_out_trajectories": held_out.tolist()})


def normalisation(train: Ragged) -> tuple[np.ndarray, np.ndarray]:
    """Per-component mean and standard deviation over all training samples (scale > 0)."""
    flat = np.asarray(train.values)
    mean = flat.mean(axis=0)
    spread = flat.std(axis=0)
    constant = spread <= _CONSTANT_SPREAD * np.maximum(1.0, np.abs(mean))
    if constant.any():
        logger.warning("components %s are constant in the training data; their scale is 1",
                       np.flatnonzero(constant).tolist())
    return mean, np.where(constant, 1.0, spread)


def pooled_normalisation(train: Ragged, groups: Sequence[str] | None = None
                         ) -> tuple[np.ndarray, np.ndarray]:
    """Per-component mean and one scale per group of components (scale > 0).

    A group's scale is the root mean square of its components' standard deviations, so the
    group's total variance is kept. For a field this weighs every point alike: per-point
    scales would blow up the points that barely move (next to a fixed boundary) and bend both
    a POD basis and the error metric towards them. `groups` labels each component (e.g. its
    unit); None puts all components in one group. A group with no spread gets scale 1.
    """
    flat = np.asarray(train.values)
    mean = flat.mean(axis=0)
    variance = flat.var(axis=0)
    labels = [""] * flat.shape[1] if groups is None else list(groups)
    scale = np.ones(flat.shape[1])
    for label in dict.fromkeys(labels):
        members = np.array([index for index, name in enumerate(labels) if name == label])
        pooled = float(np.sqrt(np.mean(variance[members])))
        magnitude = max(1.0, float(np.max(np.abs(mean[members]))))
        if pooled <= _CONSTANT_SPREAD * magnitude:
            logger.warning("components %s are constant in the training data; their scale is 1",
                           members.tolist())
            continue
        scale[members] = pooled
    return mean, scale


def window_starts(data: Ragged, stride: int, rollout: int) -> np.ndarray:
    """Flat indices (into `data.values`) of every window start that fits, shape (M,), int64.

    A trajectory of length T contributes the starts 0 .. T − rollout·stride − 1 (none when it
    is too short), so no window reaches past the end of its own trajectory.
    """
    fits = np.maximum(data.lengths - rollout * stride, 0)
    total = int(fits.sum())
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    first_of_each = np.repeat(np.cumsum(fits) - fits, fits)
    return (np.repeat(data.offsets[:-1], fits) + np.arange(total) - first_of_each
            ).astype(np.int64)


def gather_windows(values: torch.Tensor, starts: torch.Tensor, stride: int,
                   rollout: int) -> torch.Tensor:
    """States of each window, shape (B, rollout + 1, d), from flat `values` (S, d)."""
    offsets = torch.arange(rollout + 1, dtype=torch.int64) * stride
    return values[starts[:, None] + offsets[None, :]]


def spaced_subset(count: int, limit: int) -> np.ndarray:
    """Up to `limit` evenly spaced indices of range(count) (deterministic)."""
    if count <= limit:
        return np.arange(count)
    return np.unique(np.linspace(0, count - 1, limit).round().astype(np.int64))
