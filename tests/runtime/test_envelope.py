"""`Envelope.assess`: box excess and nearest-sample distance of many visited states.

References: the box excess is max(lower − x, x − upper, 0) / (upper − lower), worked by hand
per component (common practice for a min/max range check); nearest distances come from
scipy.spatial.cKDTree, which also stands in for the runtime's own search in the steppers the
shipped bundle's findings are compared with.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import cKDTree

from stridecast import demo_bundle
from stridecast.demo import crane
from stridecast.runtime import load
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


def test_all_clear_fields_against_ckdtree():
    # Every visit near the data: the early return must still fill every field.
    samples = RNG.standard_normal((2000, 3))
    envelope = Envelope([-1.0, -1.0, -1.0], [1.0, 1.0, 1.0], mean=np.zeros(3),
                        scale=np.ones(3), samples=samples, radius=0.6)
    visits = samples[RNG.integers(0, 2000, (6, 4))] + 0.01 * RNG.standard_normal((6, 4, 3))
    result = envelope.assess(visits, np.arange(6.0))
    distance = cKDTree(samples).query(visits.reshape(-1, 3))[0].reshape(6, 4)
    assert (distance <= 0.6).all()
    np.testing.assert_allclose(result.distance_ratio, distance.max(axis=0) / 0.6, rtol=1e-12)
    np.testing.assert_array_equal(result.far_time, np.inf)
    np.testing.assert_array_equal(result.box_time, np.inf)
    np.testing.assert_array_equal(result.box_excess, np.zeros((4, 3)))
    np.testing.assert_array_equal(result.worst_offset, np.zeros((4, 3)))
    assert result.checked == result.visited == 24


# ------------------------------------------------ the shipped bundle, against the k-d tree
class KDTreeIndex:
    """scipy.spatial.cKDTree behind the two things `Envelope` reads of its index."""

    def __init__(self, samples: np.ndarray):
        self.samples = samples
        self._tree = cKDTree(samples)

    def nearest(self, queries: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        distance, index = self._tree.query(queries)
        return distance, index.astype(np.int64)


@pytest.fixture(scope="module")
def steppers():
    """The shipped crane bundle as loaded, and loaded with cKDTree as its search."""
    shipped = load(demo_bundle(), on_extrapolation="ignore")
    reference = load(demo_bundle(), on_extrapolation="ignore")
    envelope = reference._data_envelope
    assert envelope is not shipped._data_envelope
    envelope.index = KDTreeIndex(envelope.index.samples)
    return shipped, reference


def crane_states() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(8)
    near = crane.simulate(crane.sample_initial_states(16, rng), np.linspace(0, 30, 4))[-1]
    state = np.array([3.6178, -23.9374, 0.0, 0.0])
    far = state + np.array([0.0, 0.0, 0.0, 1.0])  # vz off the data
    outside = state + np.array([8.0, 0.0, 0.0, 0.0])  # x beyond the box
    return {
        "one, near": state,
        "batch, near": near,
        "one, far (vz off the data)": far,
        "one, outside the box": outside,
        "batch, mixed": np.vstack([near[:5], far, near[5:9] + np.array([0.0, 0.0, 1.5, 0.0]),
                                   outside]),
    }


def same_findings(found, expected):
    assert [f.kind for f in found] == [f.kind for f in expected]
    for mine, theirs in zip(found, expected, strict=True):
        assert (mine.message, mine.states, mine.components, mine.t) == (
            theirs.message, theirs.states, theirs.components, theirs.t)
        if mine.amount is not None:
            assert mine.amount == pytest.approx(theirs.amount, rel=1e-12)


@pytest.mark.parametrize("case", list(crane_states()))
def test_shipped_bundle_findings_match_the_kd_tree(steppers, case):
    shipped, reference = steppers
    state = crane_states()[case].astype(np.float32)
    for t in (0.4, 4.0, 33.8, 37.02):
        same_findings(shipped.advance_with_plan(state, t)[1].findings,
                      reference.advance_with_plan(state, t)[1].findings)
    times = np.linspace(0.0, 40.0, 101)
    same_findings(shipped.forecast_with_info(state, times)[1].findings,
                  reference.forecast_with_info(state, times)[1].findings)
    same_findings(shipped.check(state, 4.0), reference.check(state, 4.0))
    kinds = {f.kind for f in shipped.forecast_with_info(state, times)[1].findings}
    assert ("far_from_data" in kinds) == ("near" not in case)  # both regimes are exercised


def test_shipped_bundle_check_ratio_by_ckdtree(steppers):
    # The ratio in the message, computed here from the samples alone.
    shipped, _ = steppers
    envelope = shipped._data_envelope
    state = np.array([3.6178, -23.9374, 0.0, 1.0])
    ratio = cKDTree(envelope.index.samples).query(
        (state - envelope.mean) / envelope.scale)[0] / envelope.radius
    assert ratio > 1.0
    (finding,) = [f for f in shipped.check(state.astype(np.float32)) if
                  f.kind == "far_from_data"]
    assert f"{ratio:.3g}× the radius away" in finding.message
