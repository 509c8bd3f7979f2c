"""The inference route as clients send it: untyped bodies, binary tensors, compression, body
fields, versions.

Sources: kserve/open-inference-protocol, specification/protocol/inference_rest.md; the binary
tensor data extension (Triton's protocol/extension_binary_data.md): JSON object first, its
length in `Inference-Header-Content-Length`, then raw little-endian row-major tensor bytes in
input order; RFC 9110 §8.4 and §12.5.3 (Content-Encoding, Accept-Encoding), RFC 1952 (gzip) and
RFC 1950 (zlib, HTTP's "deflate"). Expected numbers: the runtime itself, bit for bit.
"""

from __future__ import annotations

import gzip
import json
import zlib

import numpy as np
import pytest

INFER = "/v2/models/oscillator/infer"
STATE = np.asarray([[1.0, 0.0], [0.5, -0.25]], dtype="<f4")
JSON_REQUEST = {"inputs": [
    {"name": "state", "shape": [2, 2], "datatype": "FP32", "data": STATE.reshape(-1).tolist()},
    {"name": "t", "shape": [1], "datatype": "FP64", "data": [1.5]},
]}


def _binary_request(outputs=None, parameters=None, extra=b""):
    header = {"inputs": [
        {"name": "state", "shape": [2, 2], "datatype": "FP32",
         "parameters": {"binary_data_size": 16}},
        {"name": "t", "shape": [1], "datatype": "FP64", "parameters": {"binary_data_size": 8}},
    ]}
    if outputs is not None:
        header["outputs"] = outputs
    if parameters is not None:
        header["parameters"] = parameters
    text = json.dumps(header).encode()
    body = text + STATE.tobytes() + np.asarray([1.5], "<f8").tobytes() + extra
    return body, {"Inference-Header-Content-Length": str(len(text))}


def _state_of(document):
    return np.asarray(document["outputs"][0]["data"], np.float32).reshape(2, 2)


@pytest.mark.parametrize("content_type", [None, "application/octet-stream",
                                          "application/x-www-form-urlencoded", "text/plain"])
def test_any_non_msgpack_type_is_read_as_json(client, stepper, content_type):
    headers = {} if content_type is None else {"content-type": content_type}
    response = client.post(INFER, content=json.dumps(JSON_REQUEST).encode(),
                           headers={"content-type": "", **headers})
    assert response.status_code == 200, response.text
    assert _state_of(response.json()).tobytes() == stepper.advance(STATE, 1.5).tobytes()


def test_binary_inputs_and_binary_output(client, stepper):
    body, headers = _binary_request(outputs=[{"name": "state",
                                              "parameters": {"binary_data": True}}])
    response = client.post(INFER, content=body, headers=headers)
    assert response.status_code == 200
    assert response.headers["content-type"] == "application/octet-stream"
    length = int(response.headers["inference-header-content-length"])
    document = json.loads(response.content[:length])
    (output,) = document["outputs"]
    assert "data" not in output and output["parameters"]["binary_data_size"] == 16
    assert response.content[length:] == stepper.advance(STATE, 1.5).tobytes()


def test_binary_output_for_every_output_by_request_parameter(client, stepper):
    body, headers = _binary_request(parameters={"binary_data_output": True})
    response = client.post(INFER, content=body, headers=headers)
    length = int(response.headers["inference-header-content-length"])
    assert response.content[length:] == stepper.advance(STATE, 1.5).tobytes()


def test_binary_inputs_json_output(client, stepper):
    body, headers = _binary_request(outputs=[{"name": "state",
                                              "parameters": {"binary_data": False}}])
    response = client.post(INFER, content=body, headers=headers)
    assert response.headers["content-type"] == "application/json"
    assert _state_of(response.json()).tobytes() == stepper.advance(STATE, 1.5).tobytes()


@pytest.mark.parametrize(("mutate", "status", "pattern"), [
    (lambda body, headers: (body, {"Inference-Header-Content-Length": "x"}), 400,
     "Inference-Header-Content-Length header is 'x'"),
    (lambda body, headers: (body, {"Inference-Header-Content-Length": str(len(body) + 1)}),
     400, "at most the body's"),
    (lambda body, headers: (body[:-4], headers), 422, "only 4 bytes of binary data remain"),
    (lambda body, headers: (body + b"\0" * 4, headers), 422, "add up to 24"),
])
def test_malformed_binary_requests(client, mutate, status, pattern):
    body, headers = mutate(*_binary_request())
    response = client.post(INFER, content=body, headers=headers)
    assert response.status_code == status
    assert pattern in response.json()["error"]


