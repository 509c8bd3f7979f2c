"""What every handler needs: the served model, the decoded body, the gate, and trust fields.

Handlers stay short by delegating here; everything reads the app's state set up by `create_app`
and its lifespan, never a module-level global.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from fastapi import Request

from stridecast.runtime import Finding
from stridecast.runtime.findings import WARNING_KINDS

from .body import read_body
from .codec import DecodeError, decode_body
from .compression import decode_content, request_codings
from .errors import ApiError
from .execution import Gate
from .metrics import Metrics
from .model_limits import max_time
from .registry import Registry
from .settings import Settings
from .validation import StateRules


def registry_of(request: Request) -> Registry:
    return request.app.state.registry


def metrics_of(request: Request) -> Metrics:
    return request.app.state.metrics


def gate_of(request: Request) -> Gate:
    gate = getattr(request.app.state, "gate", None)
    if gate is None:
        raise ApiError(503, "the service has not started (its lifespan did not run); with "
                            "TestClient, use `with TestClient(app) as client:`.")
    return gate


def served_stepper(request: Request, name: str) -> Any:
    """The loaded stepper called `name`; 404 if unknown or not served, 503 while loading."""
    registry = registry_of(request)
    if not registry.loaded:
        raise ApiError(503, "the service is still loading its models; try again shortly.",
                       headers={"Retry-After": "1"})
    entry = registry.get(name)
    if entry is None:
        known = [item.name for item in registry.served]
        raise ApiError(404, f"there is no model {name!r}; the served models are {known}.")
    if not entry.ready:
        raise ApiError(404, f"model {name!r} is not served because it failed to load: "
                            f"{entry.error}", code="model_unavailable")
    return entry.stepper


async def read_bytes(request: Request, settings: Settings) -> bytes:
    """The request body, size-limited while it arrives and after undoing its Content-Encoding."""
    codings = request_codings(request.headers.get("content-encoding"))
    body = await read_body(request, max_bytes=settings.max_body_bytes,
                           timeout=settings.request_timeout)
    return decode_content(body, codings, max_bytes=settings.max_body_bytes)


def decode_document(request: Request, body: bytes, settings: Settings, *,
                    any_type_is_json: bool = False) -> Any:
    """Decode (safely) a request body read by `read_bytes`."""
    try:
        return decode_body(request.headers.get("content-type"), body,
                           max_depth=settings.max_depth, any_type_is_json=any_type_is_json)
    except DecodeError as error:
        raise ApiError(error.status, error.message) from error


async def read_document(request: Request, settings: Settings) -> Any:
    """Read (size-limited) and decode (safely) the request body."""
    return decode_document(request, await read_bytes(request, settings), settings)


def batch_rows(state: np.ndarray) -> int:
    """How many states a `(d,)` or `(B, d)` array holds."""
    return 1 if state.ndim == 1 else state.shape[0]


def state_rules(stepper: Any, settings: Settings) -> StateRules:
    """What requests for `stepper` may hold under `settings` (validation and OpenAPI both)."""
    max_value = settings.max_abs_value if settings.max_abs_value is not None else math.inf
    return StateRules(names=tuple(stepper.state_names), dtype=np.dtype(stepper.dtype),
                      max_batch=settings.max_batch, max_value=max_value,
                      max_time=max_time(stepper, settings.max_coarse_steps),
                      time_unit=stepper.manifest.time_unit)


def json_error(value: float) -> float | None:
    """An expected error for JSON: None where the runtime says nan (unknown) or inf (past the
    validated data)."""
    value = float(value)
    return value if math.isfinite(value) else None


def warning_messages(findings: Sequence[Finding]) -> list[str]:
    """The runtime's own sentences for the findings that warrant a warning (one wording)."""
    return [finding.message for finding in findings if finding.kind in WARNING_KINDS]


def trust_fields(findings: Sequence[Finding], expected: Any) -> dict[str, Any]:
    """`expected_error` (one number or one per time), `findings` and `warnings` of an answer."""
    if np.ndim(expected) == 0:
        error: Any = json_error(expected)
    else:
        error = [json_error(value) for value in np.asarray(expected).reshape(-1)]
    return {"expected_error": error, "findings": [finding.to_dict() for finding in findings],
            "warnings": warning_messages(findings)}
