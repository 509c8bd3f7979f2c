"""Every kind of bad input gets a 4xx whose JSON or MessagePack body names the problem.

Never a 500, never a crash. Statuses follow common practice (RFC 9110): 400 malformed,
413 too large, 415 wrong media type, 422 well-formed but invalid, 404 unknown model.
"""

from __future__ import annotations

import re

import msgpack
import numpy as np
import pytest

from stridecast.runtime import Limits, load
from tests.http_cases import (
    ADVANCE,
    CASES,
    JSON_TYPE,
    LIMITS,
    MSGPACK_TYPE,
    jsonb,
)


@pytest.fixture
def limited(make_client):
    return make_client(**LIMITS)


@pytest.mark.parametrize(("route", "content_type", "body", "status", "pattern"),
                         [case[1:] for case in CASES], ids=[case[0] for case in CASES])
def test_bad_input_json_error(limited, route, content_type, body, status, pattern):
    response = limited.post(route, content=body, headers={"content-type": content_type})
    assert response.status_code == status, response.text
    assert response.headers["content-type"] == "application/json"
    document = response.json()
    assert document["status"] == status
    assert isinstance(document["code"], str)
    assert re.search(pattern, document["error"]), document["error"]
    assert document["error"].endswith(".")


@pytest.mark.parametrize("case", ["malformed-msgpack", "json-nan", "wrong-dimension",
                                  "unknown-model", "body-over-limit", "text-plain"])
def test_bad_input_error_in_msgpack_when_accepted(limited, case):
    _, route, content_type, body, status, _ = next(item for item in CASES if item[0] == case)
    response = limited.post(route, content=body,
                            headers={"content-type": content_type, "accept": MSGPACK_TYPE})
    assert response.status_code == status
    assert response.headers["content-type"] == MSGPACK_TYPE
    document = msgpack.unpackb(response.content)
    assert document["status"] == status and document["error"]


def test_missing_content_type_is_read_as_json(limited, stepper):
    # Common practice (requests.post(data=...), some inference clients): an untyped body is
    # JSON. Expected numbers: the runtime itself.
    response = limited.post(ADVANCE, content=b'{"state": [1, 0], "t": 1}',
                            headers={"content-type": ""})
    assert response.status_code == 200
    direct = stepper.advance(np.asarray([1.0, 0.0], dtype=np.float32), 1.0)
    assert np.asarray(response.json()["state"], np.float32).tobytes() == direct.tobytes()


def test_form_content_type_on_v1_is_415(limited):
    response = limited.post(ADVANCE, content=b'{"state": [1, 0], "t": 1}',
                            headers={"content-type": "application/x-www-form-urlencoded"})
    assert response.status_code == 415
    assert "Content-Type is 'application/x-www-form-urlencoded'" in response.json()["error"]


def test_chunked_body_over_limit_is_cut_off_while_reading(limited):
    sent = []

    def chunks():
        # No Content-Length: httpx sends the generator with chunked transfer encoding.
        for _ in range(100):
            sent.append(1)
            yield b" " * 1024

    response = limited.post(ADVANCE, content=chunks(), headers={"content-type": JSON_TYPE})
    assert response.status_code == 413
    assert "exceeds the limit of 4096 bytes" in response.json()["error"]


def test_huge_body_at_default_limit_is_413(client):
    body = b'{"state": [' + b"1.0, " * (1024 * 1024) + b'1.0], "t": 1}'
    response = client.post(ADVANCE, content=body, headers={"content-type": JSON_TYPE})
    assert response.status_code == 413
    assert "the limit is 4194304 bytes" in response.json()["error"]


def test_unknown_route_and_wrong_method_use_the_error_body(client):
    missing = client.get("/v1/nothing")
    assert missing.status_code == 404
    assert missing.json()["error"] == "there is no route GET /v1/nothing."
    wrong = client.get(ADVANCE)
    assert wrong.status_code == 405
    assert wrong.json()["code"] == "method_not_allowed"


@pytest.mark.parametrize(("body", "call"), [
    ({"state": [1, 0, 3], "t": 1}, lambda stepper: stepper.advance([1.0, 0.0, 3.0], 1.0)),
    ({"state": [[1, 0]] * 5, "t": 1}, lambda stepper: stepper.advance([[1.0, 0.0]] * 5, 1.0)),
    ({"state": [1, 0], "t": -0.5}, lambda stepper: stepper.advance([1.0, 0.0], -0.5)),
    ({"state": [1e300, 0], "t": 1}, lambda stepper: stepper.advance([1e300, 0.0], 1.0)),
    ({"state": [1, 0], "t": 1, "off_grid": "cubic"},
     lambda stepper: stepper.advance([1.0, 0.0], 1.0, off_grid="cubic")),
], ids=["dimension", "batch", "time", "overflow", "off-grid"])
def test_the_service_and_python_callers_get_one_sentence(limited, oscillator_path, body, call):
    # One rule, one wording: the 422's message is the runtime's own error for the same input,
    # from a stepper with the service's batch limit.
    stepper = load(oscillator_path, limits=Limits(max_batch=LIMITS["max_batch"]))
    with pytest.raises(ValueError) as refused:
        call(stepper)
    response = limited.post(ADVANCE, content=jsonb(body), headers={"content-type": JSON_TYPE})
    assert response.status_code == 422
    assert response.json()["error"] == str(refused.value)
