"""Nearest-sample search against SciPy's k-d tree (scipy.spatial.cKDTree, the reference)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import cKDTree

from stridecast.runtime import nearest as nearest_module
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


# ------------------------------------------------------------------ the fixed-radius grid
# Every grid result is checked against scipy.spatial.cKDTree.query (the outside reference),
# and against the same index without a radius (brute force), which must agree bit for bit:
# both report √(Σ (s − q)²) of the winner computed by one function.


@pytest.fixture
def always_grid(monkeypatch):
    """The grid wherever it can be built, whatever the batch or the gain: small cases then
    exercise it too (by default brute force takes them, being cheaper there)."""
    monkeypatch.setattr(nearest_module, "_MIN_GAIN", 0)
    monkeypatch.setattr(nearest_module, "_GRID_MIN_WORK", 0)


def grid_index(samples: np.ndarray, radius: float) -> SampleIndex:
    index = SampleIndex(samples, radius=radius)
    assert index._grid_for() is not None  # otherwise the test would only exercise brute force
    return index


def check_against_references(index: SampleIndex, queries: np.ndarray) -> None:
    distance, nearest = index.nearest(queries)
    expected, _ = cKDTree(index.samples).query(queries)
    np.testing.assert_allclose(distance, expected, rtol=1e-12, atol=1e-12)
    brute_distance, brute_index = SampleIndex(index.samples).nearest(queries)
    np.testing.assert_array_equal(distance, brute_distance)
    # The winner is a nearest sample: its own distance is the minimum (ties: any of them).
    np.testing.assert_allclose(
        np.linalg.norm(queries - index.samples[nearest], axis=1), expected, rtol=1e-12,
        atol=1e-12)
    same = nearest == brute_index
    assert same.mean() > 0.99  # continuous data: different winners only at exact ties


@pytest.mark.parametrize("dim", [2, 3, 4, 5, 6, 7, 8])
def test_grid_matches_ckdtree_in_each_dimension(dim, always_grid):
    # Few enough samples that the grid is built up to d = 6 (GRID_MAX_DIM); above, the index
    # falls back to brute force, which must answer the same.
    count = {2: 3000, 3: 3000, 4: 2048, 5: 600, 6: 200, 7: 500, 8: 500}[dim]
    samples = RNG.standard_normal((count, dim))
    radius = 0.3 * np.sqrt(dim)
    index = SampleIndex(samples, radius=radius)
    assert (index._grid_for() is not None) == (dim <= 6)
    queries = np.concatenate([
        samples[RNG.integers(0, count, 2000)] + 0.05 * RNG.standard_normal((2000, dim)),
        2.0 * RNG.standard_normal((500, dim)),  # around and beyond the data
        50.0 + RNG.standard_normal((20, dim)),  # far away: no cell of the grid
    ])
    check_against_references(index, queries)


def test_points_on_cell_boundaries_and_at_exactly_the_radius(always_grid):
    # Samples and queries on a lattice of step = radius: every point lies on cell
    # boundaries (up to the cells' 2e-6 widening), and nearest distances are exactly 0,
    # the radius, or √2 · radius.
    radius = 0.5
    axis = np.arange(-4, 5) * radius
    lattice = np.stack(np.meshgrid(axis, axis), axis=-1).reshape(-1, 2)
    samples = lattice[::2]  # every other lattice point (checkerboard-like)
    index = grid_index(samples, radius)
    check_against_references(index, lattice)
    distance, _ = index.nearest(lattice)
    assert set(np.round(distance / radius, 12)) <= {0.0, 1.0}
    # Exactly at the radius along an axis, on both sides of a sample (exact in binary).
    centre = np.array([[0.0, 0.0]])
    on_radius = centre + np.array([[radius, 0.0], [-radius, 0.0], [0.0, radius],
                                   [0.0, -radius]])
    index = grid_index(np.vstack([centre, [[10.0, 10.0]]]), radius)
    distance, nearest = index.nearest(on_radius)
    np.testing.assert_array_equal(distance, [radius] * 4)  # |±0.5| exactly
    np.testing.assert_array_equal(nearest, [0, 0, 0, 0])


def test_duplicates_pick_the_lowest_index_like_brute_force(always_grid):
    base = RNG.standard_normal((300, 3))
    samples = np.concatenate([base, base[:100], base[:50]])  # exact duplicates, later rows
    index = grid_index(samples, 0.4)
    queries = base[RNG.integers(0, 100, 500)] + 0.01 * RNG.standard_normal((500, 3))
    _, nearest = index.nearest(queries)
    _, brute = SampleIndex(samples).nearest(queries)
    np.testing.assert_array_equal(nearest, brute)
    assert (nearest < 300).all()
    check_against_references(index, queries)


def test_single_sample_and_batches_of_one_and_thousands(always_grid):
    samples = np.array([[0.25, -1.0, 2.0]])
    index = grid_index(samples, 1.0)
    queries = np.array([[0.25, -1.0, 2.5], [5.0, 5.0, 5.0]])
    distance, nearest = index.nearest(queries)
    # By hand: 0.5 from the one sample; the other is √(4.75² + 6² + 3²) away.
    np.testing.assert_allclose(distance, [0.5, np.sqrt(4.75**2 + 36 + 9)], rtol=1e-15)
    np.testing.assert_array_equal(nearest, [0, 0])
    for count in (1, 3, 5000):  # 5000 × 2048 pairs: several steps of the grid search
        samples = RNG.standard_normal((2048, 4))
        index = grid_index(samples, 0.7)
        queries = samples[RNG.integers(0, 2048, count)] + 0.1 * RNG.standard_normal(
            (count, 4))
        check_against_references(index, queries)


def test_queries_that_are_not_finite_go_to_brute_force(always_grid):
    samples = RNG.standard_normal((500, 2))
    queries = np.array([[np.nan, 0.0], [np.inf, 0.0], [0.0, -np.inf], [0.1, 0.1]] * 3)
    distance, nearest = grid_index(samples, 0.5).nearest(queries)
    brute_distance, brute_index = SampleIndex(samples).nearest(queries)
    np.testing.assert_array_equal(distance, brute_distance)  # nan and inf where brute has them
    np.testing.assert_array_equal(nearest, brute_index)


def test_grid_is_not_built_where_it_cannot_pay():
    samples = RNG.standard_normal((100, 2))
    assert SampleIndex(samples, radius=100.0)._grid_for() is None  # every list holds every sample
    assert SampleIndex(samples, radius=np.inf)._grid_for() is None
    assert SampleIndex(RNG.standard_normal((100, 7)), radius=0.5)._grid_for() is None  # d > 6
    with_nan = samples.copy()
    with_nan[3, 1] = np.nan
    assert SampleIndex(with_nan, radius=0.5)._grid_for() is None


def test_sparse_cell_table_answers_like_the_dense_one(always_grid, monkeypatch):
    # Beyond `_DENSE_CELLS` the listed cells' keys are searched with np.searchsorted.
    monkeypatch.setattr(nearest_module, "_DENSE_CELLS", 0)
    samples = RNG.standard_normal((1500, 3))
    index = grid_index(samples, 0.4)
    assert index._grid_for().keys is not None
    queries = np.concatenate([
        samples[RNG.integers(0, 1500, 800)] + 0.05 * RNG.standard_normal((800, 3)),
        3.0 * RNG.standard_normal((200, 3)), [[np.nan, 0.0, 0.0], [1e30, 0.0, 0.0]]])
    check_against_references(index, queries[:-2])
    distance, nearest = index.nearest(queries)
    brute_distance, brute_index = SampleIndex(samples).nearest(queries)
    np.testing.assert_array_equal(distance, brute_distance)  # nan where brute force has it
    np.testing.assert_array_equal(nearest[-2:], brute_index[-2:])


@pytest.mark.parametrize("dim", [2, 3, 4])
def test_nearest_distances_around_the_radius(dim, always_grid):
    # Sparse samples: many queries have their nearest sample, and others, near the radius,
    # where a candidate missing from a cell's list would change the answer.
    samples = RNG.uniform(0.0, 6.0, (400, dim))
    spacing = float(np.median(cKDTree(samples).query(samples, k=2)[0][:, 1]))
    index = grid_index(samples, spacing)
    queries = RNG.uniform(-1.0, 7.0, (6000, dim))
    distance, _ = index.nearest(queries)
    share = np.mean(np.abs(distance / spacing - 1.0) < 0.1)
    assert share > 0.05  # the regime under test is populated
    check_against_references(index, queries)


def test_a_sample_just_within_the_radius_of_a_cell_corner_is_a_candidate(always_grid):
    # A query at a corner of its cell, its nearest sample 0.99 radius away diagonally in the
    # neighbouring cell (0.99 radius from the query's cell), a second one 0.995 radius away
    # inside the cell: the answer is the first (by hand), which a cell list taking only
    # samples well within the radius of the cell would miss.
    radius = 1.0
    anchor = np.zeros(2)  # fixes the grid's origin at anchor − 2 cells
    index = grid_index(np.array([anchor, [50.0, 50.0]]), radius)
    corner = index._grid.origin + 5 * index._grid.side + 1e-9
    first = corner + 0.99 * radius * np.array([-1.0, -1.0]) / np.sqrt(2.0)
    second = corner + np.array([0.995 * radius, 0.0])
    index = grid_index(np.array([anchor, [50.0, 50.0], first, second]), radius)
    np.testing.assert_allclose(index._grid.origin + 5 * index._grid.side + 1e-9, corner)
    distance, nearest = index.nearest(corner[None])
    assert nearest[0] == 2
    np.testing.assert_allclose(distance, [0.99 * radius], rtol=1e-12)


def test_the_grid_is_built_only_by_a_search_large_enough_to_use_it():
    # A single state's advance (a CLI call) must not pay for the grid; a batch builds it once.
    samples = RNG.standard_normal((2048, 4))
    index = SampleIndex(samples, radius=0.5)
    assert not index._grid_built
    index.nearest(RNG.standard_normal((5, 4)) * 0.1)
    assert not index._grid_built
    queries = RNG.standard_normal((64, 4)) * 0.1
    distance, _ = index.nearest(queries)
    assert index._grid_built and index._grid is not None
    # Exact either way: cKDTree (SciPy) as the outside reference.
    np.testing.assert_allclose(distance, cKDTree(samples).query(queries)[0], rtol=1e-12)
