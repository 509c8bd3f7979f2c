"""Training data plumbing: split by trajectory, normalise, and cut rollout windows.

A window for stride k and rollout R is the states x[t], x[t+k], ..., x[t+R·k] of one
trajectory; every start t that fits is used, in every training trajectory.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

logger = logging.getLogger(__name__)
# A component whose spread is below this fraction of its magnitude is treated as constant.
_CONSTANT_SPREAD = 1e-12


@dataclass(frozen=True)
class Split:
    """Training and held-out trajectories (held-out may be None) and how they were chosen."""

    train: np.ndarray
    held_out: np.ndarray | None
    description: dict[str, Any]


def split_trajectories(trajectories: np.ndarray, fraction: float, seed: int) -> Split:
    """Hold out whole trajectories; a single trajectory is split in time instead.

    Parameters
    ----------
    trajectories : ndarray, shape (N, T, d)
    fraction : float
        Share held out, in [0, 1). At least one trajectory is held out when > 0 and N ≥ 2.
    seed : int
        Seeds the choice of held-out trajectories.
    """
    count, steps = trajectories.shape[:2]
    if fraction <= 0:
        return Split(trajectories, None, {"method": "none"})
    if count == 1:
        cut = round((1.0 - fraction) * steps)
        logger.info("one trajectory: holding out its last %d of %d samples", steps - cut, steps)
        return Split(trajectories[:, :cut], trajectories[:, cut:],
                     {"method": "time", "train_samples": cut, "held_out_samples": steps - cut})
    held = min(count - 1, max(1, round(fraction * count)))
    order = np.random.default_rng(seed).permutation(count)
    held_out, train = np.sort(order[:held]), np.sort(order[held:])
    return Split(trajectories[train], trajectories[held_out],
                 {"method": "trajectory", "train_trajectories": train.tolist(),
                  "held_out_trajectories": held_out.tolist()})


def normalisation(train: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-component mean and standard deviation over all training samples (scale > 0)."""
    flat = train.reshape(-1, train.shape[-1])
    mean = flat.mean(axis=0)
    spread = flat.std(axis=0)
    constant = spread <= _CONSTANT_SPREAD * np.maximum(1.0, np.abs(mean))
    if constant.any():
        logger.warning("components %s are constant in the training data; their scale is 1",
                       np.flatnonzero(constant).tolist())
    return mean, np.where(constant, 1.0, spread)


def window_starts(trajectories: int, steps: int, stride: int, rollout: int) -> np.ndarray:
    """All (trajectory, start) pairs whose window of `rollout` strides fits, shape (M, 2)."""
    last_start = steps - rollout * stride  # exclusive
    if last_start <= 0:
        return np.zeros((0, 2), dtype=np.int64)
    grid = np.stack(np.meshgrid(np.arange(trajectories), np.arange(last_start), indexing="ij"),
                    axis=-1)
    return grid.reshape(-1, 2).astype(np.int64)


def gather_windows(data: torch.Tensor, starts: torch.Tensor, stride: int,
                   rollout: int) -> torch.Tensor:
    """States of each window, shape (B, rollout + 1, d), from `data` (N, T, d)."""
    offsets = torch.arange(rollout + 1, dtype=torch.int64) * stride
    steps = starts[:, 1:2] + offsets[None, :]
    return data[starts[:, 0:1], steps]


def spaced_subset(count: int, limit: int) -> np.ndarray:
    """Up to `limit` evenly spaced indices of range(count) (deterministic)."""
    if count <= limit:
        return np.arange(count)
    return np.unique(np.linspace(0, count - 1, limit).round().astype(np.int64))
