"""When a forecast stops being informative: the normalised error of each forecast state and
the time at which it first exceeds `DIVERGENCE_THRESHOLD`.

The one definition of "time to divergence", used by level selection (`selection.py`) and by
the benchmarks (`benchmarks/divergence.py` re-exports it). NumPy only.

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
        Per-component standard deviation of the training data (ones for states already
        normalised by it).

    Returns
    -------
    ndarray, shape (...)
        Non-finite predictions give +inf.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        scaled = (np.asarray(prediction, np.float64) - truth) / reference_std
        errors = np.sqrt(np.mean(scaled**2, axis=-1))
    return np.where(np.isfinite(errors), errors, np.inf)


def first_exceedance(errors: np.ndarray, times: np.ndarray,
                     threshold: float = DIVERGENCE_THRESHOLD) -> np.ndarray:
    """First time each forecast's normalised error exceeds `threshold`.

    Parameters
    ----------
    errors : ndarray, shape (K, M)
        Normalised errors (`normalised_errors`) of M forecasts at K ascending `times`; NaN
        marks a time without truth (never an exceedance), inf a diverged forecast.
    times : ndarray, shape (K,)

    Returns
    -------
    ndarray, shape (M,)
        The divergence time of each forecast; +inf for one that never exceeded the threshold
        at the given times (censored: the caller decides what that counts as).
    """
    with np.errstate(invalid="ignore"):
        exceeded = np.asarray(errors, np.float64) > threshold  # NaN compares False
    first = np.argmax(exceeded, axis=0)
    return np.where(exceeded.any(axis=0), np.asarray(times, np.float64)[first], np.inf)


def divergence_times(prediction: np.ndarray, truth: np.ndarray, times: np.ndarray,
                     reference_std: np.ndarray,
                     threshold: float = DIVERGENCE_THRESHOLD) -> np.ndarray:
    """First time each forecast's normalised error exceeds `threshold`.

    Parameters
    ----------
    prediction, truth : ndarray, shape (K, M, d)
        Forecasts and truth of M initial states at K ascending `times`.
    times : ndarray, shape (K,)
    reference_std : ndarray, shape (d,)

    Returns
    -------
    ndarray, shape (M,)
        The divergence time of each forecast; +inf for one that stayed within the threshold
        up to `times[-1]`.
    """
    return first_exceedance(normalised_errors(prediction, truth, reference_std), times,
                            threshold)


def median_divergence_time(errors: np.ndarray, times: np.ndarray, span: float,
                           threshold: float = DIVERGENCE_THRESHOLD) -> float:
    """Median over forecasts of the divergence time, a forecast that never diverges counting
    at `span` (right-censored at the end of the data).

    Parameters
    ----------
    errors : ndarray, shape (K, M)
        As for `first_exceedance`.
    times : ndarray, shape (K,)
    span : float
        The end of the data: what a forecast that never exceeds the threshold counts as.
    """
    diverged = first_exceedance(errors, times, threshold)
    return float(np.median(np.minimum(diverged, span)))
