"""The Open Inference Protocol v2 routes, so stock KServe/Triton clients can query a stepper.

Paths as in kserve/open-inference-protocol, specification/protocol/inference_rest.md; the
version part of a path is optional (every model has one version, "1").
"""

from __future__ import annotations

from typing import Annotated

import anyio
from fastapi import APIRouter, Depends, Request
from starlette.responses import Response

from .auth import require_token
from .codec import JSON_MEDIA, encode, encode_response, encoded_response, response_media
from .compression import compress, response_coding
from .context import (
    batch_rows,
    decode_document,
    gate_of,
    metrics_of,
    read_bytes,
    registry_of,
    served_stepper,
    state_rules,
)
from .infer_rest import BINARY_MEDIA, HEADER, binary_answer, rest_request, split_body
from .openapi import (
    GET_MODEL_ERRORS,
    POST_ERRORS,
    infer_responses,
    readiness_responses,
    request_body,
    responses,
)
from .protocol_v2 import (
    build_query,
    check_model_fields,
    check_version,
    infer_document,
    model_metadata,
    run_infer,
    server_metadata_document,
)
from .schemas import (
    InferRequest,
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
    return encode_response(request, server_metadata_document())


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


@router.get("/models/{name}/versions/{version}",
            responses=responses(V2ModelMetadata, *GET_MODEL_ERRORS),
            summary="Model metadata (of a version)")
async def version_metadata(name: str, version: str, request: Request) -> Response:
    stepper = served_stepper(request, name)
    check_version(name, version)
    return encode_response(request, model_metadata(name, stepper))


@router.get("/models/{name}/ready", responses=responses(V2ModelReady, *GET_MODEL_ERRORS),
            summary="Model ready")
async def model_ready(name: str, request: Request) -> Response:
    served_stepper(request, name)
    return encode_response(request, {"name": name, "ready": True})


@router.get("/models/{name}/versions/{version}/ready",
            responses=responses(V2ModelReady, *GET_MODEL_ERRORS),
            summary="Model ready (a version)")
async def version_ready(name: str, version: str, request: Request) -> Response:
    served_stepper(request, name)
    check_version(name, version)
    return encode_response(request, {"name": name, "ready": True})


@router.post("/models/{name}/infer", dependencies=[Depends(require_token)],
             openapi_extra=request_body(InferRequest, binary=True),
             responses=infer_responses(*POST_ERRORS),
             summary="Inference: advance states to times")
async def infer(name: str, request: Request, settings: SettingsDep) -> Response:
    return await _infer(name, None, request, settings)


@router.post("/models/{name}/versions/{version}/infer", dependencies=[Depends(require_token)],
             openapi_extra=request_body(InferRequest, binary=True),
             responses=infer_responses(*POST_ERRORS),
             summary="Inference (a version): advance states to times")
async def version_infer(name: str, version: str, request: Request,
                        settings: SettingsDep) -> Response:
    return await _infer(name, version, request, settings)


async def _infer(name: str, version: str | None, request: Request,
                 settings: Settings) -> Response:
    started = anyio.current_time()
    stepper = served_stepper(request, name)
    check_version(name, version)
    gate = gate_of(request)
    async with gate.admit() as ticket:  # admitted before a byte of the body is read
        body = await read_bytes(request, settings)
        header_part, binary_part = split_body(body, request.headers.get(HEADER))
        document = decode_document(request, header_part, settings, any_type_is_json=True)
        tensors, options, model_name, model_version = rest_request(document, binary_part)
        check_model_fields(name, version, model_name, model_version)
        query = build_query(tensors, options, state_rules(stepper, settings))
        media, metrics = response_media(request), metrics_of(request)
        coding = response_coding(request.headers.get("accept-encoding"))

        def work() -> tuple[bytes, str, dict[str, str]]:
            outcome = run_infer(stepper, query)
            metrics.record_computation(name, "infer", evaluations=outcome.evaluations,
                                       states=batch_rows(query.state))
            answer = infer_document(name, query, outcome)
            headers: dict[str, str] = {}
            if query.binary_output and media == JSON_MEDIA:
                payload, header_length = binary_answer(answer)
                headers[HEADER] = str(header_length)
                kind = BINARY_MEDIA
            else:
                payload, kind = encode(answer, media), media
            payload, coded = compress(payload, coding)
            return payload, kind, {**headers, **coded}

        payload, kind, headers = await gate.run(work, started=started,
                                                budget=settings.request_timeout, ticket=ticket)
    return encoded_response(payload, kind, headers=headers)
