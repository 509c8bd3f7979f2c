"""OpenAPI documentation of bodies the service parses itself.

Routes point at request schemas by reference (`request_body`); `install_openapi` adds those
schemas to the generated document, so clients and property-based testers see every body.
"""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI
from pydantic import BaseModel
from pydantic.json_schema import models_json_schema

from .codec import JSON_MEDIA, MSGPACK_MEDIA
from .schemas import REQUEST_MODELS, ErrorBody, InferResponse

BINARY_MEDIA = "application/octet-stream"

_REF = "#/components/schemas/{model}"
_DESCRIPTIONS = {
    400: "Malformed body (bad JSON or MessagePack, trailing bytes, nesting too deep, bad "
         "gzip or deflate data).",
    401: "Missing or wrong bearer token.",
    404: "Unknown model, or a model that failed to load.",
    413: "Body larger than the limit.",
    415: "Content-Type other than application/json or application/msgpack (the inference "
         "route reads other types as JSON), or a Content-Encoding other than gzip or deflate.",
    422: "Well-formed body with invalid values (shape, type, range, limits).",
    503: "Overloaded, or still loading.",
    504: "The request's time budget ran out.",
}
POST_ERRORS = (400, 401, 404, 413, 415, 422, 503, 504)
GET_MODEL_ERRORS = (404, 503)


def request_body(model: type[BaseModel], *, binary: bool = False) -> dict[str, Any]:
    """`openapi_extra` for a route whose body has the schema of `model` (JSON or MessagePack).

    With `binary`, the description adds what the inference protocol's clients send.
    """
    reference = {"$ref": _REF.format(model=model.__name__)}
    body: dict[str, Any] = {"required": True, "content": {
        JSON_MEDIA: {"schema": reference},
        MSGPACK_MEDIA: {"schema": reference},
    }}
    if binary:
        body["description"] = BINARY_REQUEST
    return {"requestBody": body}


BINARY_REQUEST = (
    "A JSON object, or MessagePack. Any Content-Type other than MessagePack (none, "
    "application/octet-stream, form data) is read as JSON. With the binary tensor data "
    "extension the JSON object is followed by raw little-endian tensor bytes: its length is in "
    "the `Inference-Header-Content-Length` header and each binary input gives "
    "`parameters.binary_data_size` instead of `data`. Content-Encoding gzip or deflate is "
    "accepted; the decompressed size counts against the body limit.")


def infer_responses(*errors: int) -> dict[int | str, dict[str, Any]]:
    """Responses of the inference route: JSON, MessagePack, or a binary-extension answer."""
    documented = responses(InferResponse, *errors)
    documented[200]["content"][BINARY_MEDIA] = {"schema": {"type": "string",
                                                           "format": "binary"}}
    documented[200]["description"] = (
        "The inference response. When the request asks for binary outputs (`binary_data` on "
        "an output, or `binary_data_output` in its parameters) and accepts JSON, the answer is "
        "application/octet-stream: the JSON object (its length in the "
        "`Inference-Header-Content-Length` header) followed by the raw tensor bytes.")
    return documented


def responses(model: type[BaseModel] | None, *errors: int) -> dict[int | str, dict[str, Any]]:
    """The `responses` of a route: `model` on 200 (JSON or MessagePack) and error bodies."""
    documented: dict[int | str, dict[str, Any]] = {}
    if model is not None:
        documented[200] = {"model": model, "content": {MSGPACK_MEDIA: {}}}
    for status in errors:
        documented[status] = {"model": ErrorBody, "description": _DESCRIPTIONS[status],
                              "content": {MSGPACK_MEDIA: {}}}
    return documented


def readiness_responses(model: type[BaseModel]) -> dict[int | str, dict[str, Any]]:
    """A readiness probe answers the same document with 200 (ready) or 503 (not ready)."""
    documented = responses(model)
    documented[503] = {"model": model, "description": "Not ready.",
                       "content": {MSGPACK_MEDIA: {}}}
    return documented


def install_openapi(app: FastAPI) -> None:
    """Make `app.openapi()` include the request-body schemas referenced by `request_body`."""
    generate = app.openapi

    def openapi_with_request_bodies() -> dict[str, Any]:
        schema = generate()
        _, definitions = models_json_schema(
            [(model, "validation") for model in REQUEST_MODELS], ref_template=_REF)
        components = schema.setdefault("components", {}).setdefault("schemas", {})
        for name, definition in definitions.get("$defs", {}).items():
            components.setdefault(name, definition)
        if app.state.settings.bearer_token() is None:
            _make_auth_optional(schema)
        _fix_state_rows(components, app)
        return schema

    app.openapi = openapi_with_request_bodies  # type: ignore[method-assign]


def _make_auth_optional(schema: dict[str, Any]) -> None:
    """Without a configured token, requests without credentials are accepted: say so.

    An empty security requirement object is OpenAPI's way to mark authentication optional.
    """
    for operations in schema.get("paths", {}).values():
        for operation in operations.values():
            security = operation.get("security") if isinstance(operation, dict) else None
            if security and {} not in security:
                operation["security"] = [{}, *security]


def _fix_state_rows(components: dict[str, Any], app: FastAPI) -> None:
    """When every served model has state dimension d, rows have exactly d numbers and a batch
    at most `max_batch` rows (what the service checks); otherwise leave the generic schema."""
    dims = {entry.stepper.state_dim for entry in app.state.registry.served}
    if len(dims) != 1:
        return
    (dim,) = dims
    row = {"type": "array", "items": {"type": "number"}, "minItems": dim, "maxItems": dim}
    batch = {"type": "array", "items": row, "minItems": 1,
             "maxItems": app.state.settings.max_batch}
    for name in ("AdvanceRequest", "ForecastRequest"):
        state = components.get(name, {}).get("properties", {}).get("state")
        if state is not None:
            description = state.get("description")
            state.clear()
            state["anyOf"] = [row, batch]
            if description:
                state["description"] = description
