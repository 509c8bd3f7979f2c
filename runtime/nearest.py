"""Nearest-sample search over a few thousand points with NumPy alone, vectorised over queries.

Two exact methods. Brute force in blocks: |q − s|² = |q|² − 2 q·s + |s|², with −2 sᵀ and |s|²
prepared once. With a radius, first a fixed-radius grid: cells of side ≥ the radius, each
listing the samples within the radius of some point of it (all lie in its 3^d block), so a
query's own cell list settles it whenever its nearest sample is within the radius (the common
case: visited states near the training data); only the others ("far") pay for brute force.
A pruned tree of median-split leaves was tried and measured slower at the sizes a bundle keeps
(`benchmarks/trust_bench.py`): NumPy pays per call.
"""

from __future__ import annotations

import itertools
import math

import numpy as np

# Values per block of the query × sample matrix (8 MiB of float64), whatever the sample count.
_CHUNK_VALUES = 1 << 20
# The grid is built up to this dimension. Beyond, a cell's 3^d block (2,187 cells at d = 7)
# holds about as many samples as brute force reads, and the N · 3^d pairs of the build
# outgrow `_MAX_NEAR_VALUES` already at d = 5 beyond ~3,400 samples, d = 6 beyond ~950
# (measured on random data, d = 2..8: brute force answered as fast from d = 5 on).
GRID_MAX_DIM = 6
# The grid is used only if its longest cell list is below N / this. A choice, not a tuned
# value: every query of a step reads as many candidates as the longest list among them, and
# per candidate the grid costs a few times what brute force costs per sample (a gather and
# three-dimensional temporaries).
_MIN_GAIN = 4
# Bound of the grid's memory: the neighbourhoods' samples, N · 3^d rows of d float64 values
# (32 MiB; the shipped crane bundle: 2,048 · 81 · 4, 5 MiB); and cells of the dense
# key → list tables (two int32: 16 MiB; beyond, the occupied keys are searched with searchsorted).
_MAX_NEAR_VALUES = 1 << 22
_DENSE_CELLS = 1 << 21
# Cell keys times N (the build's sort key) must fit int64.
_MAX_KEYS = 1 << 62
# Cells are wider than the radius by 2e-6 and lists take samples up to 1e-6 beyond it: the
# rounding of a cell coordinate, ~1e-16 of a cell index below `_MAX_CELL_INDEX`, can then
# neither lose a candidate nor place a candidate outside the 3^d block.
_SIDE_MARGIN = 1.0 + 2e-6
_LIST_MARGIN = 1.0 + 1e-6
_MAX_CELL_INDEX = 1 << 29
# Below this many query × sample pairs, brute force: its few NumPy calls cost no more than
# the grid's two dozen (measured on the shipped crane bundle, N = 2,048, d = 4, queries near
# the data, load ~1 on 2 cores: equal from 1 to 5 queries, the grid 1.2× faster at 8, 1.9×
# at 20, 1.8× at 40). So from 8 queries of 2,048 samples; a single state's `advance` visits
# fewer, and never pays for building the grid (~31 ms and ~4 MB on that bundle).
_GRID_MIN_WORK = 8 * 2048
# Float64 values of the (queries, L, d) block of candidates per step of the grid search.
_GRID_CHUNK_VALUES = 1 << 20


