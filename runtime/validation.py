"""Validation of what callers pass to a `Stepper`: states, times and options.

The one place these rules live: the Python API and the service (which names its fields with
`where`, e.g. "inputs['state']") call the same checks and show the same sentences. Every
message names the parameter, the value received and what was expected.
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
# Fields longer than this show their first and last names only.
_NAMES_SHOWN = 8


def check_state(state, *, names: Sequence[str], dtype: np.dtype, max_batch: int,
                where: str = "state") -> tuple[np.ndarray, bool]:
    """A state `(d,)` or batch `(B, d)` as a C-contiguous `(B, d)` array of `dtype`.

    Parameters
    ----------
    state : array_like, shape (d,) or (B, d)
        Real, finite numbers; 1 ≤ B ≤ `max_batch`.
    names : sequence of str, length d
        The bundle's component names (for the message on a wrong shape).
    dtype : numpy dtype
        The compute dtype; values too large for it are refused, not turned into inf.
    max_batch : int
        The most states one call may hold (`Limits.max_batch`, or the service's `max_batch`).
    where : str
        How messages name the parameter ("state", or a request field like "inputs['state']").

    Returns
    -------
    states : ndarray, shape (B, d)
    single : bool
        Whether `state` was one state `(d,)`.
    """
    # Fast path for what callers usually pass: a contiguous, finite array of the compute dtype.
    if (type(state) is np.ndarray and state.dtype == dtype and 1 <= state.ndim <= 2
            and state.flags.c_contiguous and state.size > 0 and state.shape[-1] == len(names)
            and state.shape[0] <= max_batch and np.isfinite(state).all()):
        return (state[None, :], True) if state.ndim == 1 else (state, False)
    try:
        array = np.asarray(state)
    except (ValueError, TypeError) as error:
        raise StateError(f"`{where}` is not a numeric array: {error}.") from error
    if array.dtype.kind not in "fiu":
        raise StateError(
            f"`{where}` has dtype {array.dtype}; expected real numbers (float or integer)."
        )
    dim = len(names)
    if array.ndim not in (1, 2) or array.shape[-1] != dim:
        shown = list(names) if dim <= _NAMES_SHOWN else [*names[:3], "…", *names[-3:]]
        raise StateError(
            f"`{where}` has shape {array.shape}; this bundle's state has {dim} components "
            f"{shown}, so expected ({dim},) or (batch, {dim})."
        )
    batch = 1 if array.ndim == 1 else array.shape[0]
    if batch == 0:
        raise StateError(f"`{where}` is an empty batch (shape {array.shape}); expected at "
                         "least one state.")
    if batch > max_batch:
        raise StateError(f"`{where}` holds {batch} states; the limit is {max_batch} "
                         "(`max_batch`).")
    if array.dtype.kind == "f":
        _refuse_non_finite(array, where, "expected finite numbers")
    with np.errstate(over="ignore"):
        cast = np.ascontiguousarray(array, dtype=dtype)
    _refuse_non_finite(cast, where, f"too large for {np.dtype(dtype)}; expected magnitudes up "
                       f"to {float(np.finfo(dtype).max):.8g}", shown=array)
    return (cast[None, :], True) if cast.ndim == 1 else (cast, False)


def _refuse_non_finite(array: np.ndarray, where: str, expected: str,
                       shown: np.ndarray | None = None) -> None:
    """StateError naming the first non-finite entry of `array` (its value from `shown`)."""
    finite = np.isfinite(array)
    if finite.all():
        return
    index = tuple(int(i) for i in np.argwhere(~finite)[0])
    value = float((array if shown is None else shown)[index])
    raise StateError(f"`{where}` holds {value!r} at index {list(index)}; {expected}.")


def check_times(times, *, max_points: int, where: str = "times") -> np.ndarray:
    """`times` as a 1-D float64 array of finite times ≥ 0.

    Parameters
    ----------
    times : array_like, shape (T,)
        1 ≤ T ≤ `max_points`; any order, repeats allowed.
    max_points : int
        `Limits.max_forecast_points`, or the service's `max_forecast_points`.
    where : str
        How messages name the parameter.
    """
    try:
        array = np.asarray(times, dtype=np.float64)
    except (ValueError, TypeError, OverflowError) as error:
        raise TimeError(f"`{where}` must be a list of numbers: {error}.") from error
    if array.ndim != 1 or array.size == 0:
        raise TimeError(f"`{where}` has shape {array.shape}; expected a non-empty 1-D list of "
                        "times.")
    if array.size > max_points:
        raise TimeError(f"`{where}` holds {array.size} times; the limit is {max_points} "
                        "(`max_forecast_points`).")
    for t in array[~np.isfinite(array) | (array < 0)][:1]:
        raise TimeError(f"`{where}` contains {float(t)!r}; expected finite times ≥ 0.")
    return array


def check_time(t, *, unit: str, where: str = "t") -> float:
    """`t` as a float: a finite number ≥ 0, not a boolean, in the bundle's time `unit`."""
    expected = "a finite time ≥ 0" + (f" (in {unit})" if unit else "")
    if isinstance(t, bool) or not isinstance(t, int | float | np.integer | np.floating):
        raise TimeError(f"`{where}` is {t!r}; expected {expected}.")
    try:
        value = float(t)
    except OverflowError as error:  # a Python int beyond float64
        raise TimeError(f"`{where}` is an integer too large for a float; expected "
                        f"{expected}.") from error
    if not math.isfinite(value) or value < 0:
        raise TimeError(f"`{where}` is {value!r}; expected {expected}.")
    return value


def check_off_grid(off_grid, *, where: str = "off_grid") -> str:
    """`off_grid` if it is one of `OFF_GRID_POLICIES`."""
    if not isinstance(off_grid, str) or off_grid not in OFF_GRID_POLICIES:
        raise OptionError(
            f"`{where}` is {off_grid!r}; expected one of {list(OFF_GRID_POLICIES)}."
        )
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
