"""Normalised errors and divergence times, checked against values computed by hand."""

from __future__ import annotations

import numpy as np

from stridecast.benchmarks.divergence import (
    bootstrap_interval,
    divergence_times,
    normalised_errors,
    normalised_rms,
)


def test_normalised_error_is_rms_over_components_of_error_over_std():
    # By hand: errors (3, 4) over stds (1, 2) are (3, 2); RMS = √((9 + 4) / 2).
    value = normalised_errors(np.array([3.0, 4.0]), np.zeros(2), np.array([1.0, 2.0]))
    assert value == np.sqrt(6.5)


def test_normalised_rms_averages_squares_over_states():
    # By hand: per-state errors 1 and 3 → √((1 + 9) / 2).
    prediction = np.array([[1.0, 1.0], [3.0, 3.0]])
    assert normalised_rms(prediction, np.zeros((2, 2)), np.ones(2)) == np.sqrt(5.0)


def test_divergence_time_is_the_first_crossing():
    times = np.array([0.0, 1.0, 2.0, 3.0])
    # Three states (columns): crosses 0.5 at t = 2 then comes back (still 2), never, at once.
    errors = np.array([[0.0, 0.1, 0.6], [0.2, 0.2, 0.0], [0.7, 0.3, 0.0], [0.1, 0.4, 0.0]])
    truth = np.zeros((4, 3, 1))
    found = divergence_times(errors[..., None], truth, times, np.ones(1))
    np.testing.assert_array_equal(found, [2.0, np.inf, 0.0])


def test_a_non_finite_forecast_has_diverged():
    prediction = np.array([[[0.0]], [[np.nan]], [[0.0]]])
    found = divergence_times(prediction, np.zeros((3, 1, 1)), np.arange(3.0), np.ones(1))
    np.testing.assert_array_equal(found, [1.0])


def test_bootstrap_interval_brackets_the_figure_and_collapses_without_spread():
    rng = np.random.default_rng(0)
    prediction = rng.standard_normal((400, 3))
    low, high = bootstrap_interval(prediction, np.zeros((400, 3)), np.ones(3))
    assert low < normalised_rms(prediction, np.zeros((400, 3)), np.ones(3)) < high
    # Every state with the same error: every resample gives that error.
    same = np.ones((50, 2))
    assert bootstrap_interval(same, np.zeros((50, 2)), np.ones(2)) == (1.0, 1.0)
