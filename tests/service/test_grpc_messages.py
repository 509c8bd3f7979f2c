"""`service/grpc_messages.py`: the protocol's message classes, built in a private pool.

Reference: tritonclient's generated `service_pb2` (Triton's grpc_service.proto, a superset of
the open inference protocol's open_inference_grpc.proto, kserve/open-inference-protocol). The
wire format is fixed by field numbers and types (protobuf language guide, "Assigning Field
Numbers"), so every message here must agree with Triton's field by field, and bytes written by
one must parse with the other.
"""

from __future__ import annotations

import numpy as np
import pytest
from tritonclient.grpc import service_pb2

from stridecast.service.grpc_messages import MESSAGES, PACKAGE, SERVICE, messages


def _fields(descriptor) -> dict[str, tuple[int, int, bool]]:
    return {field.name: (field.number, field.type, field.is_repeated)
            for field in descriptor.fields}


@pytest.mark.parametrize("name", MESSAGES)
def test_every_message_has_triton_s_fields(name):
    ours = getattr(messages(), name).DESCRIPTOR
    theirs = getattr(service_pb2, name).DESCRIPTOR
    assert ours.full_name == theirs.full_name == f"{PACKAGE}.{name}"
    # Triton may add fields of its own; every field we have must be theirs exactly.
    mine = _fields(ours)
    assert {key: _fields(theirs)[key] for key in mine} == mine


def test_the_service_name_is_the_protocol_s():
    service = service_pb2.DESCRIPTOR.services_by_name["GRPCInferenceService"]
    assert service.full_name == SERVICE


def test_bytes_cross_between_our_classes_and_triton_s():
    state = np.array([[1.0, 0.5]], "<f4")
    theirs = service_pb2.ModelInferRequest(model_name="osc", id="r-9")
    tensor = theirs.inputs.add(name="state", datatype="FP32", shape=[1, 2])
    tensor.contents.fp32_contents.extend(state.reshape(-1).tolist())
    theirs.parameters["binary_data_output"].bool_param = True
    theirs.raw_input_contents.append(state.tobytes())
    ours = messages().ModelInferRequest.FromString(theirs.SerializeToString())
    assert ours.model_name == "osc" and ours.id == "r-9"
    assert list(ours.inputs[0].shape) == [1, 2]
    assert list(ours.inputs[0].contents.fp32_contents) == [1.0, 0.5]
    assert ours.parameters["binary_data_output"].bool_param is True
    assert ours.raw_input_contents[0] == state.tobytes()
    back = service_pb2.ModelInferRequest.FromString(ours.SerializeToString())
    assert back == theirs


def test_classes_are_built_once_and_live_beside_a_client_s_copy():
    assert messages() is messages()
    # Same full names as tritonclient's (already in protobuf's default pool), no clash.
    assert messages().ModelInferRequest is not service_pb2.ModelInferRequest
    assert messages().ModelInferRequest.DESCRIPTOR.file.pool is not \
        service_pb2.DESCRIPTOR.pool
