"""The Open Inference Protocol v2 routes, shaped as its REST specification describes.

Source of every expected document shape: kserve/open-inference-protocol,
specification/protocol/inference_rest.md ("Health/Readiness/Liveness Probes", "Model
Metadata", "Inference Request Examples", "Tensor Data"). Expected numbers: the runtime itself.
"""

from __future__ import annotations

import re

import msgpack
import numpy as np
import pytest

from stridecast import __version__
from tests.systems import exact_oscillator_state as exact_state

INFER = "/v2/models/oscillator/infer"


def test_health_live_and_ready(client):
    # $live_server_response = {"live": $bool}; server ready answers {"ready": $bool}.
    assert client.get("/v2/health/live").json() == {"live": True}
    ready = client.get("/v2/health/ready")
    assert ready.status_code == 200 and ready.json() == {"ready": True}


def test_server_metadata(client):
    # $metadata_server_response = {"name", "version", "extensions": [...]}.
    # The binary tensor data extension is listed under the name Triton's server metadata uses
    # (Triton's protocol/extension_binary_data.md).
    assert client.get("/v2").json() == {"name": "stridecast", "version": __version__,
                                        "extensions": ["binary_tensor_data"]}


def test_model_ready(client):
    # $ready_model_response = {"name": $string, "ready": $bool}.
    assert client.get("/v2/models/oscillator/ready").json() == {"name": "oscillator",
                                                                "ready": True}
    assert client.get("/v2/models/broken/ready").status_code == 404


def test_model_metadata(client):
    # $metadata_model_response with $metadata_tensor {"name", "datatype", "shape"};
    # variable-size dimensions are -1.
    assert client.get("/v2/models/oscillator").json() == {
        "name": "oscillator",
        "versions": ["1"],
        "platform": "stridecast_onnx",
        "inputs": [
            {"name": "state", "datatype": "FP32", "shape": [-1, 2]},
            {"name": "t", "datatype": "FP64", "shape": [-1]},
        ],
        "outputs": [{"name": "state", "datatype": "FP32", "shape": [-1, 2]}],
    }


def test_model_metadata_float64(make_client):
    metadata = make_client(dtype="float64").get("/v2/models/oscillator").json()
    assert metadata["inputs"][0]["datatype"] == "FP64"
    assert metadata["outputs"][0]["datatype"] == "FP64"


def test_infer_request_and_response_as_in_the_specification(client, stepper):
    # The request mirrors the specification's example: "id", "inputs" each with "name",
    # "shape", "datatype" and flat row-major "data", and "outputs" naming the wanted tensor.
    request = {
        "id": "42",
        "inputs": [
            {"name": "state", "shape": [2, 2], "datatype": "FP32",
             "data": [1.0, 0.0, 0.5, -0.25]},
            {"name": "t", "shape": [1], "datatype": "FP64", "data": [1.5]},
        ],
        "outputs": [{"name": "state"}],
    }
    response = client.post(INFER, json=request)
    assert response.status_code == 200
    assert response.headers["content-type"] == "application/json"
    document = response.json()
    # $inference_response: "model_name", "id" echoed, "outputs" of $response_output
    # {"name", "shape", "datatype", "data"}; "parameters" is optional.
    assert set(document) == {"model_name", "model_version", "id", "parameters", "outputs"}
    assert document["model_name"] == "oscillator" and document["id"] == "42"
    (output,) = document["outputs"]
    assert set(output) == {"name", "shape", "datatype", "data"}
    assert output["name"] == "state" and output["shape"] == [2, 2]
    assert output["datatype"] == "FP32"
    states = np.asarray(output["data"], dtype=np.float32).reshape(output["shape"])
    direct = stepper.advance(np.asarray([[1.0, 0.0], [0.5, -0.25]], dtype=np.float32), 1.5)
    # Expected: the runtime itself, bitwise.
    assert states.tobytes() == direct.tobytes()
    assert all(isinstance(value, str | int | float | bool)
               for value in document["parameters"].values())


def test_infer_accepts_nested_data_and_omits_absent_id(client, stepper):
    # "Tensor Data": elements may be given in their natural multi-dimensional form.
    request = {"inputs": [
        {"name": "t", "shape": [1], "datatype": "INT64", "data": [2]},
        {"name": "state", "shape": [1, 2], "datatype": "FP64", "data": [[0.3, 0.4]]},
    ]}
    document = client.post(INFER, json=request).json()
    assert "id" not in document
    direct = stepper.advance(np.asarray([[0.3, 0.4]], dtype=np.float32), 2.0)
    assert np.asarray(document["outputs"][0]["data"], np.float32).tobytes() == direct.tobytes()


