"""Forecast error in normalised units and the time at which a forecast diverges.

The definitions live in `stridecast.export.divergence` (level selection uses the same one);
this module re-exports them for the benchmarks and adds the bootstrap interval of a figure.
"""

from __future__ import annotations

import numpy as np

from stridecast.export.divergence import (
    DIVERGENCE_THRESHOLD,
    divergence_times,
    normalised_errors,
)

__all__ = ["DIVERGENCE_THRESHOLD", "bootstrap_interval", "divergence_times",
           "normalised_errors", "normalised_rms"]


def normalised_rms(prediction: np.ndarray, truth: np.ndarray,
                   reference_std: np.ndarray) -> float:
    """The bundle's "normalised_rms": RMS over components and over states (+inf if any
    prediction is not finite)."""
    errors = normalised_errors(prediction, truth, reference_std)
    return float(np.sqrt(np.mean(errors**2)))


def bootstrap_interval(prediction: np.ndarray, truth: np.ndarray, reference_std: np.ndarray, *,
                       resamples: int = 2000, seed: int = 0) -> tuple[float, float]:
    """5 % and 95 % quantiles of `normalised_rms` over states resampled with replacement
    (the percentile bootstrap, common practice): how much the figure owes to the sample."""
    errors = normalised_errors(prediction, truth, reference_std)
    rng = np.random.default_rng(seed)
    picks = rng.integers(0, len(errors), size=(resamples, len(errors)))
    values = np.sqrt(np.mean(errors[picks] ** 2, axis=1))
    low, high = np.quantile(values, [0.05, 0.95])
    return float(low), float(high)
