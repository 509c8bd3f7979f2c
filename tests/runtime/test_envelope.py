"""`Envelope.assess`: box excess and nearest-sample distance of many visited states.

References: the box excess is max(lower − x, x − upper, 0) / (upper − lower), worked by hand
per component (common practice for a min/max range check); nearest distances come from
scipy.spatial.cKDTree.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from stridecast.runtime.envelope import Envelope

RNG = np.random.default_rng(5)
MEAN, SCALE = np.array([1.0, -2.0]), np.array([2.0, 0.5])


def test_box_excess_and_first_time():
    envelope = Envelope([0.0, -1.0], [2.0, 1.0], mean=MEAN, scale=SCALE)
    visits = np.array([
        [[1.0, 0.0], [1.0, 0.0]],
        [[3.0, 0.0], [1.0, 0.5]],    # row 0: x 1.0 above 2 → 0.5 widths (width 2)
        [[1.0, -2.0], [1.0, 1.5]],   # row 0: y 1.0 below −1 → 0.5; row 1: y 0.5 above → 0.25
    ])
    times = np.array([0.0, 2.0, 1.0])  # visits in any order; "first" is the earliest time
    result = Envelope.assess(envelope, visits, times)
    np.testing.assert_allclose(result.box_excess, [[0.5, 0.5], [0.0, 0.25]])
    np.testing.assert_array_equal(result.box_time, [1.0, 1.0])
    assert np.isnan(result.distance_ratio).all() and result.checked == 0


def test_distance_against_ckdtree_and_first_far_time():
    samples = RNG.standard_normal((500, 2))
    envelope = Envelope(None, None, mean=MEAN, scale=SCALE, samples=samples, radius=0.2)
    visits = MEAN + SCALE * 2.0 * RNG.standard_normal((7, 3, 2))
    times = np.arange(7.0)[::-1]
    result = envelope.assess(visits, times)
    # Reference: cKDTree distances of the normalised visits.
    distance = cKDTree(samples).query(((visits - MEAN) / SCALE).reshape(-1, 2))[0]
    distance = distance.reshape(7, 3)
    far = distance > 0.2
    expected_ratio = distance.max(axis=0) / 0.2
    np.testing.assert_allclose(result.distance_ratio[far.any(axis=0)],
                               expected_ratio[far.any(axis=0)], rtol=1e-12)
    expected_time = np.where(far, times[:, None], np.inf).min(axis=0)
    np.testing.assert_array_equal(result.far_time, expected_time)
    assert result.checked == result.visited == 21


def test_work_cap_measures_a_subset_including_the_answers():
    samples = RNG.standard_normal((100, 2))
    envelope = Envelope(None, None, mean=np.zeros(2), scale=np.ones(2), samples=samples,
                        radius=0.5, max_work=100 * 40)
    visits = 0.1 * RNG.standard_normal((50, 4, 2))
    visits[-1, 2] = [30.0, 0.0]  # an answer far away: the cap must still see it
    result = envelope.assess(visits, np.arange(50.0))
    assert result.checked == 40 and result.visited == 200
    assert result.far_time[2] == 49.0
    np.testing.assert_allclose(result.distance_ratio[2],
                               cKDTree(samples).query([30.0, 0.0])[0] / 0.5, rtol=1e-12)
