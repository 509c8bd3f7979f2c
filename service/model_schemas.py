"""Request-body schemas of one served model: what validation checks, stated exactly.

The generic schemas in `schemas` hold for every model; these add the model's state dimension,
the batch, forecast-point, time and magnitude bounds of `StateRules`, the off-grid policy's
grid, and, for the inference protocol, that each tensor's `data` holds the product of its
`shape` (stated by listing the batch sizes, up to `ENUMERATED_BATCH`).
"""

from __future__ import annotations

import math
from functools import reduce
from typing import Any

import numpy as np

from stridecast.runtime.validation import OFF_GRID_POLICIES

from .model_limits import overflow_threshold
from .protocol_v2 import STATE_TYPES, TIME_TYPES
from .validation import StateRules

# Up to this batch limit the inference schema lists one alternative per batch size, tying the
# data length to the shape; beyond it the document would grow past a few hundred kilobytes per
# model, so lengths are bounded but not tied (the description says so).
ENUMERATED_BATCH = 64
_PARAMETER_VALUE = {"anyOf": [{"type": "string"}, {"type": "number"}, {"type": "boolean"}]}


def value_schema(rules: StateRules) -> dict[str, Any]:
    """One state component: a number the model's dtype holds, within `max_value`."""
    if math.isfinite(rules.max_value):
        bound = min(rules.max_value, float(np.finfo(rules.dtype).max))
        return {"type": "number", "minimum": -bound, "maximum": bound}
    threshold = overflow_threshold(rules.dtype)
    if math.isfinite(threshold):
        return {"type": "number", "exclusiveMinimum": -threshold, "exclusiveMaximum": threshold}
    largest = float(np.finfo(rules.dtype).max)
    return {"type": "number", "minimum": -largest, "maximum": largest}


def time_schema(rules: StateRules) -> dict[str, Any]:
    return {"type": "number", "minimum": 0, "maximum": rules.max_time}


def grid_step(stepper: Any) -> float:
    """The spacing of the times `off_grid="error"` accepts: base step x gcd of the strides."""
    return stepper.base_step * reduce(math.gcd, stepper.strides)


def _exact_array(items: dict[str, Any], length: int) -> dict[str, Any]:
    return {"type": "array", "items": items, "minItems": length, "maxItems": length}


def v1_requests(stepper: Any, rules: StateRules, *, max_points: int,
                max_values: int) -> dict[str, dict[str, Any]]:
    """`AdvanceRequest` and `ForecastRequest` of this model (keys: those names)."""
    row = _exact_array(value_schema(rules), rules.dim)
    batch = {"type": "array", "items": row, "minItems": 1, "maxItems": rules.max_batch}
    state = {"anyOf": [row, batch], "description": f"One state of {rules.dim} numbers, or a "
             f"batch of 1 to {rules.max_batch} such rows."}
    off_grid = {"type": "string", "enum": list(OFF_GRID_POLICIES), "default": "interpolate"}
    time, step = time_schema(rules), grid_step(stepper)
    # With off_grid="error" a time must be a reachable grid time.
    strict = {"properties": {"off_grid": {"const": "error"}}, "required": ["off_grid"]}
    advance = {
        "type": "object", "additionalProperties": False, "required": ["state", "t"],
        "properties": {"state": state, "t": time, "off_grid": off_grid},
        "if": strict, "then": {"properties": {"t": {"multipleOf": step}}},
    }
    forecast = {
        "type": "object", "additionalProperties": False, "required": ["state", "times"],
        "properties": {
            "state": state,
            "times": {"type": "array", "items": time, "minItems": 1, "maxItems": max_points,
                      "description": f"At most {max_points} times, and at most {max_values} "
                                     "numbers in the answer (times x batch x d; 422 beyond: "
                                     "a bound across fields that JSON Schema cannot state)."},
            "off_grid": off_grid},
        "if": strict,
        "then": {"properties": {"times": {"items": {"multipleOf": step}}}},
    }
    return {"AdvanceRequest": advance, "ForecastRequest": forecast}