def test_binary_size_must_match_the_shape(client):
    header = {"inputs": [
        {"name": "state", "shape": [1, 2], "datatype": "FP32",
         "parameters": {"binary_data_size": 16}},
        {"name": "t", "shape": [1], "datatype": "FP64", "data": [1.0]}]}
    text = json.dumps(header).encode()
    response = client.post(INFER, content=text + STATE.tobytes(),
                           headers={"Inference-Header-Content-Length": str(len(text))})
    assert response.status_code == 422
    assert "shape [1, 2] of FP32 needs 8 bytes" in response.json()["error"]


def test_model_name_and_version_in_the_body(client):
    same = {**JSON_REQUEST, "model_name": "oscillator", "model_version": "1"}
    assert client.post(INFER, json=same).status_code == 200
    other = client.post(INFER, json={**JSON_REQUEST, "model_name": "pendulum"})
    assert other.status_code == 422
    assert "`model_name` is 'pendulum' but the request is for model 'oscillator'" in \
        other.json()["error"]
    missing_version = client.post(INFER, json={**JSON_REQUEST, "model_version": "7"})
    assert missing_version.status_code == 404
    assert "its only version is '1'" in missing_version.json()["error"]


def test_version_paths(client, stepper):
    assert client.get("/v2/models/oscillator/versions/1").json()["versions"] == ["1"]
    assert client.get("/v2/models/oscillator/versions/1/ready").json()["ready"] is True
    assert client.get("/v2/models/oscillator/versions/2/ready").status_code == 404
    response = client.post("/v2/models/oscillator/versions/1/infer", json=JSON_REQUEST)
    assert _state_of(response.json()).tobytes() == stepper.advance(STATE, 1.5).tobytes()
    assert response.json()["model_version"] == "1"
    assert client.post("/v2/models/oscillator/versions/2/infer",
                       json=JSON_REQUEST).status_code == 404


@pytest.mark.parametrize(("coding", "compress"), [
    ("gzip", gzip.compress), ("deflate", zlib.compress),
    # Raw RFC 1951 data, which some clients send as "deflate".
    ("deflate", lambda data: zlib.compress(data, wbits=-15)),
])
def test_compressed_request_bodies(client, stepper, coding, compress):
    body, headers = _binary_request(parameters={"binary_data_output": True})
    response = client.post(INFER, content=compress(body),
                           headers={**headers, "content-encoding": coding})
    assert response.status_code == 200, response.text
    length = int(response.headers["inference-header-content-length"])
    assert response.content[length:] == stepper.advance(STATE, 1.5).tobytes()


@pytest.mark.parametrize(("accept", "coding"), [
    ("gzip", "gzip"), ("deflate", "deflate"), ("gzip;q=0.5, deflate", "deflate"),
    ("identity", None), ("*", "gzip"), ("gzip;q=0", None),
])
def test_answers_follow_accept_encoding(client, stepper, accept, coding):
    states = np.tile(STATE, (64, 1))  # an answer large enough to be worth compressing
    request = {"inputs": [
        {"name": "state", "shape": [128, 2], "datatype": "FP32",
         "data": states.reshape(-1).tolist()},
        {"name": "t", "shape": [1], "datatype": "FP64", "data": [1.5]}]}
    response = client.post(INFER, json=request, headers={"accept-encoding": accept})
    assert response.headers.get("content-encoding") == coding
    # httpx undoes the coding, as any HTTP client does.
    answer = np.asarray(response.json()["outputs"][0]["data"], np.float32)
    assert answer.tobytes() == stepper.advance(states, 1.5).tobytes()
    assert "Accept-Encoding" in response.headers["vary"]


def test_classification_extension_is_refused_by_name(client):
    request = {**JSON_REQUEST, "outputs": [{"name": "state",
                                            "parameters": {"classification": 3}}]}
    response = client.post(INFER, json=request)
    assert response.status_code == 422
    assert "does not offer the classification extension" in response.json()["error"]


@pytest.mark.parametrize("value", [{"nested": 1}, [1, 2], None])
def test_parameter_values_are_strings_numbers_or_booleans(client, value):
    # The protocol's $parameter value is a string, number or boolean (KServe open inference
    # protocol, REST: "$parameter"); unknown keys are ignored, malformed values are not.
    assert client.post(INFER, json={**JSON_REQUEST, "parameters": {"note": "x", "n": 2,
                                                                    "flag": True}}
                       ).status_code == 200
    response = client.post(INFER, json={**JSON_REQUEST, "parameters": {"note": value}})
    assert response.status_code == 422
    assert "`parameters.note` is of type" in response.json()["error"]
