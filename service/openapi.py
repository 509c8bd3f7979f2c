"""OpenAPI documentation of bodies the service parses itself.

Routes point at request schemas by reference (`request_body`); `install_openapi` adds those
schemas to the generated document, so clients and property-based testers see every body.
"""

from __future__ import annotations

import copy
import re
from collections.abc import Sequence
from typing import Any
from urllib.parse import quote

from fastapi import FastAPI
from pydantic import BaseModel
from pydantic.json_schema import models_json_schema

from .codec import JSON_MEDIA, MSGPACK_MEDIA
from .context import state_rules
from .model_schemas import infer_request, v1_requests
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
    """Make `app.openapi()` include the request-body schemas referenced by `request_body`, the
    served models' own paths (`model_paths`), and optional auth when there is no token.

    The document is rebuilt when the registry changes (before and after the models load).
    """
    generate = app.openapi
    cache: dict[str, Any] = {}

    def openapi_document() -> dict[str, Any]:
        registry = app.state.registry
        key = (id(registry), registry.loaded)
        if cache.get("key") != key:
            cache["document"] = _document(app, copy.deepcopy(generate()))
            cache["key"] = key
        return cache["document"]

    app.openapi = openapi_document  # type: ignore[method-assign]


def _document(app: FastAPI, schema: dict[str, Any]) -> dict[str, Any]:
    _, definitions = models_json_schema(
        [(model, "validation") for model in REQUEST_MODELS], ref_template=_REF)
    components = schema.setdefault("components", {}).setdefault("schemas", {})
    for name, definition in definitions.get("$defs", {}).items():
        components.setdefault(name, definition)
    model_paths(schema, app.state.registry.served, app.state.settings)
    if app.state.settings.bearer_token() is None:
        _make_auth_optional(schema)
    return schema


def _make_auth_optional(schema: dict[str, Any]) -> None:
    """Without a configured token, requests without credentials are accepted: say so.

    An empty security requirement object is OpenAPI's way to mark authentication optional.
    """
    for operations in schema.get("paths", {}).values():
        for operation in operations.values():
            security = operation.get("security") if isinstance(operation, dict) else None
            if security and {} not in security:
                operation["security"] = [{}, *security]


# The POST routes whose body depends on the model, and the request schema each takes.
MODEL_ROUTES = {
    "/v1/models/{name}/advance": "AdvanceRequest",
    "/v1/models/{name}/forecast": "ForecastRequest",
    "/v2/models/{name}/infer": "InferRequest",
    "/v2/models/{name}/versions/{version}/infer": "InferRequest",
}


def model_paths(schema: dict[str, Any], entries: Sequence[Any], settings: Any) -> None:
    """Give each served model concrete POST paths whose bodies have its exact schema.

    OpenAPI matches concrete paths before templated ones (OpenAPI 3.1, Paths Object), so
    `/v1/models/oscillator/advance` is described by its own entry; the templated entries then
    describe the other names (404), as their `name` parameter says. (Not with `not: {enum}`:
    property-based testers do not apply that precedence and would mutate a name into a served
    one, then expect the generic body to be refused.)
    """
    paths, components = schema["paths"], schema["components"]["schemas"]
    names = [entry.name for entry in entries]
    for index, entry in enumerate(entries):
        stepper = entry.stepper
        rules = state_rules(stepper, settings)
        bodies = {**v1_requests(stepper, rules, max_points=settings.max_forecast_points,
                                max_values=settings.max_forecast_values),
                  "InferRequest": infer_request(entry.name, stepper, rules)}
        label = f"{re.sub(r'[^A-Za-z0-9_-]', '_', entry.name)}-{index}"
        for kind, body in bodies.items():
            components[f"{kind}.{label}"] = body
        segment = quote(entry.name, safe="")
        for path, kind in MODEL_ROUTES.items():
            operation = copy.deepcopy(paths[path]["post"])
            operation["operationId"] = f"{operation.get('operationId', 'post')}_{label}"
            operation["summary"] = f"{operation.get('summary', '')} (model {entry.name!r})"
            operation["parameters"] = [parameter for parameter in operation.get("parameters", [])
                                       if parameter.get("name") not in ("name", "version")]
            reference = {"$ref": _REF.format(model=f"{kind}.{label}")}
            for media in operation["requestBody"]["content"].values():
                media["schema"] = reference
            concrete = path.replace("{name}", segment).replace("{version}", "1")
            paths.setdefault(concrete, {})["post"] = operation
    if names:
        for path in MODEL_ROUTES:
            for parameter in paths[path]["post"].get("parameters", []):
                if parameter.get("name") == "name":
                    parameter["description"] = (
                        f"A model name. The served models ({', '.join(names)}) have paths of "
                        "their own with their exact body schemas, which OpenAPI matches before "
                        "this templated path; any other name: 404.")
