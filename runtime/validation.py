"""Validation of what callers pass to a `Stepper`: states, times and options.

Every message names the parameter, the value received and what was expected.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np

from .errors import BundleError, OptionError, StateError, TimeError

# The one list of each option's choices: the CLI, the service and the ensemble take them from here.
OFF_GRID_POLICIES = ("interpolate", "nearest", "error")
DTYPES = ("float32", "float64")


def check_state(state, *, names: Sequence[str], dtype: np.dtype, max_batch: int
                ) -> tuple[np.ndarray, bool]:
    """Return `state` as a C-contiguous (B, d) array of `dtype`, and whether it was 1-D."""
    # Fast path for what callers usually pass: a contiguous, finite array of the compute dtype.
    if (type(state) is np.ndarray and state.dtype == dtype and 1 <= state.ndim <= 2
            and state.flags.c_contiguous and state.size > 0 and state.shape[-1] == len(names)
            and state.shape[0] <= max_batch and np.isfinite(state).all()):
        return (state[None, :], True) if state.ndim == 1 else (state, False)
    try:
        array = np.asarray(state)
    except (ValueError, TypeError) as error:
        raise StateError(f"`state` is not a numeric array: {error}.") from error
    if array.dtype.kind not in "fiu" or array.dtype == np.bool_:
        raise StateError(
            f"`state` has dtype {array.dtype}; expected real numbers (float or integer)."
        )
    dim = len(names)
    if array.ndim == 1:
        single, array = True, array[None, :]
    elif array.ndim == 2:
        single = False
    else:
        raise StateError(f"`state` has shape {array.shape}; expected ({dim},) or (batch, {dim}).")
    if array.shape[1] != dim:
        shown = list(names) if dim <= 8 else [*names[:3], "…", *names[-3:]]  # a field
        raise StateError(
            f"`state` has shape {np.shape(state)}; this bundle's state has {dim} components "
            f"{shown}, so expected ({dim},) or (batch, {dim})."
        )
    if array.shape[0] == 0:
        raise StateError("`state` is an empty batch; expected at least one state.")
    if array.shape[0] > max_batch:
        raise StateError(f"`state` holds {array.shape[0]} states; the limit is {max_batch}.")
    with np.errstate(over="ignore"):
        array = np.ascontiguousarray(array, dtype=dtype)
    if not np.isfinite(array).all():
        bad = int(np.argwhere(~np.isfinite(array))[0][0])
        raise StateError(
            f"`state` row {bad} holds a non-finite value (or one too large for {dtype}); "
            "expected finite numbers."
        )
    return array, single


def check_times(times, *, max_points: int) -> np.ndarray:
    """Return `times` as a 1-D float64 array of finite, non-negative times."""
    try:
        array = np.asarray(times, dtype=np.float64)
    except (ValueError, TypeError) as error:
        raise TimeError(f"`times` must be a list of numbers: {error}.") from error
    if array.ndim != 1 or array.size == 0:
        raise TimeError(f"`times` has shape {array.shape}; expected a non-empty 1-D list of times.")
    if array.size > max_points:
        raise TimeError(
            f"`times` holds {array.size} times; the limit is {max_points} per forecast."
        )
    for t in array[~np.isfinite(array) | (array < 0)][:1]:
        raise TimeError(f"`times` contains {float(t)!r}; expected finite times ≥ 0.")
    return array


def check_time(t, *, unit: str) -> float:
    """Return `t` as a float, refusing non-numbers, booleans, negatives and non-finite values."""
    if isinstance(t, bool) or not isinstance(t, int | float | np.integer | np.floating):
        raise TimeError(f"`t` is {t!r}; expected a finite number of {unit or 'time units'} ≥ 0.")
    value = float(t)
    if not math.isfinite(value) or value < 0:
        raise TimeError(f"`t` is {value!r}; expected a finite time ≥ 0.")
    return value


def check_off_grid(off_grid) -> str:
    if off_grid not in OFF_GRID_POLICIES:
        raise OptionError(f"`off_grid` is {off_grid!r}; expected one of {list(OFF_GRID_POLICIES)}.")
    return off_grid


def check_stride(value: Any, *, where: str | None = None,
                 error: type[Exception] = BundleError) -> int:
    """A stride as a positive int (whole base steps), or `error` naming the value.

    The one stride rule: the planner, the manifest reader, `Stepper.with_levels`, the exporter
    and training all call it (or `check_strides`).

    Parameters
    ----------
    value : int
        The stride; bools, floats and strings are refused even when integral.
    where : str, optional
        The field holding it (e.g. "levels[0].stride"), for the message.
    error : exception class
        `BundleError` for bundles and exports, `OptionError` for an option of a call.
    """
    subject = f"`{where}` ({value!r})" if where else f"stride {value!r}"
    if isinstance(value, bool | float | str | bytes):
        raise error(f"{subject} is not an integer; strides are whole base steps.")
    try:
        stride = operator.index(value)
    except TypeError as cause:
        raise error(f"{subject} is not an integer; strides are whole base steps.") from cause
    if stride <= 0:
        raise error(f"{subject} must be a positive number of base steps.")
    return stride


def check_strides(values: Iterable[Any], *, where: str = "strides",
                  error: type[Exception] = BundleError) -> tuple[int, ...]:
    """Strides as distinct positive ints, ascending, or `error` naming the values.

    Parameters
    ----------
    values : iterable of int
        Non-empty; each checked by `check_stride`.
    where : str
        The parameter's name, for messages.
    error : exception class
        As for `check_stride`.
    """
    try:
        received = None if isinstance(values, str | bytes) else list(values)
    except TypeError as cause:
        raise error(f"`{where}` is {values!r}; expected a non-empty list of strides.") from cause
    if not received:
        raise error(f"`{where}` is {values!r}; expected a non-empty list of strides.")
    checked = [check_stride(value, error=error) for value in received]
    if len(set(checked)) != len(checked):
        raise error(f"`{where}` repeats a stride: {checked}; strides must be distinct.")
    return tuple(sorted(checked))
