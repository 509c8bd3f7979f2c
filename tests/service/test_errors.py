"""The one error-mapping module (service/errors.py): runtime errors to HTTP statuses, and the
handlers on a small FastAPI app, read back through Starlette's TestClient. Status meanings
follow RFC 9110 (422 Unprocessable Content for well-formed but invalid input, 500 for a server
fault); the body is the inference protocol v2 error object ({"error": ...}) plus code, status.
"""

from __future__ import annotations

import http

import pytest
from fastapi import FastAPI
from fastapi.testclient import TestClient

from stridecast.runtime import errors
from stridecast.service.errors import (
    ApiError,
    error_document,
    from_domain_error,
    install_error_handlers,
)


@pytest.mark.parametrize(("error", "status", "code"), [
    (errors.NonFiniteError, 422, "non_finite"),
    (errors.StateError, 422, "invalid_state"),
    (errors.TimeError, 422, "invalid_time"),
    (errors.OptionError, 422, "invalid_option"),
    (errors.ExtrapolationError, 500, "model_error"),
    (errors.BundleError, 500, "model_error"),
    (errors.ModelFormatError, 500, "model_error"),
    (errors.UnsupportedOperatorError, 500, "model_error"),
    (errors.StridecastError, 500, "model_error"),
])
def test_runtime_errors_map_to_statuses_and_codes(error, status, code):
    mapped = from_domain_error(error("`t` is -1; expected t ≥ 0."))
    assert (mapped.status, mapped.code) == (status, code)
    assert mapped.message.endswith("`t` is -1; expected t ≥ 0.")


def test_api_error_codes_default_from_the_status():
    statuses = (400, 401, 404, 405, 406, 413, 415, 422, 500, 503, 504)
    codes = [ApiError(status, "m").code for status in statuses]
    # One distinct code per status the service answers on purpose (all are RFC 9110 statuses).
    assert len(set(codes)) == len(statuses) and "error" not in codes
    assert all(400 <= http.HTTPStatus(status).value < 600 for status in statuses)
    assert ApiError(418, "m").code == "error"
    assert ApiError(422, "m", code="custom").code == "custom"
    assert error_document(ApiError(404, "no such model.")) == {
        "error": "no such model.", "code": "not_found", "status": 404}


@pytest.fixture
def client():
    app = FastAPI()
    install_error_handlers(app)

    @app.get("/state")
    def state():
        raise errors.StateError("`state` holds NaN; expected finite numbers.")

    @app.get("/broken")
    def broken():
        raise errors.ModelFormatError("level 4 is malformed.")

    @app.get("/api")
    def api():
        raise ApiError(401, "no token.", headers={"WWW-Authenticate": "Bearer"})

    @app.get("/number/{value}")
    def number(value: int):
        return {"value": value}

    return TestClient(app)


def test_handlers_render_every_expected_error_as_the_error_document(client):
    answer = client.get("/state")
    assert answer.status_code == 422 and answer.json() == {
        "error": "`state` holds NaN; expected finite numbers.", "code": "invalid_state",
        "status": 422}
    answer = client.get("/broken")
    assert answer.status_code == 500
    assert answer.json()["error"] == "the model could not run: level 4 is malformed."
    answer = client.get("/api")
    assert answer.status_code == 401 and answer.headers["www-authenticate"] == "Bearer"
    answer = client.get("/nowhere")
    assert answer.status_code == 404
    assert answer.json()["error"] == "there is no route GET /nowhere."
    answer = client.post("/state")
    assert answer.status_code == 405
    assert answer.json()["error"] == "the route /state does not accept POST."
    answer = client.get("/number/abc")
    assert answer.status_code == 422 and answer.json()["code"] == "invalid_input"
    assert answer.json()["error"].startswith("the request is invalid: path.value: ")
