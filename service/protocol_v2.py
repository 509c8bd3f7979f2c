"""The Open Inference Protocol v2 (KServe / Triton REST): request parsing and documents.

Source: kserve/open-inference-protocol, specification/protocol/inference_rest.md. A stepper
is a model with inputs `state` [B, d] and `t` [1] or [B] and one output `state` [B, d].
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from .validation import (
    StateRules,
    check_state,
    fields,
    invalid,
    off_grid_value,
    time_value,
    to_array,
)

PLATFORM = "stridecast_onnx"
STATE_TYPES = {"FP32": np.dtype("float32"), "FP64": np.dtype("float64")}
TIME_TYPES = ("FP64", "FP32", "INT64", "INT32")
_DATATYPE_OF = {np.dtype("float32"): "FP32", np.dtype("float64"): "FP64"}


@dataclass(frozen=True)
class InferQuery:
    """A validated inference request: states, one time or one time per state, the policy."""

    request_id: str | None
    state: np.ndarray
    times: np.ndarray
    off_grid: str


def datatype_of(dtype: np.dtype) -> str:
    return _DATATYPE_OF[np.dtype(dtype)]


def model_metadata(name: str, stepper: Any) -> dict[str, Any]:
    """The $metadata_model_response of a stepper."""
    datatype = datatype_of(stepper.dtype)
    dim = stepper.state_dim
    return {
        "name": name,
        "platform": PLATFORM,
        "inputs": [
            {"name": "state", "datatype": datatype, "shape": [-1, dim]},
            {"name": "t", "datatype": "FP64", "shape": [-1]},
        ],
        "outputs": [{"name": "state", "datatype": datatype, "shape": [-1, dim]}],
    }


def _tensor(item: Any, index: int) -> tuple[str, np.ndarray]:
    where = f"inputs[{index}]"
    spec = fields(item, f"`{where}`", required={"name", "shape", "datatype", "data"},
                  optional={"parameters"})
    name = spec["name"]
    if name not in ("state", "t"):
        raise invalid(f"`{where}.name` is {name!r}; this model's inputs are 'state' and 't'.")
    allowed = tuple(STATE_TYPES) if name == "state" else TIME_TYPES
    if spec["datatype"] not in allowed:
        raise invalid(f"`{where}.datatype` of input {name!r} is {spec['datatype']!r}; expected "
                      f"one of {list(allowed)}.")
    shape = spec["shape"]
    if (not isinstance(shape, list) or not 1 <= len(shape) <= 2
            or any(isinstance(n, bool) or not isinstance(n, int) or n < 0 for n in shape)):
        raise invalid(f"`{where}.shape` is {shape!r}; expected 1 or 2 non-negative integers.")
    array = to_array(spec["data"], f"{where}.data")
    if array.size != math.prod(shape):
        raise invalid(f"`{where}.data` holds {array.size} values; shape {shape} needs "
                      f"{math.prod(shape)}.")
    return name, array.reshape(shape)


def parse_infer(document: Any, rules: StateRules) -> InferQuery:
    """Validate a $inference_request for a stepper."""
    body = fields(document, "the request body", required={"inputs"},
                  optional={"id", "parameters", "outputs"})
    request_id = body.get("id")
    if request_id is not None and not isinstance(request_id, str):
        raise invalid(f"`id` is {request_id!r}; expected a string.")
    parameters = body.get("parameters") or {}
    if not isinstance(parameters, dict):
        raise invalid("`parameters` must be an object.")
    inputs = body["inputs"]
    if not isinstance(inputs, list):
        raise invalid("`inputs` must be a list of tensors 'state' and 't'.")
    tensors: dict[str, np.ndarray] = {}
    for index, item in enumerate(inputs):
        name, array = _tensor(item, index)
        if name in tensors:
            raise invalid(f"`inputs` names {name!r} twice.")
        tensors[name] = array
    missing = sorted({"state", "t"} - tensors.keys())
    if missing:
        raise invalid(f"`inputs` lacks {missing}; expected tensors 'state' [B, {rules.dim}] "
                      "and 't' [1] or [B].")
    _check_outputs(body.get("outputs"))
    state = tensors["state"]
    if state.ndim != 2:
        raise invalid(f"input 'state' has shape {list(state.shape)}; expected [B, {rules.dim}].")
    state = check_state(state, rules, where="inputs['state']")
    times = tensors["t"]
    if times.ndim != 1 or times.size not in (1, state.shape[0]):
        raise invalid(f"input 't' has shape {list(times.shape)}; expected [1] or "
                      f"[{state.shape[0]}] (one time per state).")
    for t in times.tolist():
        time_value(t, "inputs['t']")
    return InferQuery(request_id=request_id, state=state, times=times.astype(np.float64),
                      off_grid=off_grid_value(parameters.get("off_grid", "interpolate"),
                                              "parameters.off_grid"))


def _check_outputs(outputs: Any) -> None:
    if outputs is None:
        return
    if not isinstance(outputs, list):
        raise invalid("`outputs` must be a list of requested outputs.")
    for index, item in enumerate(outputs):
        spec = fields(item, f"`outputs[{index}]`", required={"name"}, optional={"parameters"})
        if spec["name"] != "state":
            raise invalid(f"`outputs[{index}].name` is {spec['name']!r}; this model's only "
                          "output is 'state'.")


def run_infer(stepper: Any, query: InferQuery) -> tuple[np.ndarray, int, tuple[str, ...]]:
    """Advance every state to its time; returns states, network evaluations and methods."""
    distinct = np.unique(query.times)
    if distinct.size == 1:
        result, plan = stepper.advance_with_plan(query.state, float(distinct[0]),
                                                 off_grid=query.off_grid)
        return result, plan.evaluations, (plan.method,)
    # One time per state: states sharing a time go through the network together.
    result = np.empty_like(query.state)
    evaluations, methods = 0, set()
    for t in distinct:
        rows = query.times == t
        result[rows], plan = stepper.advance_with_plan(query.state[rows], float(t),
                                                       off_grid=query.off_grid)
        evaluations += plan.evaluations
        methods.add(plan.method)
    return result, evaluations, tuple(sorted(methods))


def infer_response(name: str, query: InferQuery, result: np.ndarray, evaluations: int,
                   methods: tuple[str, ...]) -> dict[str, Any]:
    """The $inference_response: output `state` with its full shape and flat row-major data."""
    document: dict[str, Any] = {"model_name": name}
    if query.request_id is not None:
        document["id"] = query.request_id
    document["parameters"] = {"evaluations": evaluations, "method": ",".join(methods)}
    document["outputs"] = [{
        "name": "state",
        "shape": list(result.shape),
        "datatype": datatype_of(result.dtype),
        "data": result.reshape(-1),
    }]
    return document
