"""A Stepper pickles as its bundle path, load options and checksums, never as weights."""

from __future__ import annotations

import pickle
import shutil

import numpy as np
import pytest
from scipy.linalg import expm

from stridecast.runtime import BundleError, Stepper, load
from tests.builders import linear_bundle, oscillator_matrix


def test_round_trip_reloads_the_same_bundle_with_the_same_options(tmp_path):
    path = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                         strides=[1, 4])
    stepper = load(path, dtype="float64")
    data = pickle.dumps(stepper)
    assert len(data) < 2000  # a path and options, not the weights
    copy = pickle.loads(data)
    assert copy is not stepper and copy.dtype == np.float64 and copy.strides == (1, 4)
    state = np.array([1.0, -0.5])
    # x(t) = expm(A t) x0: the standard solution of a linear ODE (SciPy).
    np.testing.assert_allclose(copy.advance(state, 0.7), expm(oscillator_matrix() * 0.7) @ state,
                               rtol=1e-12)
    np.testing.assert_array_equal(copy.advance(state, 0.7), stepper.advance(state, 0.7))


def test_a_bundle_changed_since_pickling_is_refused(tmp_path):
    path = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                         strides=[1, 4])
    data = pickle.dumps(load(path))
    shutil.rmtree(path)
    linear_bundle(path, oscillator_matrix(omega=3.0), base_step=0.1, strides=[1, 4])
    with pytest.raises(BundleError, match=r"changed since the stepper was pickled"):
        pickle.loads(data)


def test_a_stepper_not_made_by_load_cannot_be_pickled(tmp_path):
    path = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                         strides=[1])
    loaded = load(path)
    handmade = Stepper(loaded.manifest, {1: lambda states: states})
    with pytest.raises(TypeError, match=r"only a Stepper made by .*load.* can be pickled\."):
        pickle.dumps(handmade)


def test_a_with_levels_subset_pickles_as_its_bundle_and_strides(tmp_path):
    path = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                         strides=[1, 4, 16])
    subset = load(path, dtype="float64").with_levels([1, 16]).with_levels([1])
    copy = pickle.loads(pickle.dumps(subset))
    assert copy.strides == (1,) and copy.dtype == np.float64
    state = np.array([1.0, -0.5])
    # Seven stride-1 steps of the exact flow map: expm(A t) x0 (SciPy).
    np.testing.assert_allclose(copy.advance(state, 0.7), expm(oscillator_matrix() * 0.7) @ state,
                               rtol=1e-12)
    assert copy.plan(0.7).evaluations == 7 == subset.plan(0.7).evaluations
    # Its whole bundle is what identifies it: a changed level 16 is refused too.
    data = pickle.dumps(load(path).with_levels([1, 4]))
    shutil.rmtree(path)
    linear_bundle(path, oscillator_matrix(), base_step=0.1, strides=[1, 4, 8])
    with pytest.raises(BundleError, match=r"changed since the stepper was pickled"):
        pickle.loads(data)
