"""Divergence times and their censored median, checked against values computed by hand."""

from __future__ import annotations

import numpy as np

from stridecast.export.divergence import (
    DIVERGENCE_THRESHOLD,
    first_exceedance,
    median_divergence_time,
)


def test_first_exceedance_ignores_times_without_truth():
    times = np.array([1.0, 2.0, 3.0])
    # Columns: crosses at t = 2; NaN (no truth) then crosses at 3; diverged (inf) at once;
    # never crosses (0.5 itself is within).
    errors = np.array([[0.1, np.nan, np.inf, 0.5],
                       [0.6, np.nan, np.inf, 0.2],
                       [0.2, 0.9, np.inf, 0.5]])
    assert list(first_exceedance(errors, times)) == [2.0, 3.0, 1.0, np.inf]


def test_median_counts_forecasts_that_never_diverge_at_the_span():
    times = np.array([1.0, 2.0, 3.0, 4.0])
    above = DIVERGENCE_THRESHOLD + 0.1
    # Five forecasts diverging at 1, 3, never, never, 2: by hand, with the censored ones at
    # the span 10, the sorted times are 1, 2, 3, 10, 10 and the median 3.
    errors = np.zeros((4, 5))
    errors[0:, 0] = above
    errors[2:, 1] = above
    errors[1:, 4] = above
    assert median_divergence_time(errors, times, span=10.0) == 3.0
    # Censoring at the span, not at +inf, keeps an even count's median finite: by hand,
    # (3 + 10) / 2 with a sixth forecast that never diverges.
    six = np.concatenate((errors, np.zeros((4, 1))), axis=1)
    assert median_divergence_time(six, times, span=10.0) == 6.5
