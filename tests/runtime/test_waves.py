"""Tests of the shared-prefix wave schedule against brute-force prefix counts."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from stridecast.runtime.errors import StateError, TimeError
from stridecast.runtime.planner import StridePlanner
from stridecast.runtime.waves import build_schedule, run_schedule


def expanded(planner: StridePlanner, n: int) -> tuple[int, ...]:
    return tuple(stride for stride, count in planner.steps(n) for _ in range(count))


def brute_force_nodes(planner: StridePlanner, targets) -> set[tuple[int, ...]]:
    """Every distinct non-empty prefix of the targets' expanded plans."""
    prefixes = set()
    for n in targets:
        sequence = expanded(planner, n)
        prefixes.update(sequence[:length] for length in range(1, len(sequence) + 1))
    return prefixes


def counter_step(calls):
    """A step that adds the stride to every component and records the call."""

    def step(stride, states, depth):
        calls.append((depth, stride, states.shape[0]))
        return states + stride

    return step


stride_sets = st.lists(
    st.integers(min_value=1, max_value=30), min_size=1, max_size=4, unique=True
).map(tuple)


@settings(max_examples=80, deadline=None)
@given(strides=stride_sets, data=st.data())
def test_schedule_matches_brute_force(strides, data):
    # Expected node count: distinct plan prefixes counted by brute force (common practice);
    # expected states: a counter advanced by its stride reaches exactly the target.
    planner = StridePlanner(strides)
    candidates = [n for n in range(400) if planner.is_reachable(n)]
    targets = data.draw(st.lists(st.sampled_from(candidates), min_size=1, max_size=30))
    schedule = build_schedule(targets, planner)
    nodes = brute_force_nodes(planner, targets)
    assert schedule.evaluations == len(nodes)
    assert schedule.node_count == len(nodes) + 1
    assert schedule.depth == max(len(expanded(planner, n)) for n in targets)
    # One call per distinct (depth, stride) among the trie's nodes.
    assert schedule.calls == len({(len(prefix), prefix[-1]) for prefix in nodes})

    calls = []
    initial = np.array([[0.0, 100.0], [5.0, -3.0]])
    result = run_schedule(schedule, initial, counter_step(calls))
    expected = np.array(targets, dtype=float)[:, None, None] + initial
    np.testing.assert_array_equal(result, expected)
    assert len(calls) == schedule.calls
    assert len(set((depth, stride) for depth, stride, _ in calls)) == len(calls)
    # `depth` counts the steps the inputs already took: waves 0, 1, ..., depth - 1 in order.
    assert sorted(set(depth for depth, _, _ in calls)) == list(range(schedule.depth))
    assert [depth for depth, _, _ in calls] == sorted(depth for depth, _, _ in calls)
    assert sum(size for _, _, size in calls) == schedule.evaluations * len(initial)


def test_structure_of_a_small_schedule():
    # Expected by hand: strides (4, 1) and targets 0, 1, 5, 9, 8 give plans (), (1), (4, 1),
    # (4, 4, 1), (4, 4): nodes root, 1, 4, 4+1, 4+4, 4+4+1.
    planner = StridePlanner((1, 4))
    schedule = build_schedule([0, 1, 5, 9, 8], planner)
    assert schedule.node_count == 6
    assert schedule.evaluations == 5
    assert schedule.depth == 3
    assert schedule.calls == 5  # nodes at depth 1: strides 4, 1; depth 2: 4, 1; depth 3: 1
    assert [[stride for stride, _, _ in wave] for wave in schedule.waves] == [[4, 1], [4, 1], [1]]
    assert schedule.target_nodes[0] == 0
    for stride_group in (group for wave in schedule.waves for group in wave):
        _, parents, children = stride_group
        assert len(parents) == len(children)
        assert not children.flags.writeable


def test_depth_for_power_of_four_strides():
    # Design formula: depth ≈ n_max / k_max + Σ (k_{i+1}/k_i − 1); with strides 1, 4, 16 and
    # every target up to 63 = 3·16 + 3·4 + 3 the longest plan is 3 + 3 + 3 = 9 steps
    # (greedy is optimal for powers of a base, common knowledge).
    planner = StridePlanner((1, 4, 16))
    schedule = build_schedule(range(64), planner)
    assert schedule.depth == 63 // 16 + (4 - 1) + (4 - 1)
    # Each target is its own node (it is a prefix of nothing shorter), so 63 evaluations
    # serve all 64 targets instead of Σ plan lengths.
    assert schedule.evaluations == 63
    total_plan_steps = sum(len(expanded(planner, n)) for n in range(64))
    assert total_plan_steps > schedule.evaluations


def test_check_and_step_see_depth_and_stride():
    planner = StridePlanner((1, 2))
    schedule = build_schedule([3], planner)

    def step(stride, states, depth):
        return np.full_like(states, np.nan) if depth == 1 else states + stride

    def check(depth, stride, outputs):
        if not np.isfinite(outputs).all():
            raise StateError(f"non-finite at depth {depth}, stride {stride}.")

    # Plan for 3 is (2, 1): the second step (depth 1: one step already taken) has stride 1.
    with pytest.raises(StateError, match=r"non-finite at depth 1, stride 1\."):
        run_schedule(schedule, np.zeros((1, 1)), step, check)


def test_wrong_step_shape_is_reported():
    schedule = build_schedule([2], StridePlanner((2,)))
    with pytest.raises(StateError, match=r"stride 2 at depth 0 must return shape \(3, 2\)"):
        run_schedule(schedule, np.zeros((3, 2)), lambda stride, states, depth: states[:1])


def test_bad_initial_shape():
    schedule = build_schedule([2], StridePlanner((2,)))
    with pytest.raises(StateError, match=r"`initial` must have shape \(B, d\); got .*\(2,\)"):
        run_schedule(schedule, np.zeros(2), lambda stride, states, depth: states)


def test_unreachable_target_raises_time_error():
    with pytest.raises(TimeError, match=r"target of 3 base steps is not reachable"):
        build_schedule([2, 3], StridePlanner((2,)))


def test_empty_and_repeated_targets():
    planner = StridePlanner((1, 2))
    empty = build_schedule([], planner)
    assert empty.node_count == 1 and empty.depth == 0
    assert run_schedule(empty, np.zeros((2, 3)), lambda s, x, d: x).shape == (0, 2, 3)
    repeated = build_schedule([3, 3, 0], planner)
    assert repeated.evaluations == 2
    result = run_schedule(repeated, np.ones((1, 1)), lambda s, x, d: x + s)
    np.testing.assert_array_equal(result[:, 0, 0], [4.0, 4.0, 1.0])


def test_large_dense_forecast_builds_quickly():
    # 10,000 targets on power-of-two strides: prefix sharing keeps evaluations at the
    # number of distinct plan prefixes (brute-force count, common practice).
    planner = StridePlanner(tuple(2**i for i in range(11)))
    targets = np.arange(1, 10_001) * 7
    schedule = build_schedule(targets, planner)
    assert schedule.evaluations == len(brute_force_nodes(planner, targets.tolist()))
    result = run_schedule(schedule, np.zeros((2, 1), dtype=np.float32), lambda s, x, d: x + s)
    np.testing.assert_array_equal(result[:, 0, 0], targets.astype(np.float32))
