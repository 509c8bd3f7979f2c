"""Fewest-step plans: reach n base steps as a sum of network strides, coarse first.

`StridePlanner` is built once per stride set and answers `steps(n)` exactly and fast for any n.

The problem is unbounded coin change: minimise Σ count_k subject to Σ count_k·k = n over the
strides k ∈ S. Greedy is optimal only for some stride sets (e.g. powers of two), so the planner
is exact for every set. Among the plans with the fewest steps it returns the *canonical* one:
the plan with the most steps of the largest stride, then of the next largest, and so on
(lexicographically largest counts, coarse first). Both methods below return that same plan.

Method and proof
----------------
Let K be the largest stride and call the other strides *small*.

*Few small coins.* An optimal plan uses fewer than K small coins. Suppose it used K or more;
take K of them, c_1..c_K, and their prefix sums P_0 = 0, P_1, ..., P_K. These K + 1 numbers
fall into K residue classes mod K, so P_i ≡ P_j for some i < j: the coins c_(i+1)..c_j sum to
m·K with m ≥ 1, and since each is < K, m < j − i. Replacing them by m coins of K keeps the sum
and removes j − i − m > 0 coins, contradicting optimality.

*Residue shortest path.* If a plan uses small coins k_1..k_s with total v, it uses (n − v)/K
coins of K, so its count is (n − v)/K + s = (n + w)/K with w = Σ (K − k_i) ≥ s. Hence,
for a residue r = n mod K, the count is minimal exactly when w is minimal over multisets of
small coins whose sum is ≡ r (mod K), subject to feasibility v ≤ n. Dropping the feasibility
constraint gives a shortest-path problem on the K residues (edge r → r + k mod K of weight
K − k ≥ 1 for each small k), solved once by Dijkstra. We order paths lexicographically by
(w, v, −count of each small stride, largest first): every edge is lexicographically positive,
so Dijkstra is exact on this totally ordered group, the optimum is a simple path (< K coins),
and among all minimum-w multisets it has the smallest v (most K coins) and then the most
coarse small coins -- the canonical plan. If its v ≤ n it is feasible, its count equals the
unconstrained lower bound, and it is optimal. Since a simple path has v < K·k₂ (k₂ the
second-largest stride), this covers every n ≥ (K − 1)·k₂; the planner checks v ≤ n per residue.

*Small targets.* For the remaining n (below the per-residue v, at most (K − 1)·k₂) the planner
uses an exact table f(v) = fewest coins for v, over 0..L, built with NumPy: adding stride k,
f_new(v) = min_j f(v − j·k) + j. Writing v = r + i·k along the residue chain of r mod k, this
is i + (prefix minimum over i' ≤ i of f(r + i'·k) − i'), one `minimum.accumulate` per stride
on the table reshaped to (L/k, k). The table is built lazily, grown geometrically, cached,
guarded by a lock, and capped (`max_table_entries`). The canonical plan is read back coarse
first: for each stride k from the largest, take the largest j with f(v − j·k) = f(v) − j (the
valid j form a prefix, so one vectorised comparison finds it).

*Reachability.* n is reachable iff n ≥ minval[n mod K], where minval[r] is the smallest
representable value in residue class r (Dijkstra with edge weight k): adding K preserves
representability and a representable value's small coins sum to at least minval[r].

Building costs O(K·|S|·log K) (Python-level Dijkstra, twice); a query costs O(|S|) once built
(plus, for small targets, a one-off table of at most (K − 1)·k₂ entries).
"""

from __future__ import annotations

import heapq
import operator
import threading
from collections.abc import Iterable

import numpy as np

from .errors import TimeError
from .validation import check_strides

# Targets beyond this are refused so residue arithmetic stays inside int64.
MAX_TARGET = 2**62
# Marks "no combination" in the int32 count table; far above any real count (<= 2**24).
_NO_PLAN = 2**30


