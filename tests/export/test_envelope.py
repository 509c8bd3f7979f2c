"""The data envelope: farthest-point sampling, nearest distances and the learned radius,
checked against SciPy's k-d tree (scipy.spatial.cKDTree) as the reference for distances."""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from stridecast.export.envelope import (
    RADIUS_MARGIN,
    RADIUS_QUANTILE,
    data_envelope,
    farthest_points,
    nearest_distances,
)


def ring(count: int, seed: int, noise: float = 0.02) -> np.ndarray:
    rng = np.random.default_rng(seed)
    angle = rng.uniform(0, 2 * np.pi, count)
    return np.stack([np.cos(angle), np.sin(angle), noise * rng.normal(size=count)], axis=1)


def test_nearest_distances_match_a_kd_tree():
    queries, samples = ring(3000, 1), ring(500, 2)
    # Expected: SciPy's exact nearest-neighbour query.
    expected, _ = cKDTree(samples).query(queries)
    np.testing.assert_allclose(nearest_distances(queries, samples), expected, atol=1e-7)
    expected_loo, _ = cKDTree(samples).query(samples, k=2)
    np.testing.assert_allclose(nearest_distances(samples, samples, exclude_self=True),
                               expected_loo[:, 1], atol=1e-7)


def test_farthest_points_cover():
    states = ring(4000, 3)
    kept, cover = farthest_points(states, 100)
    assert kept.shape == (100, 3)
    # Expected: the cover radius is the largest nearest-kept distance (cKDTree reference).
    distances, _ = cKDTree(kept).query(states)
    assert cover == np.float64(distances.max())
    # Greedy farthest-point sampling is a 2-approximation of the best k-centre cover
    # (Gonzalez 1985), and the ring's circumference 2π split into 100 arcs needs a radius of
    # at least π/100 minus the noise; so the cover is at most about 2 · π/100 + noise.
    assert cover < 2 * np.pi / 100 + 0.1
    again, _ = farthest_points(states, 100)
    np.testing.assert_array_equal(kept, again)  # deterministic
    everything, zero = farthest_points(states[:50], 100)
    assert len(everything) == 50 and zero == 0.0


def test_radius_covers_training_and_held_out_states():
    train = [ring(3000, 4), ring(3000, 5)]
    held_out = [ring(2000, 6)]
    samples, radius = data_envelope(train, held_out, count=256)
    assert samples.dtype == np.float32 and samples.shape == (256, 3)
    tree = cKDTree(samples.astype(np.float64))
    # No training state is far from the data, and the held-out quantile is within.
    assert tree.query(np.concatenate(train))[0].max() <= radius
    held_distances = tree.query(held_out[0])[0]
    assert np.quantile(held_distances, RADIUS_QUANTILE) * RADIUS_MARGIN <= radius * (1 + 1e-6)
    # A state at the ring's centre is far from every training state (distance 1).
    assert tree.query([0.0, 0.0, 0.0])[0] > radius


def test_radius_without_held_out_uses_leave_one_out():
    states = ring(200, 7)
    samples, radius = data_envelope([states], None, count=2048)
    assert len(samples) == 200
    loo = cKDTree(states).query(states, k=2)[0][:, 1]
    assert np.isclose(radius, RADIUS_MARGIN * np.quantile(loo, RADIUS_QUANTILE))
