"""Regenerate `grpc_descriptor.py` from `proto/open_inference_grpc.proto` (needs grpcio-tools).

``python -m stridecast.service.grpc_codegen`` compiles the .proto with grpcio-tools' protoc
and writes its serialized FileDescriptorProto as a Python bytes literal. The service builds its
message classes from those bytes at run time (`grpc_messages`), so installing `stridecast[grpc]`
needs no compiler, and the classes live in a private descriptor pool that cannot clash with a
client library's copy of the same protocol loaded into the same process.
"""

from __future__ import annotations

import os
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
PROTO = HERE / "proto" / "open_inference_grpc.proto"
TARGET = HERE / "grpc_descriptor.py"
_HEADER = '''"""The serialized FileDescriptorProto of proto/open_inference_grpc.proto (generated).

Do not edit: regenerate with ``python -m stridecast.service.grpc_codegen``.
"""

FILE_DESCRIPTOR = (
'''


def compile_descriptor(proto: Path = PROTO) -> bytes:
    """The serialized FileDescriptorProto protoc makes of `proto`."""
    from google.protobuf import descriptor_pb2
    from grpc_tools import protoc

    with tempfile.TemporaryDirectory() as folder:
        output = Path(folder) / "descriptor.pb"
        status = protoc.main(["protoc", f"-I{proto.parent}", f"--descriptor_set_out={output}",
                              proto.name])
        if status != 0:
            raise RuntimeError(f"protoc failed on {proto} (exit status {status}).")
        descriptor_set = descriptor_pb2.FileDescriptorSet.FromString(output.read_bytes())
    (file_descriptor,) = descriptor_set.file
    return file_descriptor.SerializeToString(deterministic=True)


def render(serialized: bytes, width: int = 90) -> str:
    """The module text: the bytes as literals of at most `width` characters per line."""
    lines, start = [], 0
    while start < len(serialized):
        end = start + 1
        while end < len(serialized) and len(repr(serialized[start:end + 1])) <= width:
            end += 1
        lines.append(f"    {serialized[start:end]!r}\n")
        start = end
    return _HEADER + "".join(lines) + ")\n"


def main() -> int:
    text = render(compile_descriptor())
    staging = TARGET.with_name(TARGET.name + ".tmp")
    staging.write_text(text, encoding="utf-8")
    os.replace(staging, TARGET)
    sys.stdout.write(f"wrote {TARGET}\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