def _validate_target(n: int) -> int:
    """Return n as a non-negative int within `MAX_TARGET`, or raise `TimeError`."""
    if isinstance(n, bool):
        raise TimeError(f"target must be a non-negative integer of base steps; got {n!r}.")
    try:
        value = operator.index(n)
    except TypeError as error:
        raise TimeError(
            f"target must be a non-negative integer of base steps; got {n!r}."
        ) from error
    if value < 0:
        raise TimeError(f"target must be a non-negative integer of base steps; got {value}.")
    if value > MAX_TARGET:
        raise TimeError(
            f"target of {value} base steps exceeds the planner's range of {MAX_TARGET}."
        )
    return value


def _smallest_values(largest: int, small: tuple[int, ...]) -> np.ndarray:
    """Smallest representable value in each residue class mod `largest` (-1: none)."""
    best = [-1] * largest
    best[0] = 0
    heap = [(0, 0)]
    done = [False] * largest
    while heap:
        value, residue = heapq.heappop(heap)
        if done[residue]:
            continue
        done[residue] = True
        for stride in small:
            candidate = value + stride
            target = candidate % largest
            if not done[target] and (best[target] < 0 or candidate < best[target]):
                best[target] = candidate
                heapq.heappush(heap, (candidate, target))
    return np.array(best, dtype=np.int64)


def _residue_plans(
    largest: int, small: tuple[int, ...]
) -> tuple[list[int], list[int], list[tuple[int, ...] | None]]:
    """Lexicographic Dijkstra over residues mod `largest` (see the module docstring).

    Returns per residue the minimal extra weight w, the small-coin total v of the canonical
    minimum, and its small-coin counts (ordered like `small`); None where unreachable.
    """
    # Each key is (w, v, -count of small[0], -count of small[1], ...).
    zero = (0,) * (2 + len(small))
    edges = []
    for index, stride in enumerate(small):
        vector = [largest - stride, stride] + [0] * len(small)
        vector[2 + index] = -1
        edges.append((stride, tuple(vector)))
    keys: list[tuple[int, ...] | None] = [None] * largest
    keys[0] = zero
    done = [False] * largest
    heap = [(zero, 0)]
    while heap:
        key, residue = heapq.heappop(heap)
        if done[residue]:
            continue
        done[residue] = True
        for stride, vector in edges:
            target = (residue + stride) % largest
            if done[target]:
                continue
            candidate = tuple(a + b for a, b in zip(key, vector, strict=True))
            current = keys[target]
            if current is None or candidate < current:
                keys[target] = candidate
                heapq.heappush(heap, (candidate, target))
    weights = [-1 if key is None else key[0] for key in keys]
    totals = [-1 if key is None else key[1] for key in keys]
    counts = [None if key is None else tuple(-c for c in key[2:]) for key in keys]
    return weights, totals, counts


