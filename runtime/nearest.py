"""Nearest-sample search over a few thousand points with NumPy alone, vectorised over queries.

Brute force in blocks: |q − s|² = |q|² − 2 q·s + |s|², with −2 sᵀ and |s|² prepared once.
A pruned tree of median-split leaves was tried and measured slower at the sizes a bundle
keeps (thousands of samples, a handful of components; `benchmarks/trust_bench.py`): NumPy
pays per call, and one product over every sample is a single call.
"""

from __future__ import annotations

import numpy as np

# Values per block of the query × sample matrix (8 MiB of float64), whatever the sample count.
_CHUNK_VALUES = 1 << 20


class SampleIndex:
    """An immutable search structure over `samples`, shape (N, d)."""

    def __init__(self, samples: np.ndarray):
        self.samples = np.ascontiguousarray(samples, dtype=np.float64)
        self._norms = np.einsum("nd,nd->n", self.samples, self.samples)
        self._minus_twice_t = np.ascontiguousarray(-2.0 * self.samples.T)

    def nearest(self, queries: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Distance to, and index of, the nearest sample of each query.

        Parameters
        ----------
        queries : ndarray, shape (M, d)

        Returns
        -------
        distance : ndarray, shape (M,)
        index : ndarray of int64, shape (M,)
        """
        queries = np.ascontiguousarray(queries, dtype=np.float64)
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
            # The expanded form loses digits when the distance is small next to the norms;
            # the winner's distance is measured again directly.
            gap = block - self.samples[best]
            distance[start:start + chunk] = np.sqrt(np.einsum("md,md->m", gap, gap))
        return distance, index
