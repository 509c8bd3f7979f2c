"""Tests of Lagrange interpolation between grid states."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from stridecast.runtime.errors import StateError, TimeError
from stridecast.runtime.interpolate import interpolate_states, lagrange_weights


@settings(max_examples=100, deadline=None)
@given(
    gaps=st.lists(st.floats(0.1, 3.0), min_size=3, max_size=3),
    start=st.floats(-50.0, 50.0),
    fraction=st.floats(-0.5, 1.5),
    coefficients=st.lists(st.floats(-5.0, 5.0), min_size=4, max_size=4),
)
def test_exact_for_cubics(gaps, start, fraction, coefficients):
    # Expected: interpolation through four nodes reproduces any cubic exactly (uniqueness of
    # the interpolating polynomial, a fact of polynomial interpolation); NumPy's polyval.
    nodes = start + np.concatenate(([0.0], np.cumsum(gaps)))
    t = nodes[0] + fraction * (nodes[-1] - nodes[0])
    values = np.polyval(coefficients, nodes)
    got = lagrange_weights(nodes, t) @ values
    scale = 1.0 + np.abs(np.polyval(np.abs(coefficients), np.abs(nodes).max() + abs(t)))
    assert abs(got - np.polyval(coefficients, t)) <= 1e-9 * scale


def test_weights_sum_to_one_and_hit_nodes_exactly():
    # Expected: Lagrange basis is a partition of unity and L_j(x_k) = δ_jk (definition).
    nodes = np.array([0.0, 1.0, 3.0, 3.5])
    np.testing.assert_allclose(lagrange_weights(nodes, 2.2).sum(), 1.0, rtol=0, atol=1e-14)
    for index, node in enumerate(nodes):
        np.testing.assert_array_equal(lagrange_weights(nodes, node), np.eye(4)[index])


def test_cubic_error_on_sine_scales_like_h4():
    # Expected: the error of cubic interpolation is f''''(ξ)/4! · Π(t − x_k), so it scales
    # like h^4 for node spacing h (a fact of polynomial interpolation): ratio ≈ 16.
    errors = []
    for spacing in (0.2, 0.1, 0.05):
        nodes = 0.7 + spacing * np.array([-1.0, 0.0, 1.0, 2.0])
        t = 0.7 + 0.5 * spacing
        errors.append(abs(lagrange_weights(nodes, t) @ np.sin(nodes) - np.sin(t)))
    for coarse, fine in itertools.pairwise(errors):
        assert 14.0 < coarse / fine < 18.0


def test_interpolate_states_batches():
    # Expected: each component of a linear-in-time state is reproduced exactly (see above).
    nodes = np.array([10.0, 11.0, 12.0, 13.0])
    slopes = np.arange(6, dtype=np.float64).reshape(2, 3)
    states = (nodes[:, None, None] * slopes).astype(np.float32)
    got = interpolate_states(nodes, states, 11.25)
    assert got.shape == (2, 3) and got.dtype == np.float32
    np.testing.assert_allclose(got, 11.25 * slopes, rtol=1e-6)


def test_large_times_close_together_stay_accurate():
    # Expected: a straight line is reproduced exactly (see above); nodes near 1e9 test that
    # only differences of times enter the weights.
    nodes = 1e9 + np.array([0.0, 1.0, 2.0, 3.0])
    weights = lagrange_weights(nodes, 1e9 + 1.5)
    np.testing.assert_allclose(weights @ np.array([0.0, 1.0, 2.0, 3.0]), 1.5, atol=1e-12)


@pytest.mark.parametrize(
    ("nodes", "t", "message"),
    [
        ([], 0.0, r"`nodes` must be a non-empty 1-D array of times; got shape \(0,\)"),
        ([[0.0, 1.0]], 0.0, r"non-empty 1-D array of times; got shape \(1, 2\)"),
        ([0.0, np.nan], 0.0, r"`nodes` must be finite"),
        ([0.0, 1.0, 1.0], 0.5, r"`nodes` must be distinct; got \[0\.0, 1\.0, 1\.0\]"),
        ([0.0, 1.0], np.inf, r"`t` must be finite; got inf"),
    ],
)
def test_bad_nodes_and_times(nodes, t, message):
    with pytest.raises(TimeError, match=message):
        lagrange_weights(np.asarray(nodes, dtype=float), t)


def test_states_must_match_nodes():
    with pytest.raises(StateError, match=r"one state per node \(4\); got shape \(3, 2\)"):
        interpolate_states(np.arange(4.0), np.zeros((3, 2)), 1.5)