def _count_table(strides: tuple[int, ...], size: int) -> np.ndarray:
    """Fewest coins for every value 0..size-1 (`_NO_PLAN` where none), as int32."""
    table = np.full(size, _NO_PLAN, dtype=np.int32)
    table[0] = 0
    for stride in strides:
        if stride >= size:
            continue
        rows = -(-size // stride)
        grid = np.full(rows * stride, _NO_PLAN, dtype=np.int32)
        grid[:size] = table
        grid = grid.reshape(rows, stride)
        offsets = np.arange(rows, dtype=np.int32)[:, None]
        # Along a residue chain f_new(i) = i + min_{i' <= i} (f(i') - i').
        grid -= offsets
        np.minimum.accumulate(grid, axis=0, out=grid)
        grid += offsets
        np.minimum(grid, _NO_PLAN, out=grid)
        table = grid.reshape(-1)[:size].copy()
    return table


def _plan_from_table(
    table: np.ndarray, strides: tuple[int, ...], n: int
) -> tuple[tuple[int, int], ...]:
    """Read the canonical plan for n back from a count table, coarse first."""
    plan = []
    remaining = n
    for stride in strides:
        left = int(table[remaining])
        if left == 0:
            break
        most = min(remaining // stride, left)
        if most == 0:
            continue
        taken = np.arange(1, most + 1, dtype=np.int64)
        keeps_optimal = table[remaining - taken * stride] == left - taken
        count = most if keeps_optimal.all() else int(np.argmin(keeps_optimal))
        if count:
            plan.append((stride, count))
            remaining -= count * stride
    return tuple(plan)


class StridePlanner:
    """Exact fewest-step plans over a fixed set of strides.

    Parameters
    ----------
    strides : iterable of int
        Distinct positive strides, in base steps.
    max_steps : int, optional
        Largest number of steps a plan may have; longer plans raise `TimeError`.
    max_table_entries : int, optional
        Cap on the exact table used for small targets (see the module docstring).

    Raises
    ------
    BundleError
        If `strides` is empty, holds a non-positive or non-integer value, or repeats one.

    Notes
    -----
    Instances are safe to share between threads: the only mutable state is the lazily built
    small-target table, which is built under a lock and replaced atomically.
    """

    def __init__(
        self,
        strides: Iterable[int],
        *,
        max_steps: int = 1_000_000,
        max_table_entries: int = 2**24,
    ) -> None:
        self._strides = check_strides(strides)[::-1]  # largest first
        self._max_steps = int(max_steps)
        self._max_table_entries = int(max_table_entries)
        self._largest = self._strides[0]
        small = self._strides[1:]
        self._min_value = _smallest_values(self._largest, small)
        self._weight, self._small_total, self._small_counts = _residue_plans(self._largest, small)
        # Every n below this may need the table: the Dijkstra plan of its residue overshoots n.
        self._table_bound = max(self._small_total)
        # The same per-residue plans as arrays, for `count_matrix` (-1 rows: unreachable).
        self._small_total_array = np.asarray(self._small_total, dtype=np.int64)
        self._small_count_array = np.asarray(
            [c if c is not None else (-1,) * len(small) for c in self._small_counts],
            dtype=np.int64).reshape(self._largest, len(small))
        self._table: np.ndarray | None = None
        self._lock = threading.Lock()

    @property
    def strides(self) -> tuple[int, ...]:
        """The strides, largest first."""
        return self._strides

    @property
    def max_steps(self) -> int:
        """The largest number of steps a plan may have."""
        return self._max_steps

    def is_reachable(self, n: int) -> bool:
        """Whether some combination of strides sums to exactly n base steps."""
        n = _validate_target(n)
        floor = int(self._min_value[n % self._largest])
        return 0 <= floor <= n

    def nearest_reachable(self, n: int) -> tuple[int | None, int | None]:
        """Largest reachable target ≤ n and smallest reachable target ≥ n.

        Returns
        -------
        below, above : int or None
            Both equal n when n is reachable. Target 0 (the empty plan) is always reachable,
            so in practice neither is None; the type allows None for callers' generality.
        """
        n = _validate_target(n)
        if self.is_reachable(n):
            return n, n
        residues = np.arange(self._largest, dtype=np.int64)
        known = self._min_value >= 0
        below = n - (n - residues) % self._largest
        below_ok = known & (below >= self._min_value)
        above = np.maximum(self._min_value, n + (residues - n) % self._largest)
        lower = int(below[below_ok].max()) if below_ok.any() else None
        return lower, int(above[known].min())

    def floor_reachable(self, n: int) -> int | None:
        """Largest reachable target ≤ n, or None when there is none."""
        return self.nearest_reachable(n)[0]

    def steps(self, n: int) -> tuple[tuple[int, int], ...]:
        """The canonical fewest-step plan for n base steps.

        Parameters
        ----------
        n : int
            Target, in base steps (non-negative).

        Returns
        -------
        tuple of (stride, count)
            Coarse first, every count > 0, Σ count·stride == n, Σ count minimal; () for n = 0.

        Raises
        ------
        TimeError
            If n is negative or not an integer, no combination of strides reaches it (the
            message names the nearest reachable targets), the plan needs more than
            `max_steps` steps, or the small-target table would exceed its cap.
        """
        n = _validate_target(n)
        if n == 0:
            return ()
        if not self.is_reachable(n):
            lower, upper = self.nearest_reachable(n)
            below = "none below" if lower is None else f"{lower} below"
            raise TimeError(
                f"target of {n} base steps is not reachable with strides {self._strides}; "
                f"nearest reachable targets: {below} and {upper} above."
            )
        residue = n % self._largest
        small_total = self._small_total[residue]
        if small_total <= n:
            count = (n + self._weight[residue]) // self._largest
            self._check_count(n, count)
            return self._residue_plan(n, residue)
        table = self._table_for(n)
        self._check_count(n, int(table[n]))
        return _plan_from_table(table, self._strides, n)

    def reachable_mask(self, targets: np.ndarray) -> np.ndarray:
        """`is_reachable` for an array of non-negative integer targets."""
        values = np.asarray(targets, dtype=np.int64)
        floors = self._min_value[values % self._largest]
        return (floors >= 0) & (floors <= values)

    def count_matrix(self, targets: np.ndarray) -> np.ndarray:
        """Plans of many targets at once: counts of shape (len(targets), len(strides)).

        Columns follow `strides` (largest first); each row is the plan `steps` returns. Targets
        on the residue shortest path (all but small ones) are planned in one vectorised pass.
        """
        values = np.asarray(targets)
        if values.ndim != 1 or (values.size and values.dtype.kind not in "iu"):
            raise TimeError("targets must be a 1-D array of integers (base steps).")
        values = values.astype(np.int64, copy=False)
        if values.size and (values.min() < 0 or values.max() > MAX_TARGET):
            bad = values[(values < 0) | (values > MAX_TARGET)][0]
            _validate_target(int(bad))
        residues = values % self._largest
        floors = self._min_value[residues]
        unreachable = (floors < 0) | (floors > values)
        if unreachable.any():
            self.steps(int(values[unreachable][0]))  # raises, naming the nearest targets
        counts = np.zeros((values.size, len(self._strides)), dtype=np.int64)
        totals = self._small_total_array[residues]
        fast = totals <= values
        if len(self._strides) > 1:
            counts[fast, 1:] = self._small_count_array[residues[fast]]
        counts[fast, 0] = (values[fast] - totals[fast]) // self._largest
        column = {stride: index for index, stride in enumerate(self._strides)}
        for index in np.flatnonzero(~fast):
            for stride, count in self.steps(int(values[index])):
                counts[index, column[stride]] = count
        steps = counts.sum(axis=1)
        if steps.size and steps.max() > self._max_steps:
            worst = int(np.argmax(steps))
            self._check_count(int(values[worst]), int(steps[worst]))
        return counts

    def step_count(self, n: int) -> int:
        """Number of steps (network evaluations) in the plan for n base steps."""
        return sum(count for _, count in self.steps(n))

    def _check_count(self, n: int, count: int) -> None:
        if count > self._max_steps:
            raise TimeError(
                f"target of {n} base steps needs {count} steps, more than the limit of "
                f"{self._max_steps} (`max_steps`)."
            )

    def _residue_plan(self, n: int, residue: int) -> tuple[tuple[int, int], ...]:
        small_counts = self._small_counts[residue]
        largest_count = (n - self._small_total[residue]) // self._largest
        plan = [(self._largest, largest_count)] if largest_count else []
        plan.extend(
            (stride, count)
            for stride, count in zip(self._strides[1:], small_counts, strict=True)
            if count
        )
        return tuple(plan)

    def _table_for(self, n: int) -> np.ndarray:
        """The count table covering n, built or grown under the lock on first need."""
        table = self._table
        if table is not None and n < table.size:
            return table
        if n >= self._max_table_entries:
            raise TimeError(
                f"planning {n} base steps with strides {self._strides} needs an exact table "
                f"of more than {self._max_table_entries} entries (`max_table_entries`)."
            )
        with self._lock:
            table = self._table
            if table is None or n >= table.size:
                current = 0 if table is None else table.size
                # Grow geometrically so repeated small queries rebuild O(log) times.
                size = max(n + 1, 2 * current, 1024)
                size = min(size, self._table_bound, self._max_table_entries)
                table = _count_table(self._strides, max(size, n + 1))
                self._table = table
        return table
