"""The Open Inference Protocol v2: requests validated into queries, answers built as documents.

Sources: kserve/open-inference-protocol, specification/protocol/inference_rest.md (REST
objects) and open_inference_grpc.proto (the gRPC messages, which carry the same fields); the
binary tensor data extension (Triton's protocol/extension_binary_data.md, also in KServe's
docs). A stepper is a model with inputs `state` [B, d] and `t` [1] or [B] and one output
`state` [B, d]; each model has exactly one version, "1".

Both transports turn their request into `Tensor`s and `RequestOptions`, call `build_query`,
and serialise the one document `infer_document` builds.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from stridecast.runtime import Finding
from stridecast.runtime.findings import WARNING_KINDS

from .errors import ApiError
from .validation import StateRules, invalid, off_grid_value, state_value, time_value

PLATFORM = "stridecast_onnx"
MODEL_VERSION = "1"
# Named as in Triton's server metadata for the binary tensor data extension.
EXTENSIONS = ("binary_tensor_data",)
STATE_TYPES = {"FP32": np.dtype("float32"), "FP64": np.dtype("float64")}
TIME_TYPES = ("FP64", "FP32", "INT64", "INT32")
# Binary and raw tensor contents are little-endian, row-major, unpadded (both documents).
WIRE_DTYPES = {"FP32": np.dtype("<f4"), "FP64": np.dtype("<f8"), "INT32": np.dtype("<i4"),
               "INT64": np.dtype("<i8")}
_DATATYPE_OF = {np.dtype("float32"): "FP32", np.dtype("float64"): "FP64"}
# Parameters with a meaning here; any other request parameter is ignored, as the protocol lets
# servers do with parameters they do not know.
BINARY_OUTPUT = "binary_data_output"


@dataclass(frozen=True)
class Tensor:
    """One input tensor as a transport delivered it: values not yet shaped or checked."""

    name: str
    datatype: str
    shape: tuple[int, ...]
    values: np.ndarray  # flat or nested; its size is checked against `shape`
    where: str          # how messages name it, e.g. "inputs[0]"


@dataclass(frozen=True)
class RequestOptions:
    """Everything in a request besides its input tensors."""

    request_id: str | None
    parameters: Mapping[str, Any]
    outputs: Sequence[tuple[str, Mapping[str, Any]]] | None  # (name, parameters) or None


@dataclass(frozen=True)
class InferQuery:
    """A validated inference request: states, one time or one time per state, the policy."""

    request_id: str | None
    state: np.ndarray
    times: np.ndarray
    off_grid: str
    binary_output: bool


def datatype_of(dtype: np.dtype) -> str:
    return _DATATYPE_OF[np.dtype(dtype)]


def check_version(name: str, version: str | None) -> None:
    """404 unless `version` is absent, empty or the model's only version."""
    if version not in (None, "", MODEL_VERSION):
        raise ApiError(404, f"model {name!r} has no version {version!r}; its only version is "
                            f"{MODEL_VERSION!r}.")


def check_model_fields(name: str, version: str | None, model_name: Any,
                       model_version: Any) -> None:
    """`model_name`/`model_version` in a body (some clients send them) must match the path."""
    if model_name is not None and model_name != name:
        raise invalid(f"`model_name` is {model_name!r} but the request is for model {name!r}; "
                      "leave it out or make it match.")
    if model_version is not None:
        if not isinstance(model_version, str):
            raise invalid(f"`model_version` is {model_version!r}; expected a string.")
        if version not in (None, "") and model_version not in ("", version):
            raise invalid(f"`model_version` is {model_version!r} but the request is for "
                          f"version {version!r}.")
        check_version(name, model_version)


def server_metadata_document() -> dict[str, Any]:
    """The $metadata_server_response (HTTP `GET /v2` and gRPC ServerMetadata)."""
    from stridecast import __version__

    return {"name": "stridecast", "version": __version__, "extensions": list(EXTENSIONS)}


def model_metadata(name: str, stepper: Any) -> dict[str, Any]:
    """The $metadata_model_response of a stepper."""
    datatype = datatype_of(stepper.dtype)
    dim = stepper.state_dim
    return {
        "name": name,
        "versions": [MODEL_VERSION],
        "platform": PLATFORM,
        "inputs": [
            {"name": "state", "datatype": datatype, "shape": [-1, dim]},
            {"name": "t", "datatype": "FP64", "shape": [-1]},
        ],
        "outputs": [{"name": "state", "datatype": datatype, "shape": [-1, dim]}],
    }


def check_input_kind(name: Any, datatype: Any, where: str) -> None:
    """The input is 'state' or 't' and of a datatype this model takes for it."""
    if name not in ("state", "t"):
        raise invalid(f"`{where}.name` is {name!r}; this model's inputs are 'state' and 't'.")
    allowed = tuple(STATE_TYPES) if name == "state" else TIME_TYPES
    if datatype not in allowed:
        raise invalid(f"`{where}.datatype` of input {name!r} is {datatype!r}; expected one of "
                      f"{list(allowed)}.")


def _shaped(tensor: Tensor) -> tuple[str, np.ndarray]:
    where = tensor.where
    check_input_kind(tensor.name, tensor.datatype, where)
    shape = list(tensor.shape)
    if not 1 <= len(shape) <= 2 or any(n < 0 for n in shape):
        raise invalid(f"`{where}.shape` is {shape!r}; expected 1 or 2 non-negative integers.")
    array = tensor.values
    if array.size != math.prod(shape):
        raise invalid(f"`{where}.data` holds {array.size} values; shape {shape} needs "
                      f"{math.prod(shape)}.")
    # Finite values are the state and time checks' rule (`build_query`), not the wire's.
    return tensor.name, array.reshape(shape)


