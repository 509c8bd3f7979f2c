"""The protocol's gRPC message classes, built from `grpc_descriptor` in a private pool.

A private descriptor pool (not protobuf's default one) lets a process hold these classes next
to a client library's own copy of the same messages (e.g. tritonclient's), which would
otherwise clash over the shared names `inference.*`.
"""

from __future__ import annotations

from functools import cache
from types import SimpleNamespace

from google.protobuf import descriptor_pb2, descriptor_pool, message_factory

from .grpc_descriptor import FILE_DESCRIPTOR

PACKAGE = "inference"
SERVICE = f"{PACKAGE}.GRPCInferenceService"
MESSAGES = ("ServerLiveRequest", "ServerLiveResponse", "ServerReadyRequest",
            "ServerReadyResponse", "ModelReadyRequest", "ModelReadyResponse",
            "ServerMetadataRequest", "ServerMetadataResponse", "ModelMetadataRequest",
            "ModelMetadataResponse", "ModelInferRequest", "ModelInferResponse",
            "InferParameter", "InferTensorContents")


@cache
def messages() -> SimpleNamespace:
    """The message classes, by their names in the .proto (built once per process)."""
    pool = descriptor_pool.DescriptorPool()
    pool.Add(descriptor_pb2.FileDescriptorProto.FromString(FILE_DESCRIPTOR))
    return SimpleNamespace(**{
        name: message_factory.GetMessageClass(pool.FindMessageTypeByName(f"{PACKAGE}.{name}"))
        for name in MESSAGES})
