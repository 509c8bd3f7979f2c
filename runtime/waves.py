"""Dense forecasts in waves: share the coarse prefixes of many plans and batch each level.

`build_schedule` turns targets into a trie of step sequences; `run_schedule` runs it depth by
depth with one network call per (depth, stride).

Every target's plan, expanded coarse first (e.g. 36 with strides 16, 4, 1 → 16, 16, 4),
is a path from the root (the initial state) in a trie; targets whose plans share a prefix
share its nodes, so the number of network evaluations per state is the number of non-root
nodes. Nodes are numbered by depth, then by stride (coarse first), so each depth is a
contiguous index range and each (depth, stride) group is one contiguous run of children.

Memory: a node's parent is always one level up, so `run_schedule` keeps only two consecutive
levels, each at most `len(targets)` nodes wide (every node at a depth is a distinct prefix of
some target's plan), plus the result. Peak memory is therefore about
3 · len(targets) · B · d values; 10,000 targets × 1,000 states × 8 float32 components is
about 1 GB, so large requests should be split into chunks of states.
"""

from __future__ import annotations

import itertools
import operator
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from .errors import StateError

StepFunction = Callable[[int, np.ndarray, int], np.ndarray]
"""`step(stride, states, depth) -> next_states`, states (N, d) that took `depth` steps so far."""

CheckFunction = Callable[[int, int, np.ndarray], None]
"""`check(depth, stride, outputs)`: raise to stop the run (e.g. on non-finite outputs)."""


class Planner(Protocol):
    """What `build_schedule` needs from a planner (e.g. `StridePlanner`)."""

    @property
    def strides(self) -> tuple[int, ...]: ...

    def count_matrix(self, targets: np.ndarray) -> np.ndarray: ...


Group = tuple[int, np.ndarray, np.ndarray]
"""One network call: (stride, parent node indices, child node indices)."""


@dataclass(frozen=True, eq=False)
class Schedule:
    """A trie of plans, ready to run level by level.

    Attributes
    ----------
    targets : tuple of int
        The requested targets, in base steps, in request order.
    waves : tuple of tuple of (stride, parent_indices, child_indices)
        `waves[i]` produces the nodes at depth i + 1: one group per distinct stride at that
        depth. Index arrays are int64, read-only, and `child_indices` is a contiguous range.
    node_count : int
        Number of trie nodes, the root (index 0, the initial state) included.
    target_nodes : ndarray of int64, shape (len(targets),)
        Node holding each target's state; 0 (the root) for target 0.
    level_starts : ndarray of int64, shape (depth + 2,)
        Nodes at depth i have indices `level_starts[i]` to `level_starts[i + 1] - 1`.
    """

    targets: tuple[int, ...]
    waves: tuple[tuple[Group, ...], ...]
    node_count: int
    target_nodes: np.ndarray
    level_starts: np.ndarray

    @property
    def evaluations(self) -> int:
        """Network evaluations per state: every node but the root."""
        return self.node_count - 1

    @property
    def depth(self) -> int:
        """Number of sequential waves (the longest plan's step count)."""
        return len(self.waves)

    @property
    def calls(self) -> int:
        """Number of network calls: one per (depth, stride) group."""
        return sum(len(wave) for wave in self.waves)


def _read_only(array: np.ndarray) -> np.ndarray:
    array = np.ascontiguousarray(array, dtype=np.int64)
    array.setflags(write=False)
    return array


def _count_matrix(
    targets: Sequence[int], planner: Planner
) -> tuple[tuple[int, ...], np.ndarray, np.ndarray]:
    """Distinct targets' step counts (rows, strides largest first) and each target's row."""
    strides = tuple(sorted(planner.strides, reverse=True))
    distinct, target_rows = np.unique(np.asarray(targets), return_inverse=True)
    # count_matrix validates every target (TimeError for negative, unreachable, too long).
    return strides, planner.count_matrix(distinct), target_rows.reshape(-1)


