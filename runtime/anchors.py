"""Grid anchors for many requested times at once: which grid states answer each time.

Pure functions over a `StridePlanner`; `Stepper.forecast` uses them so that planning 100,000
times costs a few vectorised passes instead of a Python loop.
"""

from __future__ import annotations

import numpy as np

from .errors import TimeError
from .planner import StridePlanner

# Beyond 2**52 base steps, float64 positions stop being whole numbers of steps.
MAX_BASE_STEPS = 2.0**52


def grid_positions(times: np.ndarray, base_step: float
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Positions in base steps, the nearest integers, and which times lie on the grid.

    A time counts as a grid time when it is one up to floating-point rounding (0.3 / 0.1 is
    2.9999999999999996): within 1e-9 base steps, or 1e-12 relative for large positions.

    Raises
    ------
    TimeError
        If a time lies more than 2**52 base steps ahead, where step counts stop being exact.
    """
    times = np.asarray(times, dtype=np.float64)
    if times.size:
        latest = float(times.max())
        # Compared as a product: latest / base_step overflows for times near the float limit.
        if latest > MAX_BASE_STEPS * base_step:
            raise TimeError(f"time {latest!r} is more than 2**52 base steps ({base_step!r}) "
                            "ahead, where step counts stop being exact; expected at most "
                            f"{MAX_BASE_STEPS * base_step!r}.")
    positions = times / base_step
    nearest = np.rint(positions)
    on_grid = np.abs(positions - nearest) <= np.maximum(1e-9, 1e-12 * positions)
    return positions, nearest.astype(np.int64), on_grid


def walk_to_reachable(planner: StridePlanner, targets: np.ndarray, direction: int) -> np.ndarray:
    """Nearest reachable targets at or beyond `targets` in `direction` (−1 or +1).

    Gaps between reachable targets are shorter than the largest stride, so the walk ends after
    at most that many vectorised passes; 0 is always reachable going down.
    """
    values = np.maximum(np.asarray(targets, dtype=np.int64), 0)
    pending = ~planner.reachable_mask(values)
    while pending.any():
        values[pending] += direction
        pending[pending] = ~planner.reachable_mask(values[pending])
    return values


def interpolation_anchors(planner: StridePlanner, below: np.ndarray, above: np.ndarray
                          ) -> np.ndarray:
    """The four grid anchors, ascending, of times between reachable `below` and `above`.

    The two reachable grid times below and the two above (three above when only time 0 lies
    below); shape (len(below), 4).
    """
    second_below = walk_to_reachable(planner, np.maximum(below - 1, 0), -1)
    second_above = walk_to_reachable(planner, above + 1, +1)
    third_above = walk_to_reachable(planner, second_above + 1, +1)
    return np.where((below > 0)[:, None],
                    np.column_stack([second_below, below, above, second_above]),
                    np.column_stack([below, above, second_above, third_above]))


def interpolation_rows(planner: StridePlanner, positions: np.ndarray, nearest: np.ndarray,
                       off: np.ndarray, below: np.ndarray, above: np.ndarray
                       ) -> tuple[np.ndarray, np.ndarray]:
    """Four anchors and cubic Lagrange weights per time (exact rows: one anchor, weight 1)."""
    anchors = np.repeat(nearest[:, None], 4, axis=1)
    weights = np.zeros((positions.size, 4))
    weights[:, 0] = 1.0
    chosen = interpolation_anchors(planner, below, above)
    anchors[off] = chosen
    # Lagrange basis on offsets from the lower anchor (small numbers: accurate at large t).
    nodes = (chosen - below[:, None]).astype(np.float64)
    where = positions[off] - below
    basis = np.ones_like(nodes)
    for j in range(4):
        for k in range(4):
            if j != k:
                basis[:, j] *= (where - nodes[:, k]) / (nodes[:, j] - nodes[:, k])
    weights[off] = basis
    return anchors, weights
