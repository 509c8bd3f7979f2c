"""The held-out error curve of a bundle, read at any time: `Stepper.expected_error`."""

from __future__ import annotations

import numpy as np

from .manifest import ValidationCurve


def expected_errors(curve: ValidationCurve | None, times: np.ndarray) -> np.ndarray:
    """The curve's error at each time.

    Linear interpolation between curve points; before the first point, from 0 at t = 0 (a
    forecast of no time has no error); `inf` past the last point and past the last finite
    point before a diverged (infinite) one; `nan` everywhere without a curve.

    Parameters
    ----------
    curve : ValidationCurve or None
    times : ndarray, shape (T,)
        Times ≥ 0.

    Returns
    -------
    ndarray of float64, shape (T,)
    """
    times = np.asarray(times, dtype=np.float64)
    if curve is None:
        return np.full(times.shape, np.nan)
    nodes = np.asarray(curve.times, dtype=np.float64)
    values = np.asarray(curve.errors, dtype=np.float64)
    if nodes[0] > 0:
        nodes = np.concatenate(([0.0], nodes))
        values = np.concatenate(([0.0], values))
    diverged = np.flatnonzero(~np.isfinite(values))
    trusted = diverged[0] if diverged.size else values.size  # points before the first inf
    result = np.full(times.shape, np.inf)
    if trusted == 0:
        return result
    last = nodes[trusted - 1]
    inside = times <= last
    result[inside] = np.interp(times[inside], nodes[:trusted], values[:trusted])
    return result
