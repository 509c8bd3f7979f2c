"""`service/grpc_codegen.py`: compiling a .proto with protoc and writing the descriptor module.

References: protobuf's own `descriptor_pb2` (FileDescriptorProto) to read what protoc made, and
Python's parser (`exec`) to read back the rendered module. The committed descriptor against
the shipped .proto is checked in test_grpc_descriptor.py. `main` writes the tracked
`grpc_descriptor.py` and is not run here (tests never modify tracked files).
"""

from __future__ import annotations

import random

import pytest
from google.protobuf import descriptor_pb2

from stridecast.service import grpc_codegen

PROTO = """syntax = "proto3";
package probe;
message Pair {
  string name = 1;
  repeated double values = 4;
}
"""


def test_compile_descriptor_of_a_small_proto(tmp_path):
    proto = tmp_path / "probe.proto"
    proto.write_text(PROTO)
    descriptor = descriptor_pb2.FileDescriptorProto.FromString(
        grpc_codegen.compile_descriptor(proto))
    assert descriptor.name == "probe.proto" and descriptor.package == "probe"
    [message] = descriptor.message_type
    fields = {field.name: (field.number, field.type, field.label) for field in message.field}
    assert fields == {
        "name": (1, descriptor_pb2.FieldDescriptorProto.TYPE_STRING,
                 descriptor_pb2.FieldDescriptorProto.LABEL_OPTIONAL),
        "values": (4, descriptor_pb2.FieldDescriptorProto.TYPE_DOUBLE,
                   descriptor_pb2.FieldDescriptorProto.LABEL_REPEATED)}


def test_a_broken_proto_is_an_error_naming_the_file(tmp_path, capsys):
    proto = tmp_path / "broken.proto"
    proto.write_text('syntax = "proto3";\nmessage {\n')
    with pytest.raises(RuntimeError, match=r"protoc failed on .*broken\.proto"):
        grpc_codegen.compile_descriptor(proto)


@pytest.mark.parametrize("width", [20, 90])
def test_render_writes_the_bytes_back_exactly_within_the_width(width):
    rng = random.Random(3)
    # Every byte value, including quotes, backslashes and newlines, in random order.
    data = bytes(rng.sample(range(256), 256)) + b"'\"\\\n" * 5
    text = grpc_codegen.render(data, width=width)
    namespace: dict = {}
    exec(compile(text, "grpc_descriptor.py", "exec"), namespace)
    assert namespace["FILE_DESCRIPTOR"] == data
    literal_lines = [line for line in text.splitlines() if line.startswith("    b")]
    assert literal_lines and all(len(line) <= 4 + width for line in literal_lines)
    assert "Do not edit" in text
