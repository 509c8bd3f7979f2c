"""Held-out figures and level selection, on levels that are exact linear flow maps."""

from __future__ import annotations

import numpy as np
import torch
from scipy.linalg import expm
from torch import nn

from stridecast.export.evaluation import advance, held_out_figures, horizons, select_levels
from tests.export.systems import DAMPED_OSCILLATOR, linear_trajectories

BASE_STEP = 0.1


def exact_level(stride: int) -> nn.Module:
    """The increment network z ↦ (expm(A k Δt) − I) z of the exact flow map (mean 0, scale 1)."""
    layer = nn.Linear(2, 2, bias=False)
    with torch.no_grad():
        flow = expm(DAMPED_OSCILLATOR * stride * BASE_STEP)
        layer.weight.copy_(torch.from_numpy(flow - np.eye(2)))
    return layer


def held_out() -> torch.Tensor:
    trajectories = linear_trajectories(DAMPED_OSCILLATOR, base_step=BASE_STEP, count=3,
                                       steps=40, seed=2)
    return torch.from_numpy(trajectories.astype(np.float32))


def test_horizons_ladder():
    # The documented rule: a geometric ladder of 8 rungs from the finest stride to the
    # longest span, rounded down to multiples of the finest stride, plus every stride.
    assert horizons(40, (1, 4)) == [1, 2, 4, 8, 13, 23, 39]
    assert horizons(40, (2, 16)) == [2, 4, 6, 10, 16, 24, 38]
    assert horizons(2, (4,)) == []


def test_advance_composes_coarse_first():
    levels = {1: exact_level(1), 4: exact_level(4)}
    states = torch.tensor([[1.0, 0.0], [0.3, -0.7]])
    result = advance(levels, states, ((4, 2), (1, 1))).double().numpy()
    # Expected: expm(A · 9 Δt) (scipy.linalg.expm), float32 rounding allowed.
    expected = states.double().numpy() @ expm(DAMPED_OSCILLATOR * 9 * BASE_STEP).T
    np.testing.assert_allclose(result, expected, atol=1e-6)


def test_figures_of_exact_levels():
    figures = held_out_figures({1: exact_level(1), 4: exact_level(4)}, held_out(),
                               base_step=BASE_STEP, scale=np.array([2.0, 3.0]))
    assert figures["validated_horizon"] == 39 * BASE_STEP
    # Expected error 0 (exact flow maps from scipy.linalg.expm), up to float32 rounding.
    for row in figures["one_step"]:
        assert row["rmse"] < 1e-6 and len(row["rmse_physical"]) == 2
    last = figures["horizons"][-1]
    assert last["base_steps"] == 39 and last["plan"] == [[4, 9], [1, 3]]
    assert last["evaluations"] == 12 and last["finest_only_evaluations"] == 39
    assert last["start_states"] == 3  # one start fits per trajectory at the longest horizon
    for row in figures["horizons"]:
        assert row["hierarchical_rmse"] < 1e-5 and row["finest_only_rmse"] < 1e-5


def test_selection_drops_a_harmful_level():
    wrong = nn.Linear(2, 2, bias=False)
    nn.init.zeros_(wrong.weight)  # "nothing changes" over two base steps: a bad level
    levels = {1: exact_level(1), 2: wrong, 4: exact_level(4)}
    kept, decisions = select_levels(levels, held_out())
    assert kept == (1, 4)
    assert [(d["stride"], d["kept"]) for d in decisions] == [(4, True), (2, False)]
    dropped = decisions[1]
    assert dropped["mean_rmse_without"] < dropped["mean_rmse_with"]


def test_diverging_forecast_is_recorded_as_null():
    exploding = nn.Linear(2, 2, bias=False)
    with torch.no_grad():
        exploding.weight.fill_(1e30)
    figures = held_out_figures({1: exploding}, held_out(), base_step=BASE_STEP,
                               scale=np.ones(2))
    # One step of 1e30 · z is finite in float32, two overflow (float32 max ≈ 3.4e38).
    assert figures["horizons"][0]["hierarchical_rmse"] > 1e29
    assert all(row["hierarchical_rmse"] is None for row in figures["horizons"][1:])
    assert figures["validated_horizon"] == BASE_STEP
