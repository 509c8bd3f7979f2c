"""Frozen records for the parts of an ONNX model the runtime understands.

`onnx_reader` fills them from the protobuf wire format; the interpreter and compiler read them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

# ONNX TensorProto.DataType codes the runtime can hold (onnx.proto3, enum DataType).
FLOAT, UINT8, INT8, UINT16, INT16, INT32, INT64, STRING, BOOL, FLOAT16, DOUBLE = (
    1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11,
)
NUMPY_DTYPES: dict[int, np.dtype] = {
    FLOAT: np.dtype("<f4"),
    DOUBLE: np.dtype("<f8"),
    FLOAT16: np.dtype("<f2"),
    INT64: np.dtype("<i8"),
    INT32: np.dtype("<i4"),
    INT16: np.dtype("<i2"),
    INT8: np.dtype("i1"),
    UINT8: np.dtype("u1"),
    UINT16: np.dtype("<u2"),
    BOOL: np.dtype("?"),
}
DTYPE_NAMES: dict[int, str] = {
    1: "FLOAT", 2: "UINT8", 3: "INT8", 4: "UINT16", 5: "INT16", 6: "INT32", 7: "INT64",
    8: "STRING", 9: "BOOL", 10: "FLOAT16", 11: "DOUBLE", 12: "UINT32", 13: "UINT64",
    14: "COMPLEX64", 15: "COMPLEX128", 16: "BFLOAT16",
}


@dataclass(frozen=True)
class Tensor:
    """An initializer or constant: name plus a read-only NumPy array."""

    name: str
    array: np.ndarray


@dataclass(frozen=True)
class Attribute:
    """A node attribute; `value` is a float, int, str, ndarray, or tuple of floats/ints/strs."""

    name: str
    value: Any
    # For attributes inside a local function that refer to the caller's attribute.
    ref_attr_name: str = ""


@dataclass(frozen=True)
class Node:
    """One operator application."""

    op_type: str
    inputs: tuple[str, ...]
    outputs: tuple[str, ...]
    attributes: tuple[Attribute, ...] = ()
    name: str = ""
    domain: str = ""

    def attribute_dict(self) -> dict[str, Any]:
        return {attribute.name: attribute.value for attribute in self.attributes}

    def describe(self) -> str:
        label = f" {self.name!r}" if self.name else ""
        return f"node{label} (op_type {self.op_type!r})"


@dataclass(frozen=True)
class ValueInfo:
    """A graph input or output: element type code and shape (ints, symbolic names or None)."""

    name: str
    elem_type: int = 0
    shape: tuple[int | str | None, ...] | None = None


@dataclass(frozen=True)
class Graph:
    name: str
    nodes: tuple[Node, ...]
    initializers: tuple[Tensor, ...]
    inputs: tuple[ValueInfo, ...]
    outputs: tuple[ValueInfo, ...]
    value_infos: tuple[ValueInfo, ...] = ()


@dataclass(frozen=True)
class Function:
    """A model-local function (FunctionProto), inlined at load."""

    name: str
    domain: str
    inputs: tuple[str, ...]
    outputs: tuple[str, ...]
    attribute_names: tuple[str, ...]
    nodes: tuple[Node, ...]
    opset_imports: dict[str, int] = field(default_factory=dict)
    # Attributes with default values (FunctionProto.attribute_proto).
    attribute_defaults: tuple[Attribute, ...] = ()


@dataclass(frozen=True)
class Model:
    ir_version: int
    opset_imports: dict[str, int]
    graph: Graph
    functions: tuple[Function, ...] = ()
    producer_name: str = ""
    producer_version: str = ""

    @property
    def opset(self) -> int:
        """The default-domain ("" or "ai.onnx") opset version."""
        return self.opset_imports.get("", self.opset_imports.get("ai.onnx", 0))
