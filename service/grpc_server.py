"""The Open Inference Protocol over gRPC, served beside HTTP from the same app state.

Source: kserve/open-inference-protocol, specification/protocol/inference_grpc.md and
open_inference_grpc.proto. The server runs on the app's event loop (grpc.aio), so it shares
the model registry, the settings (limits and token), the concurrency gate and the metrics
with the HTTP routes; it starts and stops with the app's lifespan.
"""

from __future__ import annotations

import hmac
import logging
import time
from collections.abc import Awaitable, Callable
from typing import Any

import anyio
import grpc
import numpy as np
from fastapi import FastAPI

from stridecast.runtime.errors import StridecastError

from .context import batch_rows, state_rules
from .errors import ApiError, from_domain_error
from .grpc_messages import SERVICE, messages
from .protocol_v2 import (
    WIRE_DTYPES,
    RequestOptions,
    Tensor,
    build_query,
    check_model_fields,
    check_version,
    infer_document,
    model_metadata,
    run_infer,
    server_metadata_document,
)

logger = logging.getLogger("stridecast.service")

# HTTP statuses the service reports, as gRPC status codes (common practice; the mapping
# gRPC documents in its "HTTP to gRPC Status Code Mapping" goes the other way).
_STATUS = {400: grpc.StatusCode.INVALID_ARGUMENT, 401: grpc.StatusCode.UNAUTHENTICATED,
           404: grpc.StatusCode.NOT_FOUND, 413: grpc.StatusCode.RESOURCE_EXHAUSTED,
           415: grpc.StatusCode.INVALID_ARGUMENT, 422: grpc.StatusCode.INVALID_ARGUMENT,
           503: grpc.StatusCode.UNAVAILABLE, 504: grpc.StatusCode.DEADLINE_EXCEEDED}
# Typed contents fields per datatype (the .proto's InferTensorContents).
_CONTENTS = {"FP32": "fp32_contents", "FP64": "fp64_contents", "INT32": "int_contents",
             "INT64": "int64_contents"}
Handler = Callable[[Any, grpc.aio.ServicerContext], Awaitable[Any]]


def parameter_value(parameter: Any) -> Any:
    """The Python value of an InferParameter (None when unset)."""
    kind = parameter.WhichOneof("parameter_choice")
    return None if kind is None else getattr(parameter, kind)


def set_parameter(parameter: Any, value: Any) -> None:
    if isinstance(value, bool):
        parameter.bool_param = value
    elif isinstance(value, int):
        parameter.int64_param = value
    elif isinstance(value, float):
        parameter.double_param = value
    else:
        parameter.string_param = str(value)


def request_tensors(request: Any) -> tuple[list[Tensor], RequestOptions]:
    """A ModelInferRequest as the protocol-neutral tensors and options."""
    raw = list(request.raw_input_contents)
    if raw and len(raw) != len(request.inputs):
        raise ApiError(422, f"`raw_input_contents` has {len(raw)} entries for "
                            f"{len(request.inputs)} inputs; expected one per input.")
    tensors = []
    for index, item in enumerate(request.inputs):
        where = f"inputs[{index}]"
        if raw:
            dtype = WIRE_DTYPES.get(item.datatype)
            if dtype is None:
                raise ApiError(422, f"`{where}.datatype` is {item.datatype!r}; expected one of "
                                    f"{list(WIRE_DTYPES)}.")
            if len(raw[index]) % dtype.itemsize:
                raise ApiError(422, f"`raw_input_contents[{index}]` has {len(raw[index])} "
                                    f"bytes, not a whole number of {item.datatype} values.")
            values = np.frombuffer(raw[index], dtype=dtype).astype(dtype.newbyteorder("="))
        else:
            field = _CONTENTS.get(item.datatype)
            if field is None:
                raise ApiError(422, f"`{where}.datatype` is {item.datatype!r}; expected one of "
                                    f"{list(_CONTENTS)}.")
            values = np.asarray(getattr(item.contents, field), dtype=np.float64)
        tensors.append(Tensor(item.name, item.datatype, tuple(item.shape), values, where))
    options = RequestOptions(
        request_id=request.id or None,
        parameters={key: parameter_value(value) for key, value in request.parameters.items()},
        outputs=[(output.name, {key: parameter_value(value)
                                for key, value in output.parameters.items()})
                 for output in request.outputs] or None)
    return tensors, options


def response_message(document: dict[str, Any]) -> Any:
    """The ModelInferResponse of an `infer_document`; tensor data goes to raw contents."""
    response = messages().ModelInferResponse(model_name=document["model_name"],
                                             model_version=document.get("model_version", ""),
                                             id=document.get("id", ""))
    for key, value in document.get("parameters", {}).items():
        set_parameter(response.parameters[key], value)
    for output in document["outputs"]:
        tensor = response.outputs.add(name=output["name"], datatype=output["datatype"],
                                      shape=output["shape"])
        for key, value in output.get("parameters", {}).items():
            set_parameter(tensor.parameters[key], value)
        array = np.asarray(output["data"])
        response.raw_output_contents.append(
            np.ascontiguousarray(array, dtype=array.dtype.newbyteorder("<")).tobytes())
    return response


