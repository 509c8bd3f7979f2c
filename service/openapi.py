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
from .schemas import REQUEST_MODELS, ErrorBody

_REF = "#/components/schemas/{model}"
_DESCRIPTIONS = {
    400: "Malformed body (bad JSON or MessagePack, trailing bytes, nesting too deep).",
    401: "Missing or wrong bearer token.",
    404: "Unknown model, or a model that failed to load.",
    413: "Body larger than the limit.",
    415: "Content-Type other than application/json or application/msgpack.",
    422: "Well-formed body with invalid values (shape, type, range, limits).",
    503: "Overloaded, or still loading.",
    504: "The request's time budget ran out.",
}
POST_ERRORS = (400, 401, 404, 413, 415, 422, 503, 504)
GET_MODEL_ERRORS = (404, 503)


def request_body(model: type[BaseModel]) -> dict[str, Any]:
    """`openapi_extra` for a route whose body has the schema of `model` (JSON or MessagePack)."""
    reference = {"$ref": _REF.format(model=model.__name__)}
    return {"requestBody": {"required": True, "content": {
        JSON_MEDIA: {"schema": reference},
        MSGPACK_MEDIA: {"schema": reference},
    }}}


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
        return schema

    app.openapi = openapi_with_request_bodies  # type: ignore[method-assign]
