"""Ragged trajectories: windows cut from the flat storage equal windows cut from each
trajectory by hand, never cross a trajectory's end, and the split keeps whole trajectories."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from stridecast.export.windows import (
    Ragged,
    gather_windows,
    normalisation,
    split_trajectories,
    window_starts,
)

RNG = np.random.default_rng(3)
LENGTHS = (9, 3, 14, 6)
TRAJECTORIES = [RNG.normal(size=(length, 2)) for length in LENGTHS]


def windows_by_hand(trajectories, stride: int, rollout: int) -> list[np.ndarray]:
    """Every window x[t], x[t+k], ..., x[t+R·k] of every trajectory, looping plainly."""
    windows = []
    for trajectory in trajectories:
        for start in range(len(trajectory) - rollout * stride):
            windows.append(trajectory[start:start + rollout * stride + 1:stride])
    return windows


@pytest.mark.parametrize(("stride", "rollout"), [(1, 1), (2, 2), (3, 4), (7, 2), (20, 1)])
def test_ragged_windows_equal_windows_cut_per_trajectory(stride, rollout):
    ragged = Ragged.from_arrays(TRAJECTORIES)
    starts = window_starts(ragged, stride, rollout)
    expected = windows_by_hand(TRAJECTORIES, stride, rollout)
    assert len(starts) == len(expected)
    if not expected:
        return
    got = gather_windows(torch.from_numpy(ragged.values), torch.from_numpy(starts), stride,
                         rollout).numpy()
    np.testing.assert_array_equal(got, np.stack(expected))


def test_regular_array_gives_the_windows_of_its_rows():
    regular = RNG.normal(size=(3, 10, 2))
    ragged = Ragged.from_arrays(list(regular))
    starts = window_starts(ragged, 2, 3)
    got = gather_windows(torch.from_numpy(ragged.values), torch.from_numpy(starts), 2, 3)
    # The padded-free equal-length case: windows of (N, T, d) taken with plain slicing.
    expected = [regular[n, t:t + 7:2] for n in range(3) for t in range(10 - 6)]
    np.testing.assert_array_equal(got.numpy(), np.stack(expected))


def test_split_holds_out_whole_trajectories_and_normalises_on_training_only():
    ragged = Ragged.from_arrays(TRAJECTORIES)
    split = split_trajectories(ragged, 0.5, seed=1)
    held = split.description["held_out_trajectories"]
    train = split.description["train_trajectories"]
    assert sorted(held + train) == [0, 1, 2, 3] and len(held) == 2
    for part, indices in ((split.held_out, held), (split.train, train)):
        for got, index in zip(part.to_list(), indices, strict=True):
            np.testing.assert_array_equal(got, TRAJECTORIES[index])
    mean, scale = normalisation(split.train)
    flat = np.concatenate([TRAJECTORIES[index] for index in train])
    np.testing.assert_allclose(mean, flat.mean(axis=0))
    np.testing.assert_allclose(scale, flat.std(axis=0))


def test_single_series_is_split_in_time():
    series = Ragged.from_arrays([TRAJECTORIES[2]])
    split = split_trajectories(series, 0.25, seed=0)
    assert split.description == {"method": "time", "train_samples": 10, "held_out_samples": 4}
    np.testing.assert_array_equal(split.train.values, TRAJECTORIES[2][:10])
    np.testing.assert_array_equal(split.held_out.values, TRAJECTORIES[2][10:])
