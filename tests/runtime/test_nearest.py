"""Nearest-sample search against SciPy's k-d tree (scipy.spatial.cKDTree, the reference)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import cKDTree

from stridecast.runtime.nearest import SampleIndex

RNG = np.random.default_rng(11)


@pytest.mark.parametrize(("count", "dim"), [
    (1, 2), (50, 2), (700, 3), (4096, 4), (2000, 9), (100_000, 2),  # last: several blocks
])
@pytest.mark.parametrize("spread", [0.1, 1.0, 5.0])  # inside, around, far outside the data
def test_nearest_matches_ckdtree(count, dim, spread):
    samples = RNG.standard_normal((count, dim))
    queries = spread * RNG.standard_normal((300, dim))
    index = SampleIndex(samples)
    distance, nearest = index.nearest(queries)
    expected, expected_index = cKDTree(samples).query(queries)
    np.testing.assert_allclose(distance, expected, rtol=1e-12, atol=1e-12)
    # Ties aside (none in continuous random data), the same sample wins.
    np.testing.assert_array_equal(nearest, expected_index)


def test_clustered_samples_and_duplicates():
    # Clusters, exact duplicates, and queries sitting on samples (the expanded form of the
    # squared distance cancels there; the winner is measured again directly).
    centres = RNG.standard_normal((5, 3)) * 10
    samples = np.concatenate([c + 0.01 * RNG.standard_normal((300, 3)) for c in centres])
    samples = np.concatenate([samples, samples[:40]])
    queries = np.concatenate([samples[::37] + 1e-3, 3 * RNG.standard_normal((200, 3))])
    distance, _ = SampleIndex(samples).nearest(queries)
    np.testing.assert_allclose(distance, cKDTree(samples).query(queries)[0], rtol=1e-12,
                               atol=1e-12)
