"""Validation of decoded request documents into arrays and frozen query records.

What is particular to requests lives here: turning nested JSON lists and MessagePack typed
arrays into arrays, object fields present and known, and the limits only the service sets
(`max_abs_value`, each model's longest time, answer size). The rules for states, times and
options are the runtime's (`stridecast.runtime.validation`), called with the field's name;
their StateError, TimeError or OptionError becomes a 422 with the runtime's own message. Every
failure is an `ApiError` 422 naming the field, the value received and what was expected.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from stridecast.runtime.errors import OptionError, StateError, TimeError
from stridecast.runtime.validation import (
    check_off_grid,
    check_state,
    check_time,
    check_times,
)

from .codec import LITTLE_ENDIAN_DTYPES
from .errors import ApiError


@dataclass(frozen=True)
class AdvanceQuery:
    """A validated `advance` request."""

    state: np.ndarray
    t: float
    off_grid: str


@dataclass(frozen=True)
class ForecastQuery:
    """A validated `forecast` request."""

    state: np.ndarray
    times: tuple[float, ...]
    off_grid: str


@dataclass(frozen=True)
class StateRules:
    """What a request for one model may hold under the current settings.

    `names` are the model's state components (d of them) and `time_unit` its unit, for the
    runtime's messages; `max_value` bounds the magnitude of every state component (inf: only
    what the model's dtype can hold); `max_time` is the longest time accepted (see
    `model_limits.max_time`). The OpenAPI document states the same bounds (`model_schemas`).
    """

    names: tuple[str, ...]
    dtype: np.dtype
    max_batch: int
    max_value: float = math.inf
    max_time: float = math.inf
    time_unit: str = ""

    @property
    def dim(self) -> int:
        return len(self.names)


def invalid(message: str) -> ApiError:
    return ApiError(422, message)


def fields(document: Any, where: str, *, required: set[str], optional: set[str] = frozenset()
           ) -> Mapping[str, Any]:
    """Check that `document` is an object with the required fields and no unknown ones."""
    if not isinstance(document, dict):
        raise invalid(f"{where} must be an object; got {_kind(document)}.")
    unknown = sorted(str(key) for key in document if key not in required | optional)
    if unknown:
        raise invalid(f"{where} has unknown fields {unknown}; expected "
                      f"{sorted(required | optional)}.")
    missing = sorted(required - document.keys())
    if missing:
        raise invalid(f"{where} lacks the required fields {missing}.")
    return document


def _kind(value: Any) -> str:
    if isinstance(value, bool):
        return f"the boolean {str(value).lower()}"
    if isinstance(value, str):
        return f"the string {value[:40]!r}"
    if value is None:
        return "null"
    if isinstance(value, list):
        return f"a list of {len(value)} items"
    if isinstance(value, dict):
        return "an object"
    if isinstance(value, bytes):
        return f"{len(value)} raw bytes"
    return repr(value)


def to_array(value: Any, where: str) -> np.ndarray:
    """Turn nested lists of numbers, or a typed array map, into a float array.

    Only decoding: whether the numbers are finite, and the array's shape, are for the checks
    of what it holds (the runtime's `check_state`, `check_times`).

    Parameters
    ----------
    value : list or dict
        Nested lists of numbers (any depth, rectangular), or the MessagePack typed form
        ``{"dtype": "<f4" | "<f8", "shape": [...], "data": <bytes>}``.
    where : str
        The field name, for messages.
    """
    if isinstance(value, dict):
        return _typed_array(value, where)
    if isinstance(value, list):
        return _nested_array(value, where)
    raise invalid(f"`{where}` must be an array of numbers; got {_kind(value)}.")


def _typed_array(value: dict, where: str) -> np.ndarray:
    spec = fields(value, f"`{where}`", required={"dtype", "shape", "data"})
    dtype = LITTLE_ENDIAN_DTYPES.get(spec["dtype"]) if isinstance(spec["dtype"], str) else None
    if dtype is None:
        raise invalid(f"`{where}.dtype` is {_kind(spec['dtype'])}; expected '<f4' or '<f8'.")
    shape = spec["shape"]
    if (not isinstance(shape, list) or len(shape) > 8
            or any(isinstance(n, bool) or not isinstance(n, int) or n < 0 for n in shape)):
        raise invalid(f"`{where}.shape` is {shape!r}; expected a list of at most 8 "
                      "non-negative integers.")
    data = spec["data"]
    if not isinstance(data, bytes):
        raise invalid(f"`{where}.data` is {_kind(data)}; expected MessagePack bin bytes.")
    expected = math.prod(shape) * dtype.itemsize
    if len(data) != expected:
        raise invalid(f"`{where}.data` holds {len(data)} bytes; shape {shape} of {spec['dtype']} "
                      f"needs {expected} bytes.")
    return np.frombuffer(data, dtype=dtype).reshape(shape)


def _nested_array(value: list, where: str) -> np.ndarray:
    shape: list[int] = []
    level: list[Any] = [value]
    while level and isinstance(level[0], list):
        length = len(level[0])
        for item in level:
            if not isinstance(item, list) or len(item) != length:
                raise invalid(f"`{where}` is ragged: at depth {len(shape)} expected lists of "
                              f"{length} items, got {_kind(item)}.")
        shape.append(length)
        level = [item for sub in level for item in sub]
    for item in level:
        if isinstance(item, bool) or not isinstance(item, int | float):
            raise invalid(f"`{where}` contains {_kind(item)}; expected numbers only.")
    try:
        return np.array(level, dtype=np.float64).reshape(shape)
    except OverflowError as error:
        raise invalid(f"`{where}` contains an integer too large for a float.") from error


def state_array(value: Any, rules: StateRules, where: str = "state") -> np.ndarray:
    """A decoded state `(d,)` or batch `(B, d)`, checked and cast to the model's dtype."""
    return state_value(to_array(value, where), rules, where)


def state_value(array: np.ndarray, rules: StateRules, where: str = "state") -> np.ndarray:
    """The runtime's state checks, then the service's `max_abs_value`; the shape is kept."""
    try:
        cast, single = check_state(array, names=rules.names, dtype=rules.dtype,
                                   max_batch=rules.max_batch, where=where)
    except StateError as error:
        raise invalid(str(error)) from error
    # On the values received (float64 from JSON), not the cast: the bound the schema states.
    if math.isfinite(rules.max_value) and np.abs(array).max() > rules.max_value:
        index = tuple(int(i) for i in np.argwhere(np.abs(array) > rules.max_value)[0])
        raise invalid(f"`{where}` holds {float(array[index])!r} at index {list(index)}; the "
                      f"limit is {rules.max_value!r} in magnitude (`max_abs_value`).")
    return cast[0] if single else cast


def time_value(value: Any, rules: StateRules, where: str = "t") -> float:
    """A time: a JSON number, then the runtime's time check, then the model's longest time."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise invalid(f"`{where}` is {_kind(value)}; expected a number.")
    try:
        number = check_time(value, unit=rules.time_unit, where=where)
    except TimeError as error:
        raise invalid(str(error)) from error
    if number > rules.max_time:
        raise invalid(f"`{where}` is {number!r}; this model answers times up to "
                      f"{rules.max_time!r}.")
    return number


def times_array(value: Any, rules: StateRules, *, max_points: int,
                where: str = "times") -> np.ndarray:
    """Decoded times: the runtime's check (1 to `max_points` finite times ≥ 0), then the
    model's longest time."""
    try:
        array = check_times(to_array(value, where), max_points=max_points, where=where)
    except TimeError as error:
        raise invalid(str(error)) from error
    late = array[array > rules.max_time]
    if late.size:
        raise invalid(f"`{where}` contains {float(late[0])!r}; this model answers times up to "
                      f"{rules.max_time!r}.")
    return array


def off_grid_value(value: Any, where: str = "off_grid") -> str:
    """The runtime's off-grid check, as a 422."""
    try:
        return check_off_grid(value, where=where)
    except OptionError as error:
        raise invalid(str(error)) from error


def parse_advance(document: Any, rules: StateRules) -> AdvanceQuery:
    """Validate ``{"state": ..., "t": ..., "off_grid": ...}``."""
    body = fields(document, "the request body", required={"state", "t"}, optional={"off_grid"})
    return AdvanceQuery(
        state=state_array(body["state"], rules),
        t=time_value(body["t"], rules),
        off_grid=off_grid_value(body.get("off_grid", "interpolate")),
    )


def parse_forecast(document: Any, rules: StateRules, *, max_points: int, max_values: int
                   ) -> ForecastQuery:
    """Validate ``{"state": ..., "times": [...], "off_grid": ...}``.

    The answer holds ``len(times) * state.size`` numbers; more than `max_values` is refused
    so that one request cannot ask for gigabytes.
    """
    body = fields(document, "the request body", required={"state", "times"},
                  optional={"off_grid"})
    times = times_array(body["times"], rules, max_points=max_points)
    state = state_array(body["state"], rules)
    if times.size * state.size > max_values:
        raise invalid(f"the forecast would hold {times.size} times x {state.size} numbers = "
                      f"{times.size * state.size} values; the limit is {max_values} per "
                      "request (send fewer times or a smaller batch).")
    return ForecastQuery(
        state=state,
        times=tuple(float(t) for t in times),
        off_grid=off_grid_value(body.get("off_grid", "interpolate")),
    )