class InferenceService:
    """The six RPCs, reading the app's state at each call (as the HTTP handlers do)."""

    def __init__(self, app: FastAPI):
        self.app = app

    @property
    def _state(self) -> Any:
        return self.app.state

    def _stepper(self, name: str) -> Any:
        registry = self._state.registry
        if not registry.loaded:
            raise ApiError(503, "the service is still loading its models; try again shortly.")
        entry = registry.get(name)
        if entry is None or not entry.ready:
            known = [item.name for item in registry.served]
            raise ApiError(404, f"there is no served model {name!r}; the served models are "
                                f"{known}.")
        return entry.stepper

    def _check_token(self, context: grpc.aio.ServicerContext) -> None:
        expected = self._state.settings.bearer_token()
        if expected is None:
            return
        metadata = {key.lower(): value for key, value in (context.invocation_metadata() or ())}
        given = metadata.get("authorization", "")
        scheme, _, token = given.partition(" ") if isinstance(given, str) else ("", "", "")
        if scheme.lower() != "bearer" or not token:
            raise ApiError(401, "ModelInfer needs the metadata `authorization: Bearer <token>`.")
        if not hmac.compare_digest(token.strip().encode("utf-8"), expected.encode("utf-8")):
            raise ApiError(401, "the bearer token is not valid.")

    async def ServerLive(self, request: Any, context: Any) -> Any:  # method names as in the .proto
        return messages().ServerLiveResponse(live=True)

    async def ServerReady(self, request: Any, context: Any) -> Any:
        return messages().ServerReadyResponse(ready=self._state.registry.ready)

    async def ModelReady(self, request: Any, context: Any) -> Any:
        registry = self._state.registry
        entry = registry.get(request.name) if registry.loaded else None
        if entry is None:
            self._stepper(request.name)  # raises the 404 / 503 with its message
        check_version(request.name, request.version)
        return messages().ModelReadyResponse(ready=bool(entry.ready))

    async def ServerMetadata(self, request: Any, context: Any) -> Any:
        return messages().ServerMetadataResponse(**server_metadata_document())

    async def ModelMetadata(self, request: Any, context: Any) -> Any:
        stepper = self._stepper(request.name)
        check_version(request.name, request.version)
        document = model_metadata(request.name, stepper)
        response = messages().ModelMetadataResponse(
            name=document["name"], versions=document["versions"], platform=document["platform"])
        for kind in ("inputs", "outputs"):
            for tensor in document[kind]:
                getattr(response, kind).add(**tensor)
        return response

    async def ModelInfer(self, request: Any, context: Any) -> Any:
        started = anyio.current_time()
        self._check_token(context)
        name = request.model_name
        stepper = self._stepper(name)
        check_model_fields(name, None, None, request.model_version)
        settings = self._state.settings
        tensors, options = request_tensors(request)
        query = build_query(tensors, options, state_rules(stepper, settings))
        metrics = self._state.metrics
        budget = settings.request_timeout
        remaining = context.time_remaining()
        if remaining is not None:
            budget = min(budget, remaining)

        def work() -> Any:
            outcome = run_infer(stepper, query)
            metrics.record_computation(name, "infer", evaluations=outcome.evaluations,
                                       states=batch_rows(query.state))
            return response_message(infer_document(name, query, outcome))

        gate = self._state.gate
        if gate is None:
            raise ApiError(503, "the service is not running.")
        return await gate.run(work, started=started, budget=budget)


def _wrapped(app: FastAPI, method: str, handler: Handler) -> Handler:
    """Errors become gRPC statuses with the service's messages; every call is counted."""

    async def call(request: Any, context: grpc.aio.ServicerContext) -> Any:
        started = time.perf_counter()
        code = grpc.StatusCode.OK
        model = getattr(request, "model_name", None) or getattr(request, "name", None)
        try:
            try:
                return await handler(request, context)
            except StridecastError as error:
                raise from_domain_error(error) from error
        except ApiError as error:
            code = _STATUS.get(error.status, grpc.StatusCode.INTERNAL)
            if code is grpc.StatusCode.INTERNAL:
                logger.error("gRPC %s failed: %s", method, error.message)
            await context.abort(code, error.message)
        finally:
            metrics = app.state.metrics
            known = model is not None and app.state.registry.get(model) is not None
            label = "" if model is None else (model if known else "unknown")
            route = f"/{SERVICE}/{method}"
            metrics.requests.labels("GRPC", route, label, code.name).inc()
            metrics.latency.labels("GRPC", route, label).observe(time.perf_counter() - started)

    return call


def build_server(app: FastAPI, *, host: str, port: int) -> tuple[grpc.aio.Server, int]:
    """A grpc.aio server for `app` bound to `host:port` (0 picks a free port); not started."""
    settings = app.state.settings
    service = InferenceService(app)
    types = messages()
    handlers = {}
    for method, (request_type, response_type) in {
        "ServerLive": ("ServerLiveRequest", "ServerLiveResponse"),
        "ServerReady": ("ServerReadyRequest", "ServerReadyResponse"),
        "ModelReady": ("ModelReadyRequest", "ModelReadyResponse"),
        "ServerMetadata": ("ServerMetadataRequest", "ServerMetadataResponse"),
        "ModelMetadata": ("ModelMetadataRequest", "ModelMetadataResponse"),
        "ModelInfer": ("ModelInferRequest", "ModelInferResponse"),
    }.items():
        handlers[method] = grpc.unary_unary_rpc_method_handler(
            _wrapped(app, method, getattr(service, method)),
            request_deserializer=getattr(types, request_type).FromString,
            response_serializer=getattr(types, response_type).SerializeToString)
    server = grpc.aio.server(
        # Admission: calls beyond the gate's capacity are refused before their message is kept.
        maximum_concurrent_rpcs=settings.max_concurrency + settings.max_waiting,
        options=[("grpc.max_receive_message_length", settings.max_body_bytes),
                 ("grpc.max_send_message_length", -1)])
    server.add_generic_rpc_handlers((grpc.method_handlers_generic_handler(SERVICE, handlers),))
    bound = server.add_insecure_port(f"{host}:{port}")
    if bound == 0:
        raise OSError(f"gRPC could not listen on {host}:{port}.")
    return server, bound