def build_schedule(targets: Sequence[int], planner: Planner) -> Schedule:
    """Build the shared-prefix trie of the targets' plans.

    Parameters
    ----------
    targets : sequence of int
        Targets in base steps (non-negative; repeats share a node).
    planner : StridePlanner
        Any object with `strides` and `count_matrix(targets)` giving each target's step count
        per stride, largest stride first.

    Returns
    -------
    Schedule

    Raises
    ------
    TimeError
        From the planner, for a target that is negative, unreachable or too long.
    """
    strides, counts, target_rows = _count_matrix(targets, planner)
    plans = counts.shape[0]
    # Nodes are first numbered provisionally, chain by chain, stage by stage (one stage per
    # stride, coarse first); `group` labels the targets sharing the prefix built so far.
    parent_parts = [np.array([-1], dtype=np.int64)]
    stride_parts = [np.array([0], dtype=np.int64)]
    depth_parts = [np.array([0], dtype=np.int64)]
    depth_of = depth_parts[0]
    group = np.zeros(plans, dtype=np.int64)
    end_node = np.zeros(plans, dtype=np.int64)
    next_id = 1
    for stage, stride in enumerate(strides):
        stage_counts = counts[:, stage]
        groups, members = np.unique(group, return_inverse=True)
        length = np.zeros(len(groups), dtype=np.int64)
        np.maximum.at(length, members, stage_counts)
        start = np.zeros(len(groups), dtype=np.int64)
        start[members] = end_node
        offsets = np.concatenate(([0], np.cumsum(length)[:-1]))
        total = int(length.sum())
        chain = np.repeat(np.arange(len(groups)), length)
        position = np.arange(total, dtype=np.int64) - offsets[chain]
        ids = next_id + np.arange(total, dtype=np.int64)
        parent_parts.append(np.where(position == 0, start[chain], ids - 1))
        stride_parts.append(np.full(total, stride, dtype=np.int64))
        depth_parts.append(depth_of[start[chain]] + position + 1)
        depth_of = np.concatenate((depth_of, depth_parts[-1]))
        end_node = np.where(
            stage_counts > 0, next_id + offsets[members] + stage_counts - 1, end_node
        )
        group = members * (int(stage_counts.max(initial=0)) + 1) + stage_counts
        next_id += total
    parent = np.concatenate(parent_parts)
    stride_of = np.concatenate(stride_parts)
    # Final numbering: by depth, then coarse stride first; the root stays 0.
    order = np.lexsort((np.arange(next_id), -stride_of, depth_of))
    renumber = np.empty(next_id, dtype=np.int64)
    renumber[order] = np.arange(next_id, dtype=np.int64)
    parent = np.where(order == 0, -1, renumber[np.maximum(parent[order], 0)])
    stride_of = stride_of[order]
    depth_of = depth_of[order]
    max_depth = int(depth_of[-1]) if next_id > 1 else 0
    level_starts = np.searchsorted(depth_of, np.arange(max_depth + 2), side="left")
    waves = []
    for depth in range(1, max_depth + 1):
        begin, end = int(level_starts[depth]), int(level_starts[depth + 1])
        level_strides = stride_of[begin:end]
        cuts = begin + np.flatnonzero(np.diff(level_strides)) + 1
        bounds = [begin, *cuts.tolist(), end]
        waves.append(
            tuple(
                (
                    int(stride_of[low]),
                    _read_only(parent[low:high]),
                    _read_only(np.arange(low, high)),
                )
                for low, high in itertools.pairwise(bounds)
            )
        )
    return Schedule(
        targets=tuple(operator.index(target) for target in targets),
        waves=tuple(waves),
        node_count=next_id,
        target_nodes=_read_only(renumber[end_node][target_rows]),
        level_starts=_read_only(level_starts),
    )


def node_base_steps(schedule: Schedule) -> np.ndarray:
    """The grid time (base steps) of every node, node order; the root is 0.

    Returns
    -------
    ndarray of int64, shape (node_count,)
    """
    steps = np.zeros(schedule.node_count, dtype=np.int64)
    for wave in schedule.waves:
        for stride, parents, children in wave:
            steps[children] = steps[parents] + stride
    return steps


def run_schedule(
    schedule: Schedule,
    initial: np.ndarray,
    step: StepFunction,
    check: CheckFunction | None = None,
) -> np.ndarray:
    """Run a schedule from `initial`, one `step` call per (depth, stride).

    Parameters
    ----------
    schedule : Schedule
        From `build_schedule`.
    initial : ndarray, shape (B, d)
        Initial states.
    step : callable
        `step(stride, states, depth)` with states of shape (N, d), N a multiple of B, returns
        the states `stride` base steps later, same shape. `depth` is the trie depth of the
        input states, i.e. the steps they have already taken (0 in the first wave, so the
        call computes step `depth + 1` of the plans); with `stride` it lets the caller say
        where a failure happened. `step` may raise.
    check : callable, optional
        `check(depth, stride, outputs)` is called on every step's outputs (same `depth` as
        given to `step`); it may raise.

    Returns
    -------
    ndarray, shape (len(targets), B, d)
        The state at each target, in the dtype of `initial`.

    Raises
    ------
    StateError
        If `initial` is not 2-D or `step` returns an array of the wrong shape.
    """
    initial = np.asarray(initial)
    if initial.ndim != 2:
        raise StateError(
            f"`initial` must have shape (B, d); got an array of shape {initial.shape}."
        )
    batch, dim = initial.shape
    result = np.empty((len(schedule.targets), batch, dim), dtype=initial.dtype)
    target_depth = np.searchsorted(schedule.level_starts, schedule.target_nodes, side="right") - 1
    at_root = np.flatnonzero(target_depth == 0)
    result[at_root] = initial
    level = initial[np.newaxis]
    for taken, wave in enumerate(schedule.waves):
        previous_start = int(schedule.level_starts[taken])
        start = int(schedule.level_starts[taken + 1])
        width = int(schedule.level_starts[taken + 2]) - start
        following = np.empty((width, batch, dim), dtype=initial.dtype)
        for stride, parents, children in wave:
            states = level[parents - previous_start].reshape(-1, dim)
            outputs = np.asarray(step(stride, states, taken))
            if outputs.shape != states.shape:
                raise StateError(
                    f"step for stride {stride} at depth {taken} must return shape "
                    f"{states.shape}; got {outputs.shape}."
                )
            if check is not None:
                check(taken, stride, outputs)
            following[children - start] = outputs.reshape(len(children), batch, dim)
        level = following
        landing = np.flatnonzero(target_depth == taken + 1)
        result[landing] = level[schedule.target_nodes[landing] - start]
    return result
