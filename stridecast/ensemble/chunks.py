"""What a worker does with one chunk of members: forecast them and flag the findings.

Runs on Dask workers; the `Stepper` arrives pickled as its bundle path and reloads (and
re-verifies) once per worker, since the scheduler keeps it as one shared dependency.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stridecast.runtime import Stepper

from . import trust


@dataclass(frozen=True)
class ChunkResult:
    """The forecast of members ``start .. start + len(values)``.

    Attributes
    ----------
    start : int
        Index of the chunk's first member in the ensemble.
    values : ndarray, shape (members, T, d)
        The state at each requested time.
    flags : dict of str to ndarray
        Per finding kind, int8 flags of shape (members, T) for the forecast states and, under
        ``"initial_" + kind``, shape (members,) for the initial states.
    """

    start: int
    values: np.ndarray
    flags: dict[str, np.ndarray]

    @property
    def stop(self) -> int:
        return self.start + self.values.shape[0]


def forecast_chunk(stepper: Stepper, states: np.ndarray, times: np.ndarray, start: int,
                   off_grid: str = "interpolate") -> ChunkResult:
    """Forecast `states` (members, d) at `times` (T,) and flag what the runtime finds."""
    states = np.asarray(states)
    with trust.quiet_extrapolation():
        forecast = stepper.forecast(states, times, off_grid=off_grid)  # (T, members, d)
    values = np.ascontiguousarray(forecast.transpose(1, 0, 2))
    flags: dict[str, np.ndarray] = {}
    if trust.available(stepper):
        per_time = [trust.state_flags(stepper, forecast[index]) for index in range(len(times))]
        for kind in trust.STATE_KINDS:
            flags[kind] = np.stack([row[kind] for row in per_time], axis=1)
        for kind, flag in trust.state_flags(stepper, states).items():
            flags[f"initial_{kind}"] = flag
    return ChunkResult(start=start, values=values, flags=flags)
