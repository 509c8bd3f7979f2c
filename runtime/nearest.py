"""Nearest-sample search over a few thousand points with NumPy alone, vectorised over queries.

The samples are split at medians into leaves of at most `LEAF_SIZE` points. A query measures
every leaf centre, then every member of its `PROBED` nearest leaves; the result is exact when
no other leaf can hold a nearer point (the leaf's centre distance minus its radius is not
smaller), and the rare remaining queries fall back to a brute-force search by matrix products.
"""

from __future__ import annotations

import numpy as np

LEAF_SIZE = 64
PROBED = 3
# Values per temporary block (8 MiB of float64) in the gathers and the brute-force products.
_CHUNK_VALUES = 1 << 20
# Below this many query-sample pairs the brute force is faster (measured in
# benchmarks/trust_bench.py: for 4096 samples, up to about 16 queries).
_BRUTE_FORCE_PAIRS = 1 << 16


class SampleIndex:
    """An immutable search structure over `samples`, shape (N, d)."""

    def __init__(self, samples: np.ndarray):
        self.samples = np.ascontiguousarray(samples, dtype=np.float64)
        leaves = _median_leaves(self.samples, LEAF_SIZE)
        width = max(leaf.size for leaf in leaves)
        # Leaves padded to one width by repeating their first member (a repeat never changes
        # a minimum), so members can be gathered as one rectangular array.
        self._members = np.stack([np.pad(leaf, (0, width - leaf.size), mode="edge")
                                  for leaf in leaves])  # (L, width)
        points = self.samples[self._members]  # (L, width, d)
        self._centres = points.mean(axis=1)
        self._radii = np.sqrt(((points - self._centres[:, None]) ** 2).sum(axis=2)).max(axis=1)
        self._norms = np.einsum("nd,nd->n", self.samples, self.samples)
        self._transposed = np.ascontiguousarray(self.samples.T)

    def nearest(self, queries: np.ndarray, *, within: float | None = None
                ) -> tuple[np.ndarray, np.ndarray]:
        """Distance to, and index of, the nearest sample of each query.

        Parameters
        ----------
        queries : ndarray, shape (M, d)
        within : float, optional
            If given, a query with some sample no farther than this may return that sample
            instead of the nearest one (distance ≤ `within` either way); queries beyond it
            always get the exact nearest. Saves the exactness check where only "is it near?"
            matters.

        Returns
        -------
        distance : ndarray, shape (M,)
        index : ndarray of int64, shape (M,)
        """
        queries = np.ascontiguousarray(queries, dtype=np.float64)
        count = queries.shape[0]
        if count * self.samples.shape[0] <= _BRUTE_FORCE_PAIRS:
            return self.brute_force(queries)  # fewer, larger array operations win here
        distance = np.empty(count)
        index = np.empty(count, dtype=np.int64)
        leaves, width = self._members.shape
        probed = min(PROBED, leaves)
        chunk = max(1, _CHUNK_VALUES // (probed * width * queries.shape[1] + leaves))
        for start in range(0, count, chunk):
            block = queries[start:start + chunk]
            centre = np.sqrt(((block[:, None, :] - self._centres[None]) ** 2).sum(axis=2))
            if probed < leaves:
                near = np.argpartition(centre, probed - 1, axis=1)[:, :probed]
            else:
                near = np.broadcast_to(np.arange(leaves), (block.shape[0], leaves))
            members = self._members[near].reshape(block.shape[0], -1)  # (m, probed · width)
            gap = self.samples[members] - block[:, None, :]
            squared = np.einsum("mkd,mkd->mk", gap, gap)
            best = squared.argmin(axis=1)
            rows = np.arange(block.shape[0])
            found = np.sqrt(squared[rows, best])
            # Exact unless an unprobed leaf could hold a nearer point.
            bound = centre - self._radii
            bound[rows[:, None], near] = np.inf
            unsure = bound.min(axis=1) < found
            if within is not None:
                unsure &= found > within
            distance[start:start + chunk] = found
            index[start:start + chunk] = members[rows, best]
            if unsure.any():
                redo = start + np.flatnonzero(unsure)
                distance[redo], index[redo] = self.brute_force(queries[redo])
        return distance, index

    def brute_force(self, queries: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """`nearest` by measuring every sample: |q − s|² = |q|² − 2 q·s + |s|² in blocks."""
        count = self.samples.shape[0]
        distance = np.empty(queries.shape[0])
        index = np.empty(queries.shape[0], dtype=np.int64)
        chunk = max(1, _CHUNK_VALUES // count)
        for start in range(0, queries.shape[0], chunk):
            block = queries[start:start + chunk]
            # einsum, not `@`: with d this small, BLAS threads cost more than they save, and
            # on a busy machine their hand-offs made the product ~100× slower (trust_bench).
            squared = np.einsum("md,dn->mn", block, self._transposed)
            squared *= -2.0
            squared += self._norms
            best = np.argmin(squared, axis=1)
            index[start:start + chunk] = best
            # The expanded form loses digits when the distance is small next to the norms;
            # the winner's distance is measured again directly.
            gap = block - self.samples[best]
            distance[start:start + chunk] = np.sqrt(np.einsum("md,md->m", gap, gap))
        return distance, index


def _median_leaves(samples: np.ndarray, leaf_size: int) -> list[np.ndarray]:
    """Split sample indices at the median of the widest coordinate until leaves are small."""
    pending = [np.arange(samples.shape[0])]
    leaves = []
    while pending:
        indices = pending.pop()
        if indices.size <= leaf_size:
            leaves.append(indices)
            continue
        points = samples[indices]
        axis = int(np.argmax(points.max(axis=0) - points.min(axis=0)))
        order = np.argsort(points[:, axis], kind="stable")
        half = indices.size // 2
        pending += [indices[order[:half]], indices[order[half:]]]
    return leaves
