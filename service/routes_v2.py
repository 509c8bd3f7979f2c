"""The Open Inference Protocol v2 routes, so stock KServe/Triton clients can query a stepper."""

from __future__ import annotations

from typing import Annotated

import anyio
from fastapi import APIRouter, Depends, Request
from starlette.responses import Response

from .auth import require_token
from .codec import encode, encode_response, encoded_response, response_media
from .context import (
    answer_warnings,
    batch_rows,
    gate_of,
    metrics_of,
    read_document,
    registry_of,
    served_stepper,
    state_rules,
)
from .openapi import (
    GET_MODEL_ERRORS,
    POST_ERRORS,
    readiness_responses,
    request_body,
    responses,
)
from .protocol_v2 import infer_response, model_metadata, parse_infer, run_infer
from .schemas import (
    InferRequest,
    InferResponse,
    V2Live,
    V2ModelMetadata,
    V2ModelReady,
    V2Ready,
    V2ServerMetadata,
)
from .settings import Settings, get_settings

router = APIRouter(prefix="/v2", tags=["open inference protocol v2"])
SettingsDep = Annotated[Settings, Depends(get_settings)]


@router.get("", responses=responses(V2ServerMetadata), summary="Server metadata")
async def server_metadata(request: Request) -> Response:
    from stridecast import __version__

    return encode_response(request, {"name": "stridecast", "version": __version__,
                                     "extensions": []})


@router.get("/health/live", responses=responses(V2Live), summary="Server live")
async def live(request: Request) -> Response:
    return encode_response(request, {"live": True})


@router.get("/health/ready", responses=readiness_responses(V2Ready), summary="Server ready")
async def ready(request: Request) -> Response:
    is_ready = registry_of(request).ready
    return encode_response(request, {"ready": is_ready}, status=200 if is_ready else 503)


@router.get("/models/{name}", responses=responses(V2ModelMetadata, *GET_MODEL_ERRORS),
            summary="Model metadata")
async def metadata(name: str, request: Request) -> Response:
    return encode_response(request, model_metadata(name, served_stepper(request, name)))


@router.get("/models/{name}/ready", responses=responses(V2ModelReady, *GET_MODEL_ERRORS),
            summary="Model ready")
async def model_ready(name: str, request: Request) -> Response:
    served_stepper(request, name)
    return encode_response(request, {"name": name, "ready": True})


@router.post("/models/{name}/infer", dependencies=[Depends(require_token)],
             openapi_extra=request_body(InferRequest),
             responses=responses(InferResponse, *POST_ERRORS),
             summary="Inference: advance states to times")
async def infer(name: str, request: Request, settings: SettingsDep) -> Response:
    started = anyio.current_time()
    stepper = served_stepper(request, name)
    query = parse_infer(await read_document(request, settings), state_rules(stepper, settings))
    media, metrics = response_media(request), metrics_of(request)

    def work() -> bytes:
        result, evaluations, methods = run_infer(stepper, query)
        metrics.record_computation(name, "infer", evaluations=evaluations,
                                   states=batch_rows(query.state))
        document = infer_response(name, query, result, evaluations, methods)
        warnings = answer_warnings(stepper, query.state, result, query.times.tolist())
        if warnings:
            document["parameters"]["warnings"] = " ".join(warnings)
        return encode(document, media)

    body = await gate_of(request).run(work, started=started, budget=settings.request_timeout)
    return encoded_response(body, media)