def _tensor(name: str, datatypes: tuple[str, ...], shape: list[dict[str, Any]],
            data: dict[str, Any]) -> dict[str, Any]:
    # `binary_data_size` belongs to bodies with binary parts, which a schema cannot describe.
    parameters = {"type": "object", "additionalProperties": _PARAMETER_VALUE,
                  "properties": {"binary_data_size": False}}
    return {
        "type": "object", "additionalProperties": False,
        "required": ["name", "shape", "datatype", "data"],
        "properties": {
            "name": {"const": name},
            "shape": {"type": "array", "prefixItems": shape, "minItems": len(shape),
                      "maxItems": len(shape)},
            "datatype": {"type": "string", "enum": list(datatypes)},
            "parameters": {"anyOf": [parameters, {"type": "null"}]},
            "data": data,
        },
    }


def _inputs(rules: StateRules, time: dict[str, Any]) -> dict[str, Any]:
    value, dim = value_schema(rules), rules.dim

    def state(batch: int | None) -> dict[str, Any]:
        if batch is None:
            shape = [{"type": "integer", "minimum": 1, "maximum": rules.max_batch},
                     {"const": dim}]
            data = {"type": "array", "items": value, "minItems": dim,
                    "maxItems": rules.max_batch * dim}
        else:
            shape, data = [{"const": batch}, {"const": dim}], _exact_array(value, batch * dim)
        return _tensor("state", tuple(STATE_TYPES), shape, data)

    def times(count: int | None) -> dict[str, Any]:
        if count is None:
            shape = [{"type": "integer", "minimum": 1, "maximum": rules.max_batch}]
            data = {"type": "array", "items": time, "minItems": 1,
                    "maxItems": rules.max_batch}
        else:
            shape, data = [{"const": count}], _exact_array(time, count)
        return _tensor("t", TIME_TYPES, shape, data)

    def pair(first: dict[str, Any], second: dict[str, Any]) -> list[dict[str, Any]]:
        return [{"type": "array", "prefixItems": items, "minItems": 2, "maxItems": 2}
                for items in ([first, second], [second, first])]

    if rules.max_batch > ENUMERATED_BATCH:
        return {"anyOf": pair(state(None), times(None)), "description": "Tensors 'state' "
                "[B, d] and 't' [1] or [B]; each `data` holds the product of its `shape` "
                f"(not stated here for batch limits above {ENUMERATED_BATCH})."}
    alternatives: list[dict[str, Any]] = []
    for batch in range(1, rules.max_batch + 1):
        alternatives += pair(state(batch), times(1))
        if batch > 1:
            alternatives += pair(state(batch), times(batch))
    return {"anyOf": alternatives, "description": "Tensors 'state' [B, d] and 't' [1] or [B], "
            "in either order; each `data` holds the product of its `shape`."}


def infer_request(name: str, stepper: Any, rules: StateRules) -> dict[str, Any]:
    """`InferRequest` of this model."""
    time, step = time_schema(rules), grid_step(stepper)
    off_grid = {"type": "string", "enum": list(OFF_GRID_POLICIES)}
    parameters = {"type": "object", "additionalProperties": _PARAMETER_VALUE,
                  "properties": {"off_grid": off_grid,
                                 "binary_data_output": {"type": "boolean"}}}
    output_parameters = {"type": "object", "additionalProperties": _PARAMETER_VALUE,
                         "properties": {"binary_data": {"type": "boolean"},
                                        "classification": {"enum": [0, False]}}}
    output = {"type": "object", "additionalProperties": False, "required": ["name"],
              "properties": {"name": {"const": "state"},
                             "parameters": {"anyOf": [output_parameters, {"type": "null"}]}}}
    strict = {"properties": {"parameters": {"properties": {"off_grid": {"const": "error"}},
                                            "required": ["off_grid"]}},
              "required": ["parameters"]}
    return {
        "type": "object", "additionalProperties": False, "required": ["inputs"],
        "properties": {
            "id": {"anyOf": [{"type": "string"}, {"type": "null"}]},
            "model_name": {"anyOf": [{"const": name}, {"type": "null"}]},
            "model_version": {"anyOf": [{"enum": ["", "1"]}, {"type": "null"}]},
            "parameters": {"anyOf": [parameters, {"type": "null"}]},
            "inputs": _inputs(rules, time),
            "outputs": {"anyOf": [{"type": "array", "items": output}, {"type": "null"}]},
        },
        "if": strict,
        # Only adds the grid to the times of input 't'; everything above still holds.
        "then": {"properties": {"inputs": {"items": {
            "if": {"properties": {"name": {"const": "t"}}},
            "then": {"properties": {"data": {"items": {"multipleOf": step}}}}}}}},
    }
