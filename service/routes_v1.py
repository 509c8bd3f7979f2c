"""The `/v1` routes: list and describe models, advance and forecast states."""

from __future__ import annotations

from collections.abc import Callable
from functools import partial
from typing import Annotated, Any

import anyio
from fastapi import APIRouter, Depends, Request
from starlette.responses import Response

from stridecast.runtime.describe import describe_stepper

from .auth import require_token
from .codec import encode, encode_response, encoded_response, response_media
from .compression import compress, response_coding
from .context import (
    batch_rows,
    gate_of,
    metrics_of,
    read_document,
    registry_of,
    served_stepper,
    state_rules,
    trust_fields,
)
from .openapi import GET_MODEL_ERRORS, POST_ERRORS, request_body, responses
from .registry import ModelEntry
from .schemas import (
    AdvanceRequest,
    AdvanceResponse,
    ForecastRequest,
    ForecastResponse,
    ModelDetail,
    ModelList,
)
from .settings import Settings, get_settings
from .validation import StateRules, parse_advance, parse_forecast

router = APIRouter(prefix="/v1", tags=["v1"])
SettingsDep = Annotated[Settings, Depends(get_settings)]


def model_summary(entry: ModelEntry) -> dict[str, Any]:
    """An entry of `GET /v1/models` (`schemas.ModelSummary`), from the runtime's description."""
    summary: dict[str, Any] = {"name": entry.name, "ready": entry.ready, "source": entry.source,
                               "error": entry.error}
    if entry.ready:
        described = describe_stepper(entry.stepper)
        summary.update(state_dim=described["state"]["dim"],
                       base_step=described["time"]["base_step"],
                       time_unit=described["time"]["unit"], strides=described["strides"])
    return summary


# The fields of the runtime's description that `GET /v1/models/{name}` shows (ModelDetail).
DETAIL_FIELDS = ("description", "state", "time", "strides", "update", "envelope",
                 "validated_horizon", "dtype")


def model_detail(name: str, stepper: Any) -> dict[str, Any]:
    """`GET /v1/models/{name}` (`schemas.ModelDetail`): the runtime's description of the
    stepper, under the name it is served as."""
    described = describe_stepper(stepper)
    return {"name": name, **{field: described[field] for field in DETAIL_FIELDS}}


@router.get("/models", responses=responses(ModelList),
            summary="Every configured model, including ones that failed to load")
async def list_models(request: Request) -> Response:
    entries = registry_of(request).entries
    return encode_response(request, {"models": [model_summary(entry) for entry in entries]})


@router.get("/models/{name}", responses=responses(ModelDetail, *GET_MODEL_ERRORS),
            summary="Manifest summary of one model")
async def describe_model(name: str, request: Request) -> Response:
    return encode_response(request, model_detail(name, served_stepper(request, name)))


@router.post("/models/{name}/advance", dependencies=[Depends(require_token)],
             openapi_extra=request_body(AdvanceRequest),
             responses=responses(AdvanceResponse, *POST_ERRORS),
             summary="Advance a state or a batch from time 0 to time t")
async def advance(name: str, request: Request, settings: SettingsDep) -> Response:
    return await _computed(name, request, settings, parse_advance, _advance)


async def _computed(name: str, request: Request, settings: Settings,
                    parse: Callable[[Any, StateRules], Any], compute: Callable[..., Response]
                    ) -> Response:
    """The steps of every v1 computation: admit, read and `parse` the body, then run
    `compute(stepper, name, query, media, metrics, coding)` in a worker thread under the
    request's time budget."""
    started = anyio.current_time()
    stepper = served_stepper(request, name)
    gate = gate_of(request)
    async with gate.admit() as ticket:  # admitted before a byte of the body is read
        query = parse(await read_document(request, settings), state_rules(stepper, settings))
        media, metrics = response_media(request), metrics_of(request)
        coding = response_coding(request.headers.get("accept-encoding"))
        return await gate.run(partial(compute, stepper, name, query, media, metrics, coding),
                              started=started, budget=settings.request_timeout, ticket=ticket)


def _advance(stepper: Any, name: str, query: Any, media: str, metrics: Any,
             coding: str | None) -> Response:
    # Runs in a worker thread: computing, encoding and compressing stay off the event loop.
    result, plan = stepper.advance_with_plan(query.state, query.t, off_grid=query.off_grid)
    metrics.record_computation(name, "advance", evaluations=plan.evaluations,
                               states=batch_rows(query.state))
    return finished(advance_document(name, stepper, query, result, plan), media, coding)


def advance_document(name: str, stepper: Any, query: Any, result: Any, plan: Any
                     ) -> dict[str, Any]:
    """The answer of `advance` (the one place that builds it)."""
    return {
        "model": name,
        "state": result,
        "t": query.t,
        "plan": plan.to_dict(),
        "method": plan.method,
        "evaluations": plan.evaluations,
        "dtype": str(stepper.dtype),
        **trust_fields(plan.findings, plan.expected_error),
    }


def finished(document: Any, media: str, coding: str | None) -> Response:
    """`document` encoded as `media` and compressed with `coding` (if worth it)."""
    body, headers = compress(encode(document, media), coding)
    return encoded_response(body, media, headers=headers)


@router.post("/models/{name}/forecast", dependencies=[Depends(require_token)],
             openapi_extra=request_body(ForecastRequest),
             responses=responses(ForecastResponse, *POST_ERRORS),
             summary="Forecast a state or a batch at many times")
async def forecast(name: str, request: Request, settings: SettingsDep) -> Response:
    parse = partial(parse_forecast, max_points=settings.max_forecast_points,
                    max_values=settings.max_forecast_values)
    return await _computed(name, request, settings, parse, _forecast)


def _forecast(stepper: Any, name: str, query: Any, media: str, metrics: Any,
              coding: str | None) -> Response:
    states, info = stepper.forecast_with_info(query.state, query.times, off_grid=query.off_grid)
    metrics.record_computation(name, "forecast", evaluations=info.evaluations,
                               states=batch_rows(query.state) * len(query.times))
    return finished(forecast_document(name, stepper, query, states, info), media, coding)


def forecast_document(name: str, stepper: Any, query: Any, states: Any, info: Any
                      ) -> dict[str, Any]:
    """The answer of `forecast` (the one place that builds it)."""
    return {
        "model": name,
        "times": list(query.times),
        "states": states,
        "evaluations": info.evaluations,
        "network_calls": info.network_calls,
        "depth": info.depth,
        "methods": list(info.methods),
        "dtype": str(stepper.dtype),
        **trust_fields(info.findings, info.expected_error),
    }
