"""Grid anchors for many times (runtime/anchors.py), against brute force and Lagrange's formula."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stridecast.runtime import TimeError
from stridecast.runtime.anchors import (
    MAX_BASE_STEPS,
    grid_positions,
    interpolation_anchors,
    interpolation_rows,
    walk_to_reachable,
)
from stridecast.runtime.planner import StridePlanner


def _reachable(strides, n):
    # Brute force: n is reachable iff some stride s ≤ n leaves a reachable remainder.
    table = [True] + [False] * n
    for value in range(1, n + 1):
        table[value] = any(s <= value and table[value - s] for s in strides)
    return table


def test_grid_positions_absorb_rounding_of_decimal_steps():
    # 0.3 / 0.1 is 2.9999999999999996 in IEEE 754 double; it is the grid time 3.
    positions, nearest, on_grid = grid_positions(np.array([0.3, 0.36, 1e6]), 0.1)
    assert nearest.tolist() == [3, 4, 10_000_000]
    assert on_grid.tolist() == [True, False, True]
    assert positions[1] == pytest.approx(3.6)


@pytest.mark.parametrize("strides", [(3, 5), (4, 6), (2, 7, 9)])
def test_walk_to_reachable_matches_brute_force(strides):
    planner = StridePlanner(strides)
    targets = np.arange(0, 40)
    table = _reachable(strides, 80)
    up = walk_to_reachable(planner, targets, +1)
    down = walk_to_reachable(planner, targets, -1)
    for target, high, low in zip(targets, up, down, strict=True):
        assert high == min(v for v in range(target, 81) if table[v])
        assert low == max(v for v in range(0, target + 1) if table[v])


def test_interpolation_anchors_take_two_below_and_two_above():
    planner = StridePlanner((1,))
    anchors = interpolation_anchors(planner, np.array([5, 0]), np.array([6, 1]))
    assert anchors.tolist() == [[4, 5, 6, 7], [0, 1, 2, 3]]


def test_interpolation_rows_reproduce_cubics_exactly():
    # Lagrange interpolation through four nodes reproduces every polynomial of degree ≤ 3
    # (the uniqueness of the interpolating polynomial), so weighted anchor values of a cubic
    # equal the cubic at the requested position.
    planner = StridePlanner((2, 3))
    times = np.array([0.5, 4.25, 7.0, 10.6, 0.0])
    positions, nearest, on_grid = grid_positions(times, 1.0)
    off = ~on_grid
    below = walk_to_reachable(planner, np.floor(positions[off]).astype(np.int64), -1)
    above = walk_to_reachable(planner, np.ceil(positions[off]).astype(np.int64), +1)
    anchors, weights = interpolation_rows(planner, positions, nearest, off, below, above)
    assert np.allclose(weights.sum(axis=1), 1.0)

    def cubic(x):
        return 0.5 * x**3 - 2.0 * x**2 + x - 3.0

    np.testing.assert_allclose((weights * cubic(anchors)).sum(axis=1), cubic(positions),
                               rtol=1e-12, atol=1e-9)
    # Grid times are answered by their own grid state with weight 1.
    assert anchors[2, 0] == 7 and weights[2].tolist() == [1.0, 0.0, 0.0, 0.0]


@pytest.mark.parametrize("time", [1e20, 1e300, 1.7e308])
def test_times_beyond_exact_step_counts_are_refused_without_overflow(time):
    # float64 holds every integer up to 2**53 exactly (IEEE 754 binary64, 53-bit significand);
    # the runtime stops at 2**52 base steps. 1.7e308 / 0.04 overflows a plain division, so the
    # guard must not divide (no RuntimeWarning, which pytest turns into an error here).
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(TimeError, match=r"more than 2\*\*52 base steps \(0\.04\) ahead"):
            grid_positions(np.array([0.0, time]), 0.04)


def test_the_last_exact_time_is_accepted():
    _, nearest, on_grid = grid_positions(np.array([MAX_BASE_STEPS * 0.5]), 0.5)
    assert nearest[0] == 2**52 and on_grid[0]
