"""`expected_errors`: the validation curve read between and beyond its points.

Reference: numpy.interp (piecewise-linear interpolation) on the curve with (0, 0) prepended.
"""

from __future__ import annotations

import math

import numpy as np

from stridecast.runtime import ValidationCurve
from stridecast.runtime.curve import expected_errors


def curve(times, errors) -> ValidationCurve:
    return ValidationCurve(metric="normalised_rms", tolerance=0.1, reference_std=(1.0,),
                           times=tuple(times), errors=tuple(errors))


def test_matches_numpy_interp_from_zero():
    times, errors = [0.5, 1.0, 1.5, 2.0], [0.01, 0.03, 0.2, 0.5]
    query = np.linspace(0.0, 2.0, 41)
    expected = np.interp(query, [0.0, *times], [0.0, *errors])  # reference: numpy.interp
    np.testing.assert_allclose(expected_errors(curve(times, errors), query), expected,
                               rtol=1e-15)


def test_inf_past_last_point_and_after_divergence():
    values = expected_errors(curve([0.5, 1.0], [0.01, 0.03]), np.array([1.0, 1.0001, 50.0]))
    assert values[0] == 0.03 and np.isinf(values[1:]).all()
    diverged = curve([0.5, 1.0, 1.5], [0.01, math.inf, 0.2])
    values = expected_errors(diverged, np.array([0.25, 0.5, 0.75, 1.5]))
    np.testing.assert_allclose(values[:2], [0.005, 0.01])  # numpy.interp halfway from 0
    assert np.isinf(values[2:]).all()


def test_curve_starting_at_zero_and_missing_curve():
    values = expected_errors(curve([0.0, 1.0], [0.02, 0.04]), np.array([0.0, 0.5]))
    np.testing.assert_allclose(values, np.interp([0.0, 0.5], [0, 1], [0.02, 0.04]))
    assert np.isinf(expected_errors(curve([0.0, 1.0], [math.inf, 0.1]), np.array([0.0]))).all()
    assert np.isnan(expected_errors(None, np.array([0.0, 3.0]))).all()
