"""Property tests of the fewest-step planner against brute force."""

from __future__ import annotations

import time
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from functools import lru_cache

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from stridecast.runtime.errors import BundleError, TimeError
from stridecast.runtime.planner import StridePlanner, _count_table, _plan_from_table

LIMIT = 2000


@lru_cache(maxsize=256)
def brute_force_counts(strides: tuple[int, ...], limit: int) -> tuple[int, ...]:
    """Fewest steps for every value 0..limit by breadth-first search (-1: unreachable)."""
    counts = [-1] * (limit + 1)
    counts[0] = 0
    queue = deque([0])
    while queue:
        value = queue.popleft()
        for stride in strides:
            nxt = value + stride
            if nxt <= limit and counts[nxt] < 0:
                counts[nxt] = counts[value] + 1
                queue.append(nxt)
    return tuple(counts)


def all_plans(strides: tuple[int, ...], n: int) -> list[tuple[int, ...]]:
    """Every count vector (ordered like `strides`) with Σ count·stride == n, by enumeration."""
    if not strides:
        return [()] if n == 0 else []
    head, tail = strides[0], strides[1:]
    return [
        (count, *rest)
        for count in range(n // head + 1)
        for rest in all_plans(tail, n - count * head)
    ]


stride_sets = st.lists(
    st.integers(min_value=1, max_value=40), min_size=1, max_size=5, unique=True
).map(tuple)


@settings(max_examples=150, deadline=None)
@given(strides=stride_sets, data=st.data())
def test_steps_match_brute_force(strides, data):
    # Expected minimal counts: breadth-first search over values (common practice).
    planner = StridePlanner(strides)
    counts = brute_force_counts(tuple(sorted(strides)), LIMIT)
    targets = data.draw(st.lists(st.integers(0, LIMIT), min_size=1, max_size=40))
    for n in targets:
        assert planner.is_reachable(n) == (counts[n] >= 0)
        if counts[n] < 0:
            with pytest.raises(TimeError, match=rf"target of {n} base steps is not reachable"):
                planner.steps(n)
            continue
        plan = planner.steps(n)
        used = [stride for stride, _ in plan]
        assert used == sorted(used, reverse=True)  # coarse first, each stride once
        assert len(set(used)) == len(used)
        assert all(count > 0 for _, count in plan)
        assert sum(stride * count for stride, count in plan) == n
        assert sum(count for _, count in plan) == counts[n]


@settings(max_examples=150, deadline=None)
@given(strides=stride_sets, n=st.integers(0, LIMIT - 100))
def test_nearest_reachable_matches_brute_force(strides, n):
    # Expected neighbours: a linear scan of the breadth-first search table (common practice).
    planner = StridePlanner(strides)
    counts = brute_force_counts(tuple(sorted(strides)), LIMIT)
    below = next((m for m in range(n, -1, -1) if counts[m] >= 0), None)
    above = next((m for m in range(n, LIMIT + 1) if counts[m] >= 0), None)
    if above is None:  # beyond the scanned range; only the lower neighbour is checked
        assert planner.nearest_reachable(n)[0] == below
    else:
        assert planner.nearest_reachable(n) == (below, above)
    assert planner.floor_reachable(n) == below


@settings(max_examples=100, deadline=None)
@given(strides=stride_sets, n=st.integers(0, LIMIT))
def test_plan_has_most_coarse_steps_among_optimal_plans(strides, n):
    # Expected: the largest count of the largest stride that keeps the total minimal,
    # read from the breadth-first search table (common practice).
    planner = StridePlanner(strides)
    counts = brute_force_counts(tuple(sorted(strides)), LIMIT)
    if counts[n] < 0:
        return
    largest = max(strides)
    best = max(j for j in range(n // largest + 1) if counts[n - j * largest] == counts[n] - j)
    plan = dict(planner.steps(n))
    assert plan.get(largest, 0) == best


@pytest.mark.parametrize(
    "strides", [(1, 3, 4), (5, 7), (6, 10, 15), (2, 5, 9, 13), (1, 2, 4, 8), (3, 11, 17)]
)
def test_plan_is_lexicographically_most_coarse(strides):
    # Expected: exhaustive enumeration of every plan (common practice).
    planner = StridePlanner(strides)
    ordered = tuple(sorted(strides, reverse=True))
    for n in range(0, 70):
        plans = all_plans(ordered, n)
        if not plans:
            assert not planner.is_reachable(n)
            continue
        fewest = min(sum(plan) for plan in plans)
        expected = max(plan for plan in plans if sum(plan) == fewest)
        got = dict(planner.steps(n))
        assert tuple(got.get(stride, 0) for stride in ordered) == expected


@pytest.mark.parametrize(
    "strides", [(1, 3, 7, 64, 250, 1000), (6, 10, 15), (7, 11, 13, 64, 63), (25, 24, 1)]
)
def test_table_and_residue_methods_agree(strides):
    # Expected: both exact methods must return the same canonical plan where both apply
    # (the module docstring proves each; this checks the implementations agree).
    planner = StridePlanner(strides)
    largest = planner.strides[0]
    start = planner._table_bound
    size = start + 3 * largest
    table = _count_table(planner.strides, size)
    for n in range(start, size):
        if planner.is_reachable(n):
            assert planner.steps(n) == _plan_from_table(table, planner.strides, n)


def test_greedy_strides_plan_large_targets_fast():
    # Expected: greedy (binary digits) is optimal for powers of two, a canonical coin
    # system (common knowledge).
    strides = tuple(2**i for i in range(11))
    started = time.perf_counter()
    planner = StridePlanner(strides, max_steps=10**12)
    built = time.perf_counter() - started
    assert built < 0.25  # target is ~15 ms; the bound leaves room for slow CI machines
    rng = np.random.default_rng(0)
    targets = [10**9, 10**12, 10**12 + 1023, *rng.integers(0, 10**12, 200).tolist()]
    started = time.perf_counter()
    plans = [planner.steps(n) for n in targets]
    per_plan = (time.perf_counter() - started) / len(targets)
    assert per_plan < 1e-3
    for n, plan in zip(targets, plans, strict=True):
        greedy = []
        remaining = n
        for stride in reversed(strides):
            if remaining // stride:
                greedy.append((stride, remaining // stride))
                remaining %= stride
        assert plan == tuple(greedy)


def test_non_greedy_set_builds_fast_and_beats_greedy():
    # Expected: no stride is ≡ 6 (mod 1000), so the remainder 6 needs two small steps, 3 + 3
    # (hand check); for 6 with strides (1, 3, 4) greedy gives 4+1+1 but 3+3 is shorter
    # (textbook coin-change counterexample).
    started = time.perf_counter()
    planner = StridePlanner((1, 3, 7, 64, 250, 1000), max_steps=10**12)
    assert time.perf_counter() - started < 0.25
    assert planner.steps(10**12 + 6) == ((1000, 10**9), (3, 2))
    assert StridePlanner((1, 3, 4)).steps(6) == ((3, 2),)


def test_table_is_shared_safely_between_threads():
    # Expected: the exact table answers equal the single-threaded ones (breadth-first search
    # would give the same counts; checked above), whichever thread builds the table first.
    strides = (1, 24, 25)
    targets = list(range(0, 600, 7))
    expected = [StridePlanner(strides).steps(n) for n in targets]
    planner = StridePlanner(strides)
    with ThreadPoolExecutor(max_workers=4) as pool:
        results = list(pool.map(planner.steps, targets * 4))
    assert results == expected * 4


def test_zero_target_is_empty_plan():
    assert StridePlanner((3, 5)).steps(0) == ()
    assert StridePlanner((3, 5)).nearest_reachable(0) == (0, 0)


def test_unreachable_message_names_neighbours():
    # Expected: with strides 4 and 6 only even values ≥ 4 are reachable (hand count).
    planner = StridePlanner((4, 6))
    with pytest.raises(TimeError, match=r"target of 7 base steps .* 6 below and 8 above\."):
        planner.steps(7)
    with pytest.raises(TimeError, match=r"target of 2 base steps .* 0 below and 4 above\."):
        planner.steps(2)


def test_max_steps_limit():
    planner = StridePlanner((1, 10), max_steps=5)
    assert planner.steps(50) == ((10, 5),)
    with pytest.raises(TimeError, match=r"needs 6 steps, more than the limit of 5"):
        planner.steps(51)


def test_table_cap():
    # With strides (25, 24, 1), residue 23 is cheapest as 24 + 24 (v = 48), so 23 itself
    # (only 23 ones reach it) needs the exact table (module docstring; hand check).
    planner = StridePlanner((25, 24, 1), max_table_entries=10)
    assert planner.steps(48) == ((24, 2),)
    with pytest.raises(TimeError, match=r"more than 10 entries \(`max_table_entries`\)\."):
        planner.steps(23)
    assert StridePlanner((25, 24, 1)).steps(23) == ((1, 23),)


@pytest.mark.parametrize(
    ("strides", "message"),
    [
        ((), r"`strides` is \(\); expected a non-empty list of strides\."),
        ((1, 0), r"stride 0 must be a positive number of base steps\."),
        ((2, -3), r"stride -3 must be a positive number of base steps\."),
        ((1.5,), r"stride 1.5 is not an integer; strides are whole base steps\."),
        ((True,), r"stride True is not an integer"),
        ((4, 4), r"`strides` repeats a stride: \[4, 4\]; strides must be distinct\."),
    ],
)
def test_bad_strides(strides, message):
    with pytest.raises(BundleError, match=message):
        StridePlanner(strides)


@pytest.mark.parametrize("target", [-1, 2.0, "3", 2**63])
def test_bad_targets(target):
    with pytest.raises(TimeError, match=r"target"):
        StridePlanner((1,)).steps(target)


def test_numpy_integer_targets():
    planner = StridePlanner(np.array([1, 4], dtype=np.int64))
    assert planner.steps(np.int64(9)) == ((4, 2), (1, 1))


@settings(max_examples=60, deadline=None)
@given(
    strides=st.lists(st.integers(1, 40), min_size=1, max_size=5, unique=True),
    targets=st.lists(st.integers(0, 3000), min_size=1, max_size=40),
)
def test_count_matrix_equals_steps(strides, targets):
    # Reference: the scalar `steps`, itself checked against brute force above.
    planner = StridePlanner(strides)
    reachable = [n for n in targets if planner.is_reachable(n)]
    assert planner.reachable_mask(np.asarray(targets)).tolist() == [
        planner.is_reachable(n) for n in targets]
    if not reachable:
        return
    counts = planner.count_matrix(np.asarray(reachable))
    for row, target in zip(counts, reachable, strict=True):
        expected = dict(planner.steps(target))
        assert {s: int(c) for s, c in zip(planner.strides, row, strict=True) if c} == expected
