"""The REST form of inference: JSON documents and the binary tensor data extension.

Sources: kserve/open-inference-protocol, specification/protocol/inference_rest.md
($inference_request, $request_input, $request_output); the binary tensor data extension
(Triton's protocol/extension_binary_data.md, KServe's "Binary Tensor Data Extension"): the JSON
object comes first, its byte length in the `Inference-Header-Content-Length` header, then the
raw little-endian row-major bytes of every tensor whose parameters give `binary_data_size`, in
the order the tensors are listed.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .codec import JSON_MEDIA, encode
from .errors import ApiError
from .protocol_v2 import WIRE_DTYPES, RequestOptions, Tensor, check_input_kind
from .validation import fields, invalid, to_array

HEADER = "Inference-Header-Content-Length"
BINARY_MEDIA = "application/octet-stream"


def split_body(body: bytes, header: str | None) -> tuple[bytes, bytes]:
    """The JSON part and the binary part of a body (all JSON when `header` is None)."""
    if header is None:
        return body, b""
    text = header.strip()
    if not text.isdigit() or int(text) > len(body):
        raise ApiError(400, f"the {HEADER} header is {header!r}; expected the byte length of "
                            f"the JSON object, at most the body's {len(body)} bytes.")
    return body[:int(text)], body[int(text):]


def _parameters(value: Any, where: str) -> dict[str, Any]:
    if value is None:
        return {}
    if not isinstance(value, dict):
        raise invalid(f"`{where}` must be an object of parameters.")
    # The protocol's $parameter value is a string, number or boolean; nothing nested.
    for key, item in value.items():
        if not isinstance(item, str | int | float | bool):
            raise invalid(f"`{where}.{key}` is of type {type(item).__name__}; a parameter is a "
                          "string, number or boolean.")
    return value


def _binary_size(parameters: dict[str, Any], where: str) -> int | None:
    size = parameters.get("binary_data_size")
    if size is None:
        return None
    if isinstance(size, bool) or not isinstance(size, int) or size < 0:
        raise invalid(f"`{where}.parameters.binary_data_size` is {size!r}; expected a "
                      "non-negative integer.")
    return size


def _shape(value: Any, where: str) -> tuple[int, ...]:
    if (not isinstance(value, list) or len(value) > 8
            or any(isinstance(n, bool) or not isinstance(n, int) or n < 0 for n in value)):
        raise invalid(f"`{where}.shape` is {value!r}; expected a list of non-negative integers.")
    return tuple(value)


def rest_request(document: Any, binary: bytes) -> tuple[list[Tensor], RequestOptions, Any, Any]:
    """Tensors, options, and the body's `model_name`/`model_version` (None when absent)."""
    body = fields(document, "the request body", required={"inputs"},
                  optional={"id", "parameters", "outputs", "model_name", "model_version"})
    inputs = body["inputs"]
    if not isinstance(inputs, list):
        raise invalid("`inputs` must be a list of tensors 'state' and 't'.")
    tensors: list[Tensor] = []
    offset = 0
    for index, item in enumerate(inputs):
        where = f"inputs[{index}]"
        spec = fields(item, f"`{where}`", required={"name", "shape", "datatype"},
                      optional={"parameters", "data"})
        parameters = _parameters(spec.get("parameters"), f"{where}.parameters")
        shape = _shape(spec["shape"], where)
        size = _binary_size(parameters, where)
        check_input_kind(spec["name"], spec["datatype"], where)
        if size is None:
            if "data" not in spec:
                raise invalid(f"`{where}` has neither `data` nor "
                              "`parameters.binary_data_size`.")
            values = to_array(spec["data"], f"{where}.data")
        else:
            if "data" in spec:
                raise invalid(f"`{where}` has both `data` and `parameters.binary_data_size`; "
                              "send one.")
            values = _binary_values(binary[offset:offset + size], size, spec["datatype"],
                                    shape, where)
            offset += size
        tensors.append(Tensor(spec["name"], spec["datatype"], shape, values, where))
    if offset != len(binary):
        raise invalid(f"the body has {len(binary)} bytes after its JSON object but the inputs' "
                      f"binary_data_size add up to {offset}.")
    outputs = body.get("outputs")
    requested = None
    if outputs is not None:
        if not isinstance(outputs, list):
            raise invalid("`outputs` must be a list of requested outputs.")
        requested = []
        for index, item in enumerate(outputs):
            spec = fields(item, f"`outputs[{index}]`", required={"name"},
                          optional={"parameters"})
            requested.append((spec["name"], _parameters(spec.get("parameters"),
                                                        f"outputs[{index}].parameters")))
    options = RequestOptions(request_id=body.get("id"),
                             parameters=_parameters(body.get("parameters"), "parameters"),
                             outputs=requested)
    return tensors, options, body.get("model_name"), body.get("model_version")


def _binary_values(data: bytes, size: int, datatype: Any, shape: tuple[int, ...],
                   where: str) -> np.ndarray:
    dtype = WIRE_DTYPES.get(datatype) if isinstance(datatype, str) else None
    if dtype is None:
        raise invalid(f"`{where}.datatype` is {datatype!r}; binary data is accepted for "
                      f"{list(WIRE_DTYPES)}.")
    if len(data) != size:
        raise invalid(f"`{where}.parameters.binary_data_size` is {size} but only {len(data)} "
                      "bytes of binary data remain in the body.")
    expected = int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
    if size != expected:
        raise invalid(f"`{where}` has {size} bytes of binary data; shape {list(shape)} of "
                      f"{datatype} needs {expected} bytes.")
    return np.frombuffer(data, dtype=dtype).astype(dtype.newbyteorder("="))


def binary_answer(document: dict[str, Any]) -> tuple[bytes, int]:
    """The body of a binary answer (JSON object, then each output's bytes) and the JSON size.

    Each output's `data` is replaced by `parameters.binary_data_size`, as the extension asks.
    """
    chunks: list[bytes] = []
    outputs = []
    for output in document["outputs"]:
        array = np.asarray(output["data"])
        raw = np.ascontiguousarray(array, dtype=array.dtype.newbyteorder("<")).tobytes()
        described = {key: value for key, value in output.items() if key != "data"}
        described["parameters"] = {**output.get("parameters", {}), "binary_data_size": len(raw)}
        outputs.append(described)
        chunks.append(raw)
    header = encode({**document, "outputs": outputs}, JSON_MEDIA)
    return header + b"".join(chunks), len(header)
