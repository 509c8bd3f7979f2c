"""Liveness, readiness and Prometheus metrics."""

from __future__ import annotations

from fastapi import APIRouter, Request
from starlette.responses import PlainTextResponse, Response

from .codec import encode_response
from .context import metrics_of, registry_of
from .metrics import CONTENT_TYPE
from .openapi import readiness_responses, responses
from .schemas import Health, Readiness

router = APIRouter(tags=["health"])


@router.get("/healthz", responses=responses(Health), summary="The process is alive")
async def healthz(request: Request) -> Response:
    return encode_response(request, {"status": "ok"})


@router.get("/readyz", responses=readiness_responses(Readiness),
            summary="Models are loaded and at least one is served")
async def readyz(request: Request) -> Response:
    registry = registry_of(request)
    failed = sum(1 for entry in registry.entries if not entry.ready)
    document = {"ready": registry.ready, "models": len(registry.served), "failed": failed}
    return encode_response(request, document, status=200 if registry.ready else 503)


@router.get("/metrics", summary="Prometheus text exposition",
            response_class=PlainTextResponse)
async def metrics(request: Request) -> Response:
    return Response(metrics_of(request).exposition(), media_type=CONTENT_TYPE)
