"""`service/grpc_server.py`: ModelInferRequest → protocol tensors, document → ModelInferResponse.

Requests are built and answers read with tritonclient's generated `service_pb2` classes (the
reference client of the open inference protocol); meanings from the protocol's
inference_grpc.md (kserve/open-inference-protocol): "Tensor Data" (`raw_input_contents` and
`raw_output_contents` hold row-major little-endian bytes, one entry per input/output in order,
used instead of the typed `contents`), "Parameters" (InferParameter: one of bool, int64,
string, double). End-to-end calls through the stock clients are in test_oip_clients.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from tritonclient.grpc import service_pb2

from stridecast.service.errors import ApiError
from stridecast.service.grpc_messages import messages
from stridecast.service.grpc_server import (
    parameter_value,
    request_tensors,
    response_message,
    set_parameter,
)

STATE = np.array([[1.0, -0.5], [0.25, 2.0]])


def _ours(request: service_pb2.ModelInferRequest):
    """Triton's request as this service receives it: bytes parsed by our own classes."""
    return messages().ModelInferRequest.FromString(request.SerializeToString())


def _request(*, raw: bool, time_type: str = "FP64") -> service_pb2.ModelInferRequest:
    request = service_pb2.ModelInferRequest(model_name="osc")
    state = request.inputs.add(name="state", datatype="FP32", shape=[2, 2])
    t = request.inputs.add(name="t", datatype=time_type, shape=[1])
    if raw:
        request.raw_input_contents.append(STATE.astype("<f4").tobytes())
        wire = {"FP64": "<f8", "FP32": "<f4", "INT64": "<i8", "INT32": "<i4"}[time_type]
        request.raw_input_contents.append(np.array([3], wire).tobytes())
    else:
        state.contents.fp32_contents.extend(STATE.reshape(-1).tolist())
        field = {"FP64": "fp64_contents", "FP32": "fp32_contents", "INT64": "int64_contents",
                 "INT32": "int_contents"}[time_type]
        getattr(t.contents, field).append(3)
    return request


@pytest.mark.parametrize("raw", [True, False], ids=["raw", "typed"])
@pytest.mark.parametrize("time_type", ["FP64", "FP32", "INT64", "INT32"])
def test_request_tensors_read_raw_and_typed_contents(raw, time_type):
    tensors, options = request_tensors(_ours(_request(raw=raw, time_type=time_type)))
    state, t = tensors
    assert (state.name, state.datatype, state.shape, state.where) == \
        ("state", "FP32", (2, 2), "inputs[0]")
    np.testing.assert_array_equal(state.values.reshape(2, 2), STATE)
    assert (t.name, t.datatype, t.shape) == ("t", time_type, (1,))
    assert t.values.tolist() == [3]
    assert options.request_id is None and options.parameters == {} and options.outputs is None


def test_request_parameters_outputs_and_id():
    request = _request(raw=True)
    request.id = "r-1"
    request.parameters["binary_data_output"].bool_param = True
    request.parameters["off_grid"].string_param = "nearest"
    request.parameters["n"].int64_param = -4
    request.parameters["x"].double_param = 0.5
    output = request.outputs.add(name="state")
    output.parameters["binary_data"].bool_param = False
    _, options = request_tensors(_ours(request))
    assert options.request_id == "r-1"
    assert options.parameters == {"binary_data_output": True, "off_grid": "nearest", "n": -4,
                                  "x": 0.5}
    assert options.outputs == [("state", {"binary_data": False})]


@pytest.mark.parametrize(("edit", "pattern"), [
    (lambda r: r.raw_input_contents.pop(), "has 1 entries for 2 inputs"),
    (lambda r: setattr(r.inputs[0], "datatype", "BF16"), "`inputs\\[0\\].datatype` is 'BF16'"),
    (lambda r: r.raw_input_contents.__setitem__(0, b"\x00" * 15),
     "has 15 bytes, not a whole number of FP32 values"),
])
def test_malformed_raw_requests_are_422(edit, pattern):
    request = _request(raw=True)
    edit(request)
    with pytest.raises(ApiError, match=pattern) as caught:
        request_tensors(_ours(request))
    assert caught.value.status == 422


def test_typed_contents_of_an_unknown_datatype_are_422():
    request = _request(raw=False)
    request.inputs[1].datatype = "BYTES"
    with pytest.raises(ApiError, match=r"`inputs\[1\]\.datatype` is 'BYTES'"):
        request_tensors(_ours(request))


@pytest.mark.parametrize(("value", "choice"), [
    (True, "bool_param"), (False, "bool_param"), (7, "int64_param"), (-2**40, "int64_param"),
    (0.25, "double_param"), ("grid", "string_param"),
])
def test_parameters_round_trip_through_the_one_of(value, choice):
    parameter = messages().InferParameter()
    set_parameter(parameter, value)
    theirs = service_pb2.InferParameter.FromString(parameter.SerializeToString())
    assert theirs.WhichOneof("parameter_choice") == choice
    assert parameter_value(parameter) == value and type(parameter_value(parameter)) is type(value)
    assert parameter_value(messages().InferParameter()) is None


@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_response_message_carries_the_document_in_raw_little_endian(dtype):
    result = STATE.astype(dtype)
    document = {"model_name": "osc", "model_version": "1", "id": "r-2",
                "parameters": {"evaluations": 3, "method": "grid", "extrapolation": False,
                               "expected_error": 0.125},
                "outputs": [{"name": "state", "shape": [2, 2],
                             "datatype": "FP32" if dtype == "float32" else "FP64",
                             "data": result.reshape(-1)}]}
    answer = service_pb2.ModelInferResponse.FromString(
        response_message(document).SerializeToString())
    assert (answer.model_name, answer.model_version, answer.id) == ("osc", "1", "r-2")
    assert answer.parameters["evaluations"].int64_param == 3
    assert answer.parameters["method"].string_param == "grid"
    assert answer.parameters["extrapolation"].bool_param is False
    assert answer.parameters["expected_error"].double_param == 0.125
    [output] = answer.outputs
    assert (output.name, list(output.shape)) == ("state", [2, 2])
    assert not output.contents.ListFields()  # data only in raw_output_contents
    wire = "<f4" if dtype == "float32" else "<f8"
    decoded = np.frombuffer(answer.raw_output_contents[0], dtype=wire).reshape(2, 2)
    np.testing.assert_array_equal(decoded, result)
