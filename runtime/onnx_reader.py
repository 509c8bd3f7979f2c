"""Read an ONNX model (a serialized ModelProto) into the records of `onnx_model`, NumPy only.

One parse function per message type; field numbers come from onnx.proto (ONNX 1.23). Whatever
the runtime cannot run faithfully (external data, sparse tensors, subgraphs) is refused by name.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .errors import ModelFormatError
from .limits import DEFAULT_LIMITS, Limits
from .onnx_model import (
    BOOL,
    DOUBLE,
    DTYPE_NAMES,
    FLOAT,
    FLOAT16,
    INT16,
    INT32,
    INT64,
    NUMPY_DTYPES,
    UINT16,
    Attribute,
    Function,
    Graph,
    Model,
    Node,
    Tensor,
    ValueInfo,
)
from .protobuf import FieldSpec, MessageSchema, RepeatedScalars, read_message

# NumPy 1.x arrays have at most 32 dimensions (NumPy 2 allows 64); keep the portable bound.
MAX_TENSOR_RANK = 32

# Names of codes DTYPE_NAMES lacks, so refusals can name the type (onnx.proto, DataType).
_MORE_DTYPE_NAMES = {
    0: "UNDEFINED", 17: "FLOAT8E4M3FN", 18: "FLOAT8E4M3FNUZ", 19: "FLOAT8E5M2",
    20: "FLOAT8E5M2FNUZ", 21: "UINT4", 22: "INT4", 23: "FLOAT4E2M1", 24: "FLOAT8E8M0",
    25: "UINT2", 26: "INT2", 27: "FLOAT6E2M3", 28: "FLOAT6E3M2",
}
_SUPPORTED_DTYPES = ", ".join(DTYPE_NAMES[code] for code in sorted(NUMPY_DTYPES))

# TensorProto fields: which typed field holds each supported data type when raw_data is absent.
_TYPED_FIELD = {FLOAT: "float_data", DOUBLE: "double_data", INT64: "int64_data"}
_TYPED_FIELDS = ("float_data", "int32_data", "string_data", "int64_data", "double_data",
                 "uint64_data")
_DATA_LOCATION_EXTERNAL = 1

# AttributeProto.AttributeType codes (onnx.proto).
_ATTRIBUTE_TYPES = {
    1: "FLOAT", 2: "INT", 3: "STRING", 4: "TENSOR", 5: "GRAPH", 6: "FLOATS", 7: "INTS",
    8: "STRINGS", 9: "TENSORS", 10: "GRAPHS", 11: "SPARSE_TENSOR", 12: "SPARSE_TENSORS",
    13: "TYPE_PROTO", 14: "TYPE_PROTOS",
}
# Which AttributeProto field carries the value of each attribute type.
_ATTRIBUTE_VALUE_FIELD = {
    1: "f", 2: "i", 3: "s", 4: "t", 5: "g", 6: "floats", 7: "ints", 8: "strings",
    9: "tensors", 10: "graphs", 11: "sparse_tensor", 12: "sparse_tensors", 13: "tp",
    14: "type_protos",
}
_SUPPORTED_ATTRIBUTE_TYPES = frozenset({"FLOAT", "INT", "STRING", "TENSOR", "FLOATS", "INTS",
                                        "STRINGS"})
_SUPPORTED_ATTRIBUTES = "FLOAT, INT, STRING, TENSOR, FLOATS, INTS and STRINGS"


def _schema(name: str, *specs: tuple[int, str, str] | tuple[int, str, str, bool]
            ) -> MessageSchema:
    return MessageSchema(name, {spec[0]: FieldSpec(*spec[1:]) for spec in specs})


# Field tables, numbered as in onnx.proto. Fields not listed (doc strings, metadata, training
# info, quantization annotations, ...) are skipped.
_MODEL = _schema(
    "ModelProto", (1, "ir_version", "int64"), (2, "producer_name", "string"),
    (3, "producer_version", "string"), (7, "graph", "message"),
    (8, "opset_import", "message", True), (25, "functions", "message", True))
_OPSET_ID = _schema("OperatorSetIdProto", (1, "domain", "string"), (2, "version", "int64"))
_GRAPH = _schema(
    "GraphProto", (1, "node", "message", True), (2, "name", "string"),
    (5, "initializer", "message", True), (11, "input", "message", True),
    (12, "output", "message", True), (13, "value_info", "message", True),
    (15, "sparse_initializer", "message", True))
_NODE = _schema(
    "NodeProto", (1, "input", "string", True), (2, "output", "string", True),
    (3, "name", "string"), (4, "op_type", "string"), (5, "attribute", "message", True),
    (7, "domain", "string"), (8, "overload", "string"))
_ATTRIBUTE = _schema(
    "AttributeProto", (1, "name", "string"), (2, "f", "float"), (3, "i", "int64"),
    (4, "s", "bytes"), (5, "t", "message"), (6, "g", "message"), (7, "floats", "float", True),
    (8, "ints", "int64", True), (9, "strings", "bytes", True), (10, "tensors", "message", True),
    (11, "graphs", "message", True), (14, "tp", "message"),
    (15, "type_protos", "message", True), (20, "type", "int32"), (21, "ref_attr_name", "string"),
    (22, "sparse_tensor", "message"), (23, "sparse_tensors", "message", True))
_TENSOR = _schema(
    "TensorProto", (1, "dims", "int64", True), (2, "data_type", "int32"),
    (3, "segment", "message"), (4, "float_data", "float", True),
    (5, "int32_data", "int32", True), (6, "string_data", "bytes", True),
    (7, "int64_data", "int64", True), (8, "name", "string"), (9, "raw_data", "bytes"),
    (10, "double_data", "double", True), (11, "uint64_data", "int64", True),
    (13, "external_data", "message", True), (14, "data_location", "int32"))
_VALUE_INFO = _schema("ValueInfoProto", (1, "name", "string"), (2, "type", "message"))
_TYPE = _schema(
    "TypeProto", (1, "tensor_type", "message"), (4, "sequence_type", "message"),
    (5, "map_type", "message"), (7, "opaque_type", "message"),
    (8, "sparse_tensor_type", "message"), (9, "optional_type", "message"))
_TENSOR_TYPE = _schema("TypeProto.Tensor", (1, "elem_type", "int32"), (2, "shape", "message"))
_SHAPE = _schema("TensorShapeProto", (1, "dim", "message", True))
_DIMENSION = _schema(
    "TensorShapeProto.Dimension", (1, "dim_value", "int64"), (2, "dim_param", "string"))
_FUNCTION = _schema(
    "FunctionProto", (1, "name", "string"), (4, "input", "string", True),
    (5, "output", "string", True), (6, "attribute", "string", True),
    (7, "node", "message", True), (9, "opset_import", "message", True), (10, "domain", "string"),
    (11, "attribute_proto", "message", True), (13, "overload", "string"))


def read_model(data: bytes, *, limits: Limits = DEFAULT_LIMITS, source: str = "model") -> Model:
    """Parse a serialized ONNX ModelProto.

    Parameters
    ----------
    data : bytes-like
        The serialized model. A mutable buffer is copied so the returned arrays cannot change.
    limits : Limits
        Bounds on size, nesting depth, graph nodes and tensor elements.
    source : str
        Name of the model (usually its path) used at the start of every error location.

    Returns
    -------
    Model
        Tensors hold read-only arrays with shape ``dims`` and the native dtype of their type.

    Raises
    ------
    ModelFormatError
        The data is malformed, exceeds a limit, or uses an unsupported feature; the message
        names the place (``source > graph > node[3] ...``) and what is supported.
    """
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise ModelFormatError(
            f"`data` of {source!r} must be bytes, got {type(data).__name__}."
        )
    size = memoryview(data).nbytes
    if size > limits.max_model_bytes:
        raise ModelFormatError(
            f"ONNX model {source!r} holds {size} bytes; the limit `max_model_bytes` is "
            f"{limits.max_model_bytes}."
        )
    view = memoryview(data if isinstance(data, bytes) else bytes(data))
    fields = _read(view, _MODEL, source, 1, limits)
    if "graph" not in fields:
        raise ModelFormatError(
            f"{source} (ModelProto) has no graph; an ONNX model must contain one."
        )
    return Model(
        ir_version=fields.get("ir_version", 0),
        opset_imports=_opset_imports(fields["opset_import"], source, 2, limits),
        graph=_graph(fields["graph"], f"{source} > graph", 2, limits),
        functions=tuple(
            _function(payload, f"{source} > functions[{index}]", 2, limits)
            for index, payload in enumerate(fields["functions"])
        ),
        producer_name=fields.get("producer_name", ""),
        producer_version=fields.get("producer_version", ""),
    )


def _read(view: memoryview, schema: MessageSchema, where: str, depth: int,
          limits: Limits) -> dict[str, Any]:
    return read_message(view, schema, where=where, depth=depth,
                        max_depth=limits.max_protobuf_depth, max_items=limits.max_graph_nodes)


def _opset_imports(payloads: list[memoryview], where: str, depth: int,
                   limits: Limits) -> dict[str, int]:
    versions: dict[str, int] = {}
    for index, payload in enumerate(payloads):
        fields = _read(payload, _OPSET_ID, f"{where} > opset_import[{index}]", depth, limits)
        domain = fields.get("domain", "")
        if domain in versions:
            raise ModelFormatError(
                f"{where} imports domain {domain!r} twice; each domain may be imported once."
            )
        versions[domain] = fields.get("version", 0)
    return versions


def _graph(view: memoryview, where: str, depth: int, limits: Limits) -> Graph:
    fields = _read(view, _GRAPH, where, depth, limits)
    name = fields.get("name", "")
    if name:
        where = f"{where} {name!r}"
    if fields["sparse_initializer"]:
        raise ModelFormatError(
            f"{where} has {len(fields['sparse_initializer'])} sparse initializer(s); sparse "
            "tensors are not supported, store the initializer dense."
        )
    return Graph(
        name=name,
        nodes=_nodes(fields["node"], where, depth + 1, limits),
        initializers=tuple(
            _tensor(payload, f"{where} > initializer[{index}]", depth + 1, limits)
            for index, payload in enumerate(fields["initializer"])
        ),
        inputs=_value_infos(fields["input"], f"{where} > input", depth + 1, limits),
        outputs=_value_infos(fields["output"], f"{where} > output", depth + 1, limits),
        value_infos=_value_infos(fields["value_info"], f"{where} > value_info", depth + 1,
                                 limits),
    )


def _nodes(payloads: list[memoryview], where: str, depth: int,
           limits: Limits) -> tuple[Node, ...]:
    # read_message has already held the count to `limits.max_graph_nodes`.
    return tuple(
        _node(payload, f"{where} > node[{index}]", depth, limits)
        for index, payload in enumerate(payloads)
    )


def _node(view: memoryview, where: str, depth: int, limits: Limits) -> Node:
    fields = _read(view, _NODE, where, depth, limits)
    name, op_type = fields.get("name", ""), fields.get("op_type", "")
    if name:
        where = f"{where} {name!r}"
    if not op_type:
        raise ModelFormatError(f"{where} (NodeProto) has no op_type; every node needs one.")
    where = f"{where} (op_type {op_type})"
    if fields.get("overload"):
        raise ModelFormatError(
            f"{where} calls function overload {fields['overload']!r}; function overloads are "
            "not supported, only functions identified by domain and name."
        )
    attributes = tuple(
        _attribute(payload, f"{where} > attribute[{index}]", depth + 1, limits)
        for index, payload in enumerate(fields["attribute"])
    )
    _check_unique_names(attributes, where)
    return Node(
        op_type=op_type,
        inputs=tuple(fields["input"]),
        outputs=tuple(fields["output"]),
        attributes=attributes,
        name=name,
        domain=fields.get("domain", ""),
    )


def _check_unique_names(attributes: tuple[Attribute, ...], where: str) -> None:
    seen: set[str] = set()
    for attribute in attributes:
        if attribute.name in seen:
            raise ModelFormatError(
                f"{where} sets attribute {attribute.name!r} twice; each attribute may be set "
                "once."
            )
        seen.add(attribute.name)


def _attribute(view: memoryview, where: str, depth: int, limits: Limits) -> Attribute:
    fields = _read(view, _ATTRIBUTE, where, depth, limits)
    name = fields.get("name", "")
    if not name:
        raise ModelFormatError(f"{where} (AttributeProto) has no name; every attribute needs one.")
    where = f"{where} {name!r}"
    reference = fields.get("ref_attr_name", "")
    code = fields.get("type", 0) or _infer_attribute_type(fields, where, reference)
    if code not in _ATTRIBUTE_TYPES:
        raise ModelFormatError(
            f"Attribute {where} has unknown type code {code}; supported types are "
            f"{_SUPPORTED_ATTRIBUTES}."
        )
    type_name = _ATTRIBUTE_TYPES[code]
    if type_name in ("GRAPH", "GRAPHS"):
        raise ModelFormatError(
            f"Attribute {where} holds a subgraph ({type_name}); subgraphs are not supported "
            "(control flow such as If, Loop and Scan cannot be run)."
        )
    if type_name not in _SUPPORTED_ATTRIBUTE_TYPES:
        raise ModelFormatError(
            f"Attribute {where} has type {type_name}, which is not supported; supported types "
            f"are {_SUPPORTED_ATTRIBUTES}."
        )
    if reference and not _has_value(fields, _ATTRIBUTE_VALUE_FIELD[code]):
        # A function-body attribute that takes its value from the caller at inlining time.
        return Attribute(name, None, reference)
    return Attribute(name, _attribute_value(fields, type_name, where, depth, limits), reference)


def _has_value(fields: dict[str, Any], field_name: str) -> bool:
    value = fields.get(field_name)
    if isinstance(value, RepeatedScalars):
        # Like protobuf's own presence test: an empty packed payload holds nothing.
        return any(len(piece) for piece in value.pieces)
    return bool(value) if isinstance(value, list) else value is not None


def _infer_attribute_type(fields: dict[str, Any], where: str, reference: str) -> int:
    """Models from before IR version 3 leave `type` unset; the field that is set decides."""
    present = [code for code, field_name in _ATTRIBUTE_VALUE_FIELD.items()
               if _has_value(fields, field_name)]
    if len(present) == 1:
        return present[0]
    if not present:
        detail = f" (it refers to {reference!r} but has no type)" if reference else ""
        raise ModelFormatError(
            f"Attribute {where} has neither a type nor a value{detail}; an attribute needs one "
            "of the types " + _SUPPORTED_ATTRIBUTES + "."
        )
    names = ", ".join(_ATTRIBUTE_VALUE_FIELD[code] for code in present)
    raise ModelFormatError(
        f"Attribute {where} has no type and sets several value fields ({names}); set `type` "
        "or exactly one value field."
    )


def _attribute_value(fields: dict[str, Any], type_name: str, where: str, depth: int,
                     limits: Limits) -> Any:
    if type_name == "FLOAT":
        return fields.get("f", 0.0)
    if type_name == "INT":
        return fields.get("i", 0)
    if type_name == "STRING":
        return _utf8(fields.get("s", b""), where)
    if type_name == "STRINGS":
        return tuple(_utf8(item, where) for item in fields["strings"])
    if type_name == "TENSOR":
        if "t" not in fields:
            raise ModelFormatError(f"Attribute {where} has type TENSOR but no tensor `t`.")
        return _tensor(fields["t"], f"{where} > t", depth + 1, limits).array
    values: RepeatedScalars = fields["floats" if type_name == "FLOATS" else "ints"]
    _check_count(values.count(), f"Attribute {where}", limits)
    return tuple(values.to_array().tolist())


def _utf8(value: memoryview | bytes, where: str) -> str:
    try:
        return str(value, "utf-8")
    except UnicodeDecodeError as error:
        raise ModelFormatError(
            f"Attribute {where} holds a string that is not valid UTF-8 ({error.reason} at byte "
            f"{error.start}); ONNX strings must be UTF-8."
        ) from error


def _check_count(count: int, what: str, limits: Limits) -> None:
    if count > limits.max_tensor_elements:
        raise ModelFormatError(
            f"{what} holds {count} elements; the limit `max_tensor_elements` is "
            f"{limits.max_tensor_elements}."
        )


def _tensor(view: memoryview, where: str, depth: int, limits: Limits) -> Tensor:
    fields = _read(view, _TENSOR, where, depth, limits)
    name = fields.get("name", "")
    label = f"Tensor {where} {name!r}" if name else f"Tensor {where}"
    if "segment" in fields:
        raise ModelFormatError(f"{label} is a segment of a larger tensor; segments are not "
                               "supported, store the tensor whole.")
    if fields["external_data"] or fields.get("data_location") == _DATA_LOCATION_EXTERNAL:
        raise ModelFormatError(f"{label} keeps its data in an external file; external data is "
                               "not supported, save the model with all tensors inside it.")
    code = fields.get("data_type", 0)
    if code not in NUMPY_DTYPES:
        type_name = DTYPE_NAMES.get(code) or _MORE_DTYPE_NAMES.get(code, f"code {code}")
        raise ModelFormatError(f"{label} has data type {type_name}, which is not supported; "
                               f"supported types are {_SUPPORTED_DTYPES}.")
    shape, elements = _tensor_shape(fields["dims"], label, limits)
    array = _tensor_data(fields, code, elements, label)
    array = array.reshape(shape)
    if not array.flags.aligned:
        # raw_data may start at any byte offset; BLAS and fast loops want aligned memory.
        array = array.copy()
    array.flags.writeable = False
    return Tensor(name, array)


def _tensor_shape(dims: RepeatedScalars, label: str,
                  limits: Limits) -> tuple[tuple[int, ...], int]:
    if dims.count() > MAX_TENSOR_RANK:
        raise ModelFormatError(f"{label} has {dims.count()} dimensions; at most "
                               f"{MAX_TENSOR_RANK} are supported.")
    shape = tuple(dims.to_array().tolist())
    elements = 1
    for extent in shape:
        if extent < 0:
            raise ModelFormatError(f"{label} has dims {shape}; dims must be non-negative.")
        elements *= extent
    # Ranks are small (checked above), so this product of Python ints stays cheap.
    _check_count(elements, f"{label} with dims {shape}", limits)
    return shape, elements


def _tensor_data(fields: dict[str, Any], code: int, elements: int, label: str) -> np.ndarray:
    dtype = NUMPY_DTYPES[code]
    type_name = DTYPE_NAMES[code]
    typed = [field_name for field_name in _TYPED_FIELDS if _has_value(fields, field_name)]
    if "raw_data" in fields:
        if typed:
            raise ModelFormatError(f"{label} sets both raw_data and {typed[0]}; a tensor must "
                                   "store its values in exactly one field.")
        raw = fields["raw_data"]
        if len(raw) != elements * dtype.itemsize:
            raise ModelFormatError(
                f"{label} has {len(raw)} bytes of raw_data but its {elements} {type_name} "
                f"elements need {elements * dtype.itemsize} bytes."
            )
        if code == BOOL:
            return np.frombuffer(raw, np.uint8) != 0
        values = np.frombuffer(raw, dtype)
        return values if dtype.isnative else values.astype(dtype.newbyteorder("="))
    expected = _TYPED_FIELD.get(code, "int32_data")
    stray = [field_name for field_name in typed if field_name != expected]
    if stray:
        raise ModelFormatError(f"{label} of type {type_name} stores values in {stray[0]}; "
                               f"it must use raw_data or {expected}.")
    storage: RepeatedScalars = fields[expected]
    present = storage.count()
    if present != elements:
        raise ModelFormatError(f"{label} has {present} values in {expected} but its dims "
                               f"need {elements}.")
    values = storage.to_array()
    if expected != "int32_data" or code == INT32:
        return values
    return _from_int32_data(values, code)


def _from_int32_data(values: np.ndarray, code: int) -> np.ndarray:
    """Narrow int32_data to its type as onnx.numpy_helper.to_array does (modular casts)."""
    if code == BOOL:
        return values != 0
    if code in (FLOAT16, INT16, UINT16):
        # Each entry carries the 16-bit pattern (for FLOAT16, the IEEE half bits).
        return values.astype(np.uint16).view(NUMPY_DTYPES[code].newbyteorder("="))
    return values.astype(NUMPY_DTYPES[code].newbyteorder("="))


def _value_infos(payloads: list[memoryview], where: str, depth: int,
                 limits: Limits) -> tuple[ValueInfo, ...]:
    return tuple(
        _value_info(payload, f"{where}[{index}]", depth, limits)
        for index, payload in enumerate(payloads)
    )


def _value_info(view: memoryview, where: str, depth: int, limits: Limits) -> ValueInfo:
    fields = _read(view, _VALUE_INFO, where, depth, limits)
    name = fields.get("name", "")
    where = f"{where} {name!r}"
    if "type" not in fields:
        return ValueInfo(name)
    type_fields = _read(fields["type"], _TYPE, f"{where} > type", depth + 1, limits)
    if "tensor_type" not in type_fields:
        if not type_fields:
            # An empty TypeProto says nothing about the value; treat it as untyped.
            return ValueInfo(name)
        kind = next(iter(type_fields)).removesuffix("_type")
        raise ModelFormatError(f"Value {where} has a {kind} type; only tensor types are "
                               "supported.")
    tensor_fields = _read(type_fields["tensor_type"], _TENSOR_TYPE, f"{where} > type",
                          depth + 2, limits)
    shape = None
    if "shape" in tensor_fields:
        shape = _value_shape(tensor_fields["shape"], where, depth + 3, limits)
    return ValueInfo(name, tensor_fields.get("elem_type", 0), shape)


def _value_shape(view: memoryview, where: str, depth: int,
                 limits: Limits) -> tuple[int | str | None, ...]:
    dims = _read(view, _SHAPE, f"{where} > shape", depth, limits)["dim"]
    shape: list[int | str | None] = []
    for index, payload in enumerate(dims):
        dim = _read(payload, _DIMENSION, f"{where} > shape > dim[{index}]", depth + 1, limits)
        if "dim_value" in dim:
            if dim["dim_value"] < 0:
                raise ModelFormatError(f"Value {where} has dim_value {dim['dim_value']} at "
                                       f"axis {index}; dimensions must be non-negative.")
            shape.append(dim["dim_value"])
        else:
            shape.append(dim.get("dim_param"))
    return tuple(shape)


def _function(view: memoryview, where: str, depth: int, limits: Limits) -> Function:
    fields = _read(view, _FUNCTION, where, depth, limits)
    name, domain = fields.get("name", ""), fields.get("domain", "")
    where = f"{where} {domain}:{name}" if domain else f"{where} {name!r}"
    if not name:
        raise ModelFormatError(f"{where} (FunctionProto) has no name; a local function needs "
                               "one so nodes can call it.")
    if fields.get("overload"):
        raise ModelFormatError(f"Function {where} is overload {fields['overload']!r}; function "
                               "overloads are not supported.")
    defaults = tuple(
        _attribute(payload, f"{where} > attribute_proto[{index}]", depth + 1, limits)
        for index, payload in enumerate(fields["attribute_proto"])
    )
    _check_unique_names(defaults, f"Function {where}")
    return Function(
        name=name,
        domain=domain,
        inputs=tuple(fields["input"]),
        outputs=tuple(fields["output"]),
        attribute_names=tuple(fields["attribute"]),
        nodes=_nodes(fields["node"], where, depth + 1, limits),
        opset_imports=_opset_imports(fields["opset_import"], where, depth + 1, limits),
        attribute_defaults=defaults,
    )
