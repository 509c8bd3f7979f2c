"""Forecast error in normalised units and the time at which a forecast diverges.

The normalised error of one forecast state is the error per component divided by that
component's standard deviation over the training data, root-mean-square over components (the
bundle's "normalised_rms" metric before its average over states). A forecast has diverged at
the first time this error exceeds `DIVERGENCE_THRESHOLD`.
"""

from __future__ import annotations

import numpy as np

# Common practice in the forecasting literature on chaotic systems: the "valid prediction
# time" is the first time the normalised RMSE passes 0.5 (e.g. Vlachas et al. 2020, Neural
# Networks 126, 191-217; quoted from memory). A forecast that constantly answers the
# climatological mean scores about 1.0 on this scale, and two independent states on the
# attractor about 1.4 (√2), so 0.5 is well inside "still informative".
DIVERGENCE_THRESHOLD = 0.5


def normalised_errors(prediction: np.ndarray, truth: np.ndarray,
                      reference_std: np.ndarray) -> np.ndarray:
    """Normalised error of each state.

    Parameters
    ----------
    prediction, truth : ndarray, shape (..., d)
    reference_std : ndarray, shape (d,)
        Per-component standard deviation of the training data.

    Returns
    -------
    ndarray, shape (...)
        Non-finite predictions give +inf.
    """
    scaled = (np.asarray(prediction, np.float64) - truth) / reference_std
    errors = np.sqrt(np.mean(scaled**2, axis=-1))
    return np.where(np.isfinite(errors), errors, np.inf)


def normalised_rms(prediction: np.ndarray, truth: np.ndarray,
                   reference_std: np.ndarray) -> float:
    """The bundle's "normalised_rms": RMS over components and over states (+inf if any
    prediction is not finite)."""
    errors = normalised_errors(prediction, truth, reference_std)
    return float(np.sqrt(np.mean(errors**2)))


def divergence_times(prediction: np.ndarray, truth: np.ndarray, times: np.ndarray,
                     reference_std: np.ndarray,
                     threshold: float = DIVERGENCE_THRESHOLD) -> np.ndarray:
    """First time each forecast's normalised error exceeds `threshold`.

    Parameters
    ----------
    prediction, truth : ndarray, shape (K, M, d)
        Forecasts and truth of M initial states at K ascending `times`.
    times : ndarray, shape (K,)

    Returns
    -------
    ndarray, shape (M,)
        The divergence time of each forecast; +inf for one that stayed within the threshold
        up to `times[-1]`.
    """
    exceeded = normalised_errors(prediction, truth, reference_std) > threshold
    first = np.argmax(exceeded, axis=0)
    return np.where(exceeded.any(axis=0), np.asarray(times, np.float64)[first], np.inf)


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
