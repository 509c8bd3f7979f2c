"""The committed gRPC descriptor is what protoc (grpcio-tools) makes of the shipped .proto.

Compared as parsed FileDescriptorProto messages, so a different protoc version that serialises
the same definitions identically in meaning still passes.
"""

from __future__ import annotations

from google.protobuf import descriptor_pb2

from stridecast.service import grpc_codegen
from stridecast.service.grpc_descriptor import FILE_DESCRIPTOR
from stridecast.service.grpc_messages import messages


def test_committed_descriptor_matches_the_proto():
    compiled = descriptor_pb2.FileDescriptorProto.FromString(grpc_codegen.compile_descriptor())
    committed = descriptor_pb2.FileDescriptorProto.FromString(FILE_DESCRIPTOR)
    assert compiled == committed


def test_service_and_field_numbers_of_the_protocol():
    # Field numbers from the protocol's open_inference_grpc.proto (ModelInferRequest:
    # model_name 1, inputs 5, raw_input_contents 7; ModelInferResponse: outputs 5,
    # raw_output_contents 6); the wire format depends on them.
    request = messages().ModelInferRequest.DESCRIPTOR.fields_by_name
    response = messages().ModelInferResponse.DESCRIPTOR.fields_by_name
    assert [request[name].number for name in ("model_name", "inputs", "raw_input_contents")] \
        == [1, 5, 7]
    assert [response[name].number for name in ("outputs", "raw_output_contents")] == [5, 6]
    service = descriptor_pb2.FileDescriptorProto.FromString(FILE_DESCRIPTOR).service[0]
    assert service.name == "GRPCInferenceService"
    assert [method.name for method in service.method] == [
        "ServerLive", "ServerReady", "ModelReady", "ServerMetadata", "ModelMetadata",
        "ModelInfer"]
