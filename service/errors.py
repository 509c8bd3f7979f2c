"""The one place where errors become HTTP responses.

Every failure the service reports on purpose is an `ApiError` (status, short code, message) or a
runtime `StridecastError` mapped here; both are rendered in the encoding the client accepts.
"""

from __future__ import annotations

import logging

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import Response

from stridecast.runtime.errors import (
    BundleError,
    ModelFormatError,
    NonFiniteError,
    OptionError,
    StateError,
    StridecastError,
    TimeError,
)

from .codec import encode_response

logger = logging.getLogger("stridecast.service")

# Short machine-readable codes, one per status the service answers on purpose.
_CODES = {
    400: "bad_request",
    401: "unauthorized",
    404: "not_found",
    405: "method_not_allowed",
    406: "not_acceptable",
    413: "payload_too_large",
    415: "unsupported_media_type",
    422: "invalid_input",
    500: "internal_error",
    503: "unavailable",
    504: "timeout",
}


class ApiError(Exception):
    """An error with the HTTP status it deserves and a message that names the problem.

    Parameters
    ----------
    status : int
        HTTP status code.
    message : str
        A sentence naming the parameter, the value received and what was expected.
    code : str, optional
        Machine-readable code; defaults to one derived from `status`.
    headers : dict, optional
        Extra response headers (e.g. ``WWW-Authenticate``).
    """

    def __init__(self, status: int, message: str, *, code: str | None = None,
                 headers: dict[str, str] | None = None):
        super().__init__(message)
        self.status = status
        self.message = message
        self.code = code or _CODES.get(status, "error")
        self.headers = headers or {}


def from_domain_error(error: StridecastError) -> ApiError:
    """Map a runtime error to an `ApiError`: bad input is 422, a broken model is 500."""
    if isinstance(error, NonFiniteError):
        return ApiError(422, str(error), code="non_finite")
    if isinstance(error, StateError):
        return ApiError(422, str(error), code="invalid_state")
    if isinstance(error, TimeError):
        return ApiError(422, str(error), code="invalid_time")
    if isinstance(error, OptionError):
        return ApiError(422, str(error), code="invalid_option")
    if isinstance(error, BundleError | ModelFormatError):
        # Loading happens at start; a bundle error during a request means a broken model.
        return ApiError(500, f"the model could not run: {error}", code="model_error")
    return ApiError(500, f"the model failed: {error}", code="model_error")


def error_document(error: ApiError) -> dict[str, object]:
    """The body of an error response (`error` is also what the inference protocol v2 asks)."""
    return {"error": error.message, "code": error.code, "status": error.status}


def render(request: Request, error: ApiError) -> Response:
    return encode_response(request, error_document(error), status=error.status,
                           headers=error.headers)


async def _api_error_handler(request: Request, error: Exception) -> Response:
    if not isinstance(error, ApiError):  # registered for ApiError only
        raise error
    return render(request, error)


async def _domain_error_handler(request: Request, error: Exception) -> Response:
    if not isinstance(error, StridecastError):
        raise error
    api_error = from_domain_error(error)
    if api_error.status >= 500:
        logger.error("model error on %s: %s", request.url.path, error)
    return render(request, api_error)


async def _http_error_handler(request: Request, error: Exception) -> Response:
    if not isinstance(error, StarletteHTTPException):
        raise error
    if error.status_code == 404:
        message = f"there is no route {request.method} {request.url.path}."
    elif error.status_code == 405:
        message = f"the route {request.url.path} does not accept {request.method}."
    else:
        message = str(error.detail)
    headers = dict(error.headers or {})
    return render(request, ApiError(error.status_code, message, headers=headers))


async def _validation_error_handler(request: Request, error: Exception) -> Response:
    if not isinstance(error, RequestValidationError):
        raise error
    problems = "; ".join(
        f"{'.'.join(str(part) for part in item.get('loc', ()))}: {item.get('msg', '')}"
        for item in error.errors()
    )
    return render(request, ApiError(422, f"the request is invalid: {problems}."))


def install_error_handlers(app: FastAPI) -> None:
    """Register the handlers that turn every expected error into a JSON/MessagePack body."""
    app.add_exception_handler(ApiError, _api_error_handler)
    app.add_exception_handler(StridecastError, _domain_error_handler)
    app.add_exception_handler(StarletteHTTPException, _http_error_handler)
    app.add_exception_handler(RequestValidationError, _validation_error_handler)