def test_infer_one_time_per_state(client):
    request = {"inputs": [
        {"name": "state", "shape": [3, 2], "datatype": "FP32", "data": [1, 0, 1, 0, 0, 1]},
        {"name": "t", "shape": [3], "datatype": "FP64", "data": [0.5, 1.0, 0.5]},
    ], "parameters": {"off_grid": "error"}}
    document = client.post(INFER, json=request).json()
    states = np.asarray(document["outputs"][0]["data"]).reshape(3, 2)
    # Expected: the matrix exponential (SciPy) for each row's own time.
    for row, (start, t) in enumerate([([1, 0], 0.5), ([1, 0], 1.0), ([0, 1], 0.5)]):
        np.testing.assert_allclose(states[row], exact_state(start, t), atol=2e-6)


def test_infer_msgpack(client, stepper):
    state = np.asarray([[1.0, 0.0]], dtype="<f4")
    request = {"inputs": [
        {"name": "state", "shape": [1, 2], "datatype": "FP32",
         "data": {"dtype": "<f4", "shape": [2], "data": state.tobytes()}},
        {"name": "t", "shape": [1], "datatype": "FP64", "data": [0.75]},
    ]}
    response = client.post(INFER, content=msgpack.packb(request),
                           headers={"content-type": "application/msgpack",
                                    "accept": "application/msgpack"})
    output = msgpack.unpackb(response.content)["outputs"][0]
    data = output["data"]
    assert output["shape"] == [1, 2] and data["shape"] == [2]
    assert data["data"] == stepper.advance(state, 0.75).tobytes()


@pytest.mark.parametrize(("inputs", "pattern"), [
    ([{"name": "state", "shape": [1, 2], "datatype": "FP32", "data": [1, 0]}],
     r"`inputs` lacks \['t'\]"),
    ([{"name": "x", "shape": [1], "datatype": "FP32", "data": [1]}],
     r"`inputs\[0\].name` is 'x'"),
    ([{"name": "state", "shape": [1, 2], "datatype": "BYTES", "data": ["a", "b"]}],
     r"datatype` of input 'state' is 'BYTES'"),
    ([{"name": "state", "shape": [2, 2], "datatype": "FP32", "data": [1, 0]},
      {"name": "t", "shape": [1], "datatype": "FP64", "data": [1]}],
     r"holds 2 values; shape \[2, 2\] needs 4"),
    ([{"name": "state", "shape": [2], "datatype": "FP32", "data": [1, 0]},
      {"name": "t", "shape": [1], "datatype": "FP64", "data": [1]}],
     r"input 'state' has shape \[2\]; expected \[B, 2\]"),
    ([{"name": "state", "shape": [2, 2], "datatype": "FP32", "data": [1, 0, 1, 0]},
      {"name": "t", "shape": [3], "datatype": "FP64", "data": [1, 2, 3]}],
     r"input 't' has shape \[3\]; expected \[1\] or \[2\]"),
    ([{"name": "state", "shape": [1, 2], "datatype": "FP32", "data": [1, 0]},
      {"name": "t", "shape": [1], "datatype": "FP64", "data": [-1]}],
     r"`inputs\['t'\]` is -1.0; expected a finite time ≥ 0 \(in s\)\."),
    ([{"name": "t", "shape": [1], "datatype": "FP64", "data": [1]},
      {"name": "t", "shape": [1], "datatype": "FP64", "data": [1]}],
     r"`inputs` names 't' twice"),
])
def test_infer_bad_inputs_are_422_with_an_error_object(client, inputs, pattern):
    response = client.post(INFER, json={"inputs": inputs})
    assert response.status_code == 422
    # $inference_error_response = {"error": <error message string>}
    assert response.json()["error"]
    assert re.search(pattern, response.json()["error"])


@pytest.mark.parametrize(("state", "t", "pattern"), [
    ("[1e999, 0]", "[1]", r"^`inputs\['state'\]` holds inf at index \[0, 0\]; expected finite "
                          r"numbers\.$"),
    ("[1, 0]", "[-1e999]", r"^`inputs\['t'\]` is -inf; expected a finite time ≥ 0 \(in s\)\.$"),
    ("[1, 0]", "[1]", None),
])
def test_infer_non_finite_values_get_the_runtime_sentence(client, state, t, pattern):
    # The JSON decoder reads 1e999 as inf, as Python's json does (an overflowing literal, not
    # the NaN/Infinity tokens it refuses); the runtime's state and time checks name the input.
    body = ('{"inputs": [{"name": "state", "shape": [1, 2], "datatype": "FP64", "data": '
            + state + '}, {"name": "t", "shape": [1], "datatype": "FP64", "data": ' + t + "}]}")
    response = client.post(INFER, content=body, headers={"content-type": "application/json"})
    if pattern is None:
        assert response.status_code == 200
    else:
        assert response.status_code == 422
        assert re.search(pattern, response.json()["error"]), response.json()["error"]


def test_infer_unknown_output_is_422(client):
    request = {"inputs": [
        {"name": "state", "shape": [1, 2], "datatype": "FP32", "data": [1, 0]},
        {"name": "t", "shape": [1], "datatype": "FP64", "data": [1]},
    ], "outputs": [{"name": "energy"}]}
    response = client.post(INFER, json=request)
    assert response.status_code == 422
    assert "only output is 'state'" in response.json()["error"]