def _binary_requested(options: RequestOptions) -> bool:
    default = options.parameters.get(BINARY_OUTPUT, False)
    if not isinstance(default, bool):
        raise invalid(f"`parameters.{BINARY_OUTPUT}` is {default!r}; expected true or false.")
    if options.outputs is None:
        return default
    binary = default
    for index, (name, parameters) in enumerate(options.outputs):
        if name != "state":
            raise invalid(f"`outputs[{index}].name` is {name!r}; this model's only output is "
                          "'state'.")
        wanted = parameters.get("binary_data", default)
        if not isinstance(wanted, bool):
            raise invalid(f"`outputs[{index}].parameters.binary_data` is {wanted!r}; expected "
                          "true or false.")
        classes = parameters.get("classification", 0)
        if classes not in (0, False):
            raise invalid(f"`outputs[{index}].parameters.classification` is {classes!r}; this "
                          "server does not offer the classification extension.")
        binary = wanted
    return binary


def build_query(tensors: Sequence[Tensor], options: RequestOptions,
                rules: StateRules) -> InferQuery:
    """Validate a request's tensors and options for a stepper."""
    if options.request_id is not None and not isinstance(options.request_id, str):
        raise invalid(f"`id` is {options.request_id!r}; expected a string.")
    shaped: dict[str, np.ndarray] = {}
    for tensor in tensors:
        name, array = _shaped(tensor)
        if name in shaped:
            raise invalid(f"`inputs` names {name!r} twice.")
        shaped[name] = array
    missing = sorted({"state", "t"} - shaped.keys())
    if missing:
        raise invalid(f"`inputs` lacks {missing}; expected tensors 'state' [B, {rules.dim}] "
                      "and 't' [1] or [B].")
    binary = _binary_requested(options)
    state = shaped["state"]
    if state.ndim != 2:
        raise invalid(f"input 'state' has shape {list(state.shape)}; expected [B, {rules.dim}].")
    state = state_value(state, rules, where="inputs['state']")
    times = shaped["t"]
    if times.ndim != 1 or times.size not in (1, state.shape[0]):
        raise invalid(f"input 't' has shape {list(times.shape)}; expected [1] or "
                      f"[{state.shape[0]}] (one time per state).")
    for t in times.tolist():
        time_value(t, rules, where="inputs['t']")
    off_grid = off_grid_value(options.parameters.get("off_grid", "interpolate"),
                              "parameters.off_grid")
    return InferQuery(request_id=options.request_id, state=state,
                      times=times.astype(np.float64), off_grid=off_grid, binary_output=binary)


@dataclass(frozen=True)
class InferOutcome:
    """What `run_infer` computed: the states, what it cost, and how far to trust it."""

    result: np.ndarray
    evaluations: int
    methods: tuple[str, ...]
    findings: tuple[Finding, ...]
    expected_error: float
    """The largest expected error over the requested times (nan when the bundle has none)."""


def run_infer(stepper: Any, query: InferQuery) -> InferOutcome:
    """Advance every state to its time, with the runtime's findings and expected error."""
    distinct = np.unique(query.times)
    if distinct.size == 1:
        result, plan = stepper.advance_with_plan(query.state, float(distinct[0]),
                                                 off_grid=query.off_grid)
        return InferOutcome(result, plan.evaluations, (plan.method,), plan.findings,
                            float(plan.expected_error))
    # One time per state: states sharing a time go through the network together.
    result = np.empty_like(query.state)
    evaluations, methods, findings = 0, set(), []
    for t in distinct:
        rows = query.times == t
        result[rows], plan = stepper.advance_with_plan(query.state[rows], float(t),
                                                       off_grid=query.off_grid)
        evaluations += plan.evaluations
        methods.add(plan.method)
        findings.extend(finding for finding in plan.findings if finding not in findings)
    errors = np.asarray(stepper.expected_error(distinct), dtype=np.float64)
    worst = float(np.max(errors)) if not np.isnan(errors).any() else math.nan
    return InferOutcome(result, evaluations, tuple(sorted(methods)), tuple(findings), worst)


def infer_document(name: str, query: InferQuery, outcome: InferOutcome) -> dict[str, Any]:
    """The $inference_response, the one answer both transports serialise.

    Output `state` carries its full shape and the result array (flattened by the encoder);
    `parameters` says how the answer was produced and how far to trust it: `expected_error`
    (the largest held-out error over the requested times, present when the bundle records one
    and the times are within its data), `extrapolation` (whether any finding warrants a warning)
    and `warnings` (the runtime's sentences, joined). New answer fields go here.
    """
    result = outcome.result
    warnings = [finding.message for finding in outcome.findings
                if finding.kind in WARNING_KINDS]
    document: dict[str, Any] = {"model_name": name, "model_version": MODEL_VERSION}
    if query.request_id is not None:
        document["id"] = query.request_id
    parameters: dict[str, Any] = {"evaluations": outcome.evaluations,
                                  "method": ",".join(outcome.methods),
                                  "extrapolation": bool(warnings)}
    if math.isfinite(outcome.expected_error):
        parameters["expected_error"] = outcome.expected_error
    if warnings:
        parameters["warnings"] = " ".join(warnings)
    document["parameters"] = parameters
    document["outputs"] = [{
        "name": "state",
        "shape": list(result.shape),
        "datatype": datatype_of(result.dtype),
        "data": result.reshape(-1),
    }]
    return document