class SampleIndex:
    """An immutable search structure over `samples`, shape (N, d).

    Parameters
    ----------
    samples : ndarray, shape (N, d)
    radius : float, optional
        With a radius (and d ≤ `GRID_MAX_DIM`), a fixed-radius grid answers the queries whose
        nearest sample is within it; the others, and every query without a radius, go to
        blocked brute force.
    """

    def __init__(self, samples: np.ndarray, radius: float | None = None):
        self.samples = np.ascontiguousarray(samples, dtype=np.float64)
        self._norms = np.einsum("nd,nd->n", self.samples, self.samples)
        self._minus_twice_t = np.ascontiguousarray(-2.0 * self.samples.T)
        self._samples_t = np.ascontiguousarray(self.samples.T)
        # Built on the first search large enough to use it (`_grid_for`): a process that only
        # answers single states (a CLI call) never pays for it.
        self._radius = None
        if radius is not None and 0 < self.samples.shape[1] <= GRID_MAX_DIM:
            self._radius = float(radius)
        self._grid = None
        self._grid_built = False

    def nearest(self, queries: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Distance to, and index of, the nearest sample of each query.

        The distance is √(Σ (q − s)²) of the winning sample, computed the same way by both
        methods, so they agree bit for bit when they pick the same sample. Brute force picks
        the smallest |s|² − 2 q·s, the grid the smallest direct distance (lowest index among
        exact ties): they may pick different samples only when two distances agree to the
        rounding of the expanded form (~1e-16 · |s|²).

        Parameters
        ----------
        queries : ndarray, shape (M, d)

        Returns
        -------
        distance : ndarray, shape (M,)
        index : ndarray of int64, shape (M,)
        """
        queries = np.ascontiguousarray(queries, dtype=np.float64)
        if self._radius is None or queries.shape[0] * self.samples.shape[0] < _GRID_MIN_WORK:
            return self._brute(queries)
        grid = self._grid_for()
        if grid is None:
            return self._brute(queries)
        distance, index, resolved = grid.search(queries)
        if not resolved.all():
            rest = np.flatnonzero(~resolved)
            distance[rest], index[rest] = self._brute(queries[rest])
        return distance, index

    def _grid_for(self):
        """The grid, built on first use (None where it does not pay). Threads racing here may
        each build one; the grids are identical and the last assignment wins."""
        if not self._grid_built:
            self._grid = None if self._radius is None else _Grid.build(self.samples,
                                                                        self._radius)
            self._grid_built = True
        return self._grid

    def _brute(self, queries: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        count = self.samples.shape[0]
        distance = np.empty(queries.shape[0])
        index = np.empty(queries.shape[0], dtype=np.int64)
        chunk = max(1, _CHUNK_VALUES // count)
        for start in range(0, queries.shape[0], chunk):
            block = queries[start:start + chunk]
            # einsum, not `@`: with d this small, BLAS threads cost more than they save, and
            # on a busy machine their hand-offs made the product ~100× slower (trust_bench).
            # |q|² is the same for every sample of a row, so the argmin does without it.
            partial = np.einsum("md,dn->mn", block, self._minus_twice_t)
            partial += self._norms
            best = np.argmin(partial, axis=1)
            index[start:start + chunk] = best
            distance[start:start + chunk] = np.sqrt(
                _squared_distances(np.take(self._samples_t, best, axis=1), block.T))
        return distance, index


def _squared_distances(gathered: np.ndarray, queries_t: np.ndarray) -> np.ndarray:
    """Σ_k (s_k − q_k)² over the first axis of `gathered` (d, ...), samples component-first,
    against `queries_t` (d, ...) broadcast to it; overwrites `gathered`.

    The one formula both methods report, so they agree bit for bit on the same sample: a sum
    over the first axis of a C-ordered array adds the components one after another, whatever
    the other axes (the expanded form |q|² − 2 q·s + |s|² loses digits when the distance is
    small next to the norms, so a winner is always measured directly). Component-first,
    because a sum over a short last axis costs a loop per row.
    """
    gathered -= queries_t
    gathered *= gathered
    return gathered.sum(axis=0)


class _Grid:
    """For every cell near the samples, its candidates: the samples within the radius of
    some point of the cell, stored one cell's list after another, each in index order.

    Cells have side `radius` · (1 + 2e-6) in normalised units, so candidates lie in the
    cell's 3^d block; a sample is listed if its distance to the cell's box is at most
    `radius` · (1 + 1e-6): the margins absorb the rounding of the cell coordinates
    (relative error ~1e-16 of a cell index below `_MAX_CELL_INDEX`). Coordinates start two
    cells below the samples', so every listed cell and every cell a query is looked up in
    has coordinates in 0 … extent − 1: their mixed-radix keys never wrap onto another cell.
    """

    def __init__(self, radius, origin, side, extents, strides, lookup, keys, near,
                 near_index):
        self.radius_squared = radius * radius
        self.origin = origin
        self.side = side
        self.extents = extents  # (d,) float: cell coordinates a key exists for are below
        self.strides = strides
        self.lookup = lookup  # (start, size) per key (dense), or per entry of `keys`
        self.keys = keys  # sorted keys of the listed cells; None when `lookup` is dense
        # Queries per step: (queries, longest, d) candidates stay near `_GRID_CHUNK_VALUES`.
        self.block = max(1, _GRID_CHUNK_VALUES // (int(lookup[1].max()) * near.shape[1]))
        self.near_t = np.ascontiguousarray(near.T)  # (d, pairs + longest): the lists, then
        # sentinels at +inf
        self.near_index = near_index  # (pairs + longest,) sample index of each entry
        self.empty = near.shape[0] - int(lookup[1].max())  # start of the sentinels
        self.steps = np.arange(int(lookup[1].max()))
        self.queries = np.arange(self.block)  # row numbers of a block of queries

    @classmethod
    def build(cls, samples: np.ndarray, radius: float) -> _Grid | None:
        """The grid of `samples` (N, d), or None where it does not pay or cannot be built
        (no samples, a radius that is not positive and finite, non-finite samples, keys
        beyond int64, lists too large or too long)."""
        count, dim = samples.shape
        if count == 0 or not (np.isfinite(radius) and radius > 0):
            return None
        if not np.isfinite(samples).all() or count * 3 ** dim * dim > _MAX_NEAR_VALUES:
            return None
        side = radius * _SIDE_MARGIN
        origin = samples.min(axis=0) - 2 * side
        coordinates = np.floor((samples - origin) / side)
        if coordinates.max() >= _MAX_CELL_INDEX:
            return None
        extents = coordinates.max(axis=0) + 3
        cell_count = math.prod(int(extent) for extent in extents)
        if cell_count * count >= _MAX_KEYS:
            return None
        strides = np.array([math.prod(int(extent) for extent in extents[i + 1:])
                            for i in range(dim)], dtype=np.int64)
        # Every (cell of the 3^d block, sample) pair, kept if the sample is within the
        # radius (with margin) of the cell's box.
        block = np.array(list(itertools.product((-1.0, 0.0, 1.0), repeat=dim)))
        pair_cell = (coordinates[:, None, :] + block).reshape(-1, dim)
        pair_sample = np.repeat(np.arange(count, dtype=np.int64), block.shape[0])
        low = origin + pair_cell * side
        outside = np.maximum(np.maximum(low - samples[pair_sample], 0.0),
                             samples[pair_sample] - (low + side))
        within = np.einsum("pd,pd->p", outside, outside) <= (radius * _LIST_MARGIN) ** 2
        pair_key = pair_cell[within].astype(np.int64) @ strides
        pair_sample = pair_sample[within]
        # Sorted by cell then sample index: argmin over a list then picks the lowest index
        # among exact ties, as brute force does over duplicates.
        order = np.argsort(pair_key * count + pair_sample)
        pair_key, pair_sample = pair_key[order], pair_sample[order]
        cells, first, sizes = np.unique(pair_key, return_index=True, return_counts=True)
        longest = int(sizes.max())
        if longest * _MIN_GAIN > count:
            return None
        near = np.vstack((samples[pair_sample], np.full((longest, dim), np.inf)))
        near_index = np.append(pair_sample, np.full(longest, count, dtype=np.int64))
        if cell_count <= _DENSE_CELLS:
            start = np.full(cell_count, pair_sample.size, dtype=np.int32)
            size = np.zeros(cell_count, dtype=np.int32)
            start[cells], size[cells] = first, sizes
            cells = None
        else:
            start, size = first.astype(np.int64), sizes.astype(np.int64)
        return cls(radius, origin, side, extents, strides, (start, size), cells, near,
                   near_index)

    def search(self, queries: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Nearest sample of each query (M, d) among its cell's candidates.

        Returns distance (M,), index (M,) and `resolved` (M,): True where the nearest
        candidate lies within the radius, which makes it the nearest sample of all (every
        sample within the radius is a candidate). Elsewhere distance and index are
        meaningless.
        """
        total, block = queries.shape[0], self.block
        if total <= block:
            return self._search_block(queries)
        parts = [self._search_block(queries[begin:begin + block])
                 for begin in range(0, total, block)]
        return tuple(np.concatenate(column) for column in zip(*parts, strict=True))

    def _search_block(self, queries):
        scaled = (queries - self.origin) / self.side
        # The common case in three calls: every query's cell has a key. Otherwise (a query
        # a cell or more beyond the keys, so more than the radius from every sample, or not
        # finite: its comparisons are False) such queries get no candidates.
        inside = scaled.min() >= 0 and (scaled < self.extents).all()
        if inside:
            keys = scaled.astype(np.int64) @ self.strides
        else:
            kept = ((scaled >= 0) & (scaled < self.extents)).all(axis=1)
            keys = np.where(kept[:, None], scaled, 0.0).astype(np.int64) @ self.strides
            # Such a query is measured at the origin against sentinels only (no inf − inf).
            queries = np.where(kept[:, None], queries, 0.0)
        start, size = self.lookup
        if self.keys is None:
            start, size = start[keys], size[keys]
        else:
            slot = np.searchsorted(self.keys, keys)
            np.minimum(slot, self.keys.size - 1, out=slot)
            hit = self.keys[slot] == keys
            start, size = np.where(hit, start[slot], self.empty), np.where(hit, size[slot], 0)
        if not inside:
            start, size = np.where(kept, start, self.empty), np.where(kept, size, 0)
        # Every query reads as many entries as the longest list of its block: past its own
        # list, the next lists' samples (or the sentinels). More samples than the candidates
        # never change the answer: every sample within the radius is among the candidates,
        # which come first and in index order.
        longest = size.max()
        position = start[:, None] + self.steps[:max(longest, 1)]  # (m, L)
        # np.take, not near_t[:, position]: mixed slice and array indexing measured ~3× slower.
        squared = _squared_distances(np.take(self.near_t, position, axis=1),
                                     queries.T[:, :, None])
        best = squared.argmin(axis=1)
        each = self.queries[:best.size]
        smallest = squared[each, best]
        index = self.near_index[position[each, best]]
        return np.sqrt(smallest), index, smallest <= self.radius_squared
