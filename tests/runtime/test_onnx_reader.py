"""Tests of the ONNX reader (runtime/onnx_reader.py).

The reference throughout is the `onnx` library (test-only import): models are built with
onnx.helper / onnx.numpy_helper, serialized by protobuf, and every field our reader returns is
compared with what onnx itself parses from the same bytes.
"""

from __future__ import annotations

import io
import time
import warnings
from datetime import timedelta

import numpy as np
import onnx
import pytest
from google.protobuf.message import DecodeError
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from onnx import AttributeProto, TensorProto, helper, numpy_helper

from stridecast.runtime.errors import ModelFormatError
from stridecast.runtime.limits import Limits
from stridecast.runtime.onnx_model import Attribute, Model
from stridecast.runtime.onnx_reader import read_model
from tests.builders import (
    SMALL,
    length_delimited,
    model_bytes,
    mutate,
    node_model,
    tag,
    tensor_model,
    varint,
)

# --- comparison with the onnx library (the reference) -------------------------------------

def expected_shape(value_info: onnx.ValueInfoProto):
    tensor_type = value_info.type.tensor_type
    if not tensor_type.HasField("shape"):
        return None
    return tuple(
        dim.dim_value if dim.HasField("dim_value")
        else dim.dim_param if dim.HasField("dim_param") else None
        for dim in tensor_type.shape.dim
    )


def assert_array_matches(array: np.ndarray, reference: np.ndarray) -> None:
    assert array.dtype == reference.dtype
    assert array.shape == reference.shape
    assert array.tobytes() == reference.tobytes()  # bit-exact, so NaN, -0.0 and inf count
    assert not array.flags.writeable


def assert_attribute_matches(ours: Attribute, reference: AttributeProto) -> None:
    assert ours.name == reference.name
    assert ours.ref_attr_name == reference.ref_attr_name
    if reference.ref_attr_name:
        assert ours.value is None
        return
    value = helper.get_attribute_value(reference)
    if reference.type == AttributeProto.TENSOR:
        assert_array_matches(ours.value, numpy_helper.to_array(value))
    elif reference.type == AttributeProto.STRING:
        assert ours.value == value.decode("utf-8")
    elif reference.type == AttributeProto.STRINGS:
        assert ours.value == tuple(item.decode("utf-8") for item in value)
    elif reference.type in (AttributeProto.FLOATS, AttributeProto.INTS):
        assert ours.value == tuple(value)
    else:
        assert ours.value == value


def assert_nodes_match(nodes, references) -> None:
    assert len(nodes) == len(references)
    for ours, reference in zip(nodes, references, strict=True):
        assert ours.op_type == reference.op_type
        assert ours.inputs == tuple(reference.input)
        assert ours.outputs == tuple(reference.output)
        assert ours.name == reference.name
        assert ours.domain == reference.domain
        assert len(ours.attributes) == len(reference.attribute)
        for attribute, expected in zip(ours.attributes, reference.attribute, strict=True):
            assert_attribute_matches(attribute, expected)


def assert_value_infos_match(infos, references) -> None:
    assert [(info.name, info.elem_type, info.shape) for info in infos] == [
        (ref.name, ref.type.tensor_type.elem_type, expected_shape(ref)) for ref in references
    ]


def assert_model_matches(model: Model, reference: onnx.ModelProto) -> None:
    assert model.ir_version == reference.ir_version
    assert model.producer_name == reference.producer_name
    assert model.producer_version == reference.producer_version
    assert model.opset_imports == {op.domain: op.version for op in reference.opset_import}
    graph, expected = model.graph, reference.graph
    assert graph.name == expected.name
    assert_nodes_match(graph.nodes, expected.node)
    assert [tensor.name for tensor in graph.initializers] == [t.name for t in expected.initializer]
    for tensor, expected_tensor in zip(graph.initializers, expected.initializer, strict=True):
        assert_array_matches(tensor.array, numpy_helper.to_array(expected_tensor))
    assert_value_infos_match(graph.inputs, expected.input)
    assert_value_infos_match(graph.outputs, expected.output)
    assert_value_infos_match(graph.value_infos, expected.value_info)
    assert len(model.functions) == len(reference.functions)
    for function, expected_function in zip(model.functions, reference.functions, strict=True):
        assert (function.name, function.domain) == (expected_function.name,
                                                    expected_function.domain)
        assert function.inputs == tuple(expected_function.input)
        assert function.outputs == tuple(expected_function.output)
        assert function.attribute_names == tuple(expected_function.attribute)
        assert function.opset_imports == {op.domain: op.version
                                          for op in expected_function.opset_import}
        assert_nodes_match(function.nodes, expected_function.node)
        for attribute, default in zip(function.attribute_defaults,
                                      expected_function.attribute_proto, strict=True):
            assert_attribute_matches(attribute, default)


def parse_both(data: bytes, **kwargs) -> Model:
    """Parse with our reader and compare with onnx's parse of the same bytes."""
    model = read_model(data, **kwargs)
    assert_model_matches(model, onnx.ModelProto.FromString(data))
    return model


# --- tensors -------------------------------------------------------------------------------

def sample_arrays() -> dict[int, np.ndarray]:
    """Per data type, values including each type's extremes and the special floats."""
    floats = [0.0, -0.0, 1.5, -2.25, np.inf, -np.inf, np.nan, 1e-30]
    arrays = {
        TensorProto.FLOAT: np.array([*floats, 3.4e38], np.float32).reshape(3, 3),
        TensorProto.DOUBLE: np.array([*floats, 1e300], np.float64).reshape(3, 3),
        TensorProto.FLOAT16: np.array([*floats[:7], 65504.0, 6e-8], np.float16).reshape(3, 3),
        TensorProto.BOOL: np.array([[True, False, True], [False, False, True]]),
    }
    for dtype, code in ((np.int64, TensorProto.INT64), (np.int32, TensorProto.INT32),
                        (np.int16, TensorProto.INT16), (np.int8, TensorProto.INT8),
                        (np.uint8, TensorProto.UINT8), (np.uint16, TensorProto.UINT16)):
        info = np.iinfo(dtype)
        arrays[code] = np.array([[info.min, -1 if info.min else 0, 0],
                                 [1, 77, info.max]], dtype)
    return arrays


SAMPLES = sample_arrays()


@pytest.mark.parametrize("code", sorted(SAMPLES), ids=lambda code: TensorProto.DataType.Name(code))
@pytest.mark.parametrize("raw", [True, False], ids=["raw_data", "typed"])
def test_initializers_of_every_type_match_onnx(code: int, raw: bool) -> None:
    values = SAMPLES[code]
    tensor = helper.make_tensor("t", code, values.shape, values.ravel().tolist()
                                if code != TensorProto.FLOAT16 else values.ravel(), raw=False)
    if raw:
        tensor = numpy_helper.from_array(values, "t")
    assert tensor.HasField("raw_data") == raw
    model = parse_both(model_bytes(initializers=[tensor]))
    assert_array_matches(model.graph.initializers[0].array, values)


@pytest.mark.parametrize("dims", [(), (0,), (3, 0, 2), (1, 1, 1, 1)])
def test_scalar_and_empty_tensors_match_onnx(dims: tuple[int, ...]) -> None:
    values = np.arange(int(np.prod(dims)), dtype=np.float32).reshape(dims)
    for tensor in (numpy_helper.from_array(values, "t"),
                   helper.make_tensor("t", TensorProto.FLOAT, dims, values.ravel().tolist())):
        model = parse_both(model_bytes(initializers=[tensor]))
        assert model.graph.initializers[0].array.shape == dims


@pytest.mark.parametrize(("code", "field", "wire", "fmt"), [
    (TensorProto.FLOAT, 4, 5, "<f4"), (TensorProto.DOUBLE, 10, 1, "<f8"),
    (TensorProto.INT64, 7, 0, None), (TensorProto.INT32, 5, 0, None),
    (TensorProto.INT8, 5, 0, None), (TensorProto.BOOL, 5, 0, None),
])
def test_unpacked_typed_fields_match_onnx(code: int, field: int, wire: int, fmt) -> None:
    # The onnx library always writes these fields packed; proto2 readers must also accept the
    # unpacked form, so write it by hand and let onnx (protobuf) parse the same bytes.
    values = SAMPLES[code].ravel().tolist()
    header = TensorProto(name="u", data_type=code, dims=[len(values)]).SerializeToString()
    body = b"".join(tag(field, wire) + (np.array(value, fmt).tobytes() if fmt else
                                        varint(int(value))) for value in values)
    model = parse_both(tensor_model(header + body))
    assert_array_matches(model.graph.initializers[0].array, SAMPLES[code].ravel())


def test_raw_data_at_odd_offsets_decodes_aligned() -> None:
    # A one-byte name shifts raw_data off any 8-byte boundary inside the file.
    weights = np.arange(12, dtype=np.float64).reshape(3, 4)
    for name in ("a", "bb", "ccc"):
        model = parse_both(model_bytes(initializers=[numpy_helper.from_array(weights, name)]))
        array = model.graph.initializers[0].array
        assert array.flags.aligned and array.flags.c_contiguous


def test_arrays_do_not_follow_later_changes_to_a_mutable_input() -> None:
    data = bytearray(model_bytes(initializers=[numpy_helper.from_array(np.ones(4, np.float32),
                                                                       "w")]))
    model = read_model(data)
    data[:] = bytes(len(data))
    assert model.graph.initializers[0].array.tolist() == [1.0, 1.0, 1.0, 1.0]


# --- attributes, nodes, value infos, functions --------------------------------------------

def full_model() -> onnx.ModelProto:
    constant = numpy_helper.from_array(np.array([[1, -2]], np.int64), "c")
    nodes = [
        helper.make_node("Gemm", ["x", "w", ""], ["h"], name="gemm", alpha=0.25, transB=1),
        helper.make_node("Custom", ["h"], ["y", ""], name="custom", domain="local",
                         f=-1.5, i=-(2**40), s="héllo", t=constant, floats=[0.5, -1.0],
                         ints=[3, -4, 2**62], strings=["a", "", "ü"]),
        helper.make_node("Constant", [], ["k"], value=constant),
    ]
    nodes[1].attribute.append(helper.make_attribute("empty_ints", [],
                                                    attr_type=AttributeProto.INTS))
    graph = helper.make_graph(
        nodes, "main",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", 4]),
         helper.make_tensor_value_info("unknown_rank", TensorProto.DOUBLE, None),
         helper.make_tensor_value_info("scalar", TensorProto.INT64, [])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["batch", None])],
        initializer=[numpy_helper.from_array(np.eye(4, dtype=np.float32), "w")],
        value_info=[helper.make_tensor_value_info("h", TensorProto.FLOAT, [None, 4])],
    )
    body = [helper.make_node("Mul", ["a", "b"], ["m"]),
            helper.make_node("LeakyRelu", ["m"], ["out"])]
    # Inside a function, `alpha` takes the value the calling node gives the function.
    body[1].attribute.append(helper.make_attribute_ref("alpha", AttributeProto.FLOAT))
    function = helper.make_function(
        "local", "Custom", ["a", "b"], ["out"], body,
        [helper.make_opsetid("", 17)], attributes=["alpha"],
        attribute_protos=[helper.make_attribute("beta", 2.0)],
    )
    model = helper.make_model(
        graph, producer_name="tests", producer_version="1.2",
        opset_imports=[helper.make_opsetid("", 17), helper.make_opsetid("local", 1)],
        functions=[function],
    )
    model.ir_version = 9
    return model


def test_full_model_matches_onnx() -> None:
    model = parse_both(full_model().SerializeToString())
    custom = model.graph.nodes[1].attribute_dict()
    assert custom["s"] == "héllo"
    assert custom["empty_ints"] == ()
    assert model.graph.nodes[0].inputs == ("x", "w", "")  # optional-input placeholder kept
    assert model.graph.inputs[1].shape is None
    assert model.graph.inputs[2].shape == ()
    assert model.functions[0].nodes[1].attributes[0] == Attribute("alpha", None, "alpha")
    assert model.opset == 17


@pytest.mark.parametrize("value", [0.0, 7, "text", [1.5, 2.5], [1, 2], ["p", "q"]])
def test_attributes_without_type_are_inferred_like_old_models(value) -> None:
    # IR version < 3 models left AttributeProto.type unset; the value field decides.
    attribute = helper.make_attribute("old", value)
    reference = AttributeProto()
    reference.CopyFrom(attribute)
    attribute.ClearField("type")
    node = helper.make_node("Op", ["x"], ["y"])
    node.attribute.append(attribute)
    ours = read_model(node_model(node)).graph.nodes[0].attributes[0]
    assert_attribute_matches(ours, reference)


# --- real exports --------------------------------------------------------------------------

@pytest.mark.parametrize("dynamo", [False, True], ids=["torchscript", "dynamo"])
def test_torch_exports_match_onnx_load(dynamo: bool) -> None:
    import torch  # imported here so the other tests do not pay for it

    torch.manual_seed(0)
    mlp = torch.nn.Sequential(torch.nn.Linear(3, 32), torch.nn.Tanh(), torch.nn.Linear(32, 32),
                              torch.nn.GELU(), torch.nn.Linear(32, 3)).eval()
    buffer = io.BytesIO()
    with warnings.catch_warnings():
        # The exporters warn about deprecations and missing torchvision; irrelevant here.
        warnings.simplefilter("ignore")
        if dynamo:
            program = torch.onnx.export(mlp, (torch.zeros(2, 3),), dynamo=True)
            data = program.model_proto.SerializeToString()
        else:
            torch.onnx.export(mlp, (torch.zeros(2, 3),), buffer, dynamo=False,
                              input_names=["state"], output_names=["next"],
                              dynamic_axes={"state": {0: "batch"}, "next": {0: "batch"}})
            data = buffer.getvalue()
    model = parse_both(data)
    assert len(model.graph.initializers) >= 6  # three weights and three biases
    assert "Gemm" in {node.op_type for node in model.graph.nodes} or \
        "MatMul" in {node.op_type for node in model.graph.nodes}


# --- performance ---------------------------------------------------------------------------

def best_time(function, repeats: int = 3) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        function()
        times.append(time.perf_counter() - start)
    return min(times)


def test_large_models_parse_in_milliseconds() -> None:
    rng = np.random.default_rng(0)
    one_mb = [numpy_helper.from_array(rng.standard_normal((128, 128), np.float32), f"w{i}")
              for i in range(16)]
    data = model_bytes(initializers=one_mb)
    assert len(data) > 2**20
    # Common practice: a frombuffer-based reader handles 1 MB in well under 50 ms.
    assert best_time(lambda: read_model(data)) < 0.05
    big = model_bytes(initializers=[numpy_helper.from_array(
        rng.standard_normal((2048, 2048), np.float32), f"w{i}") for i in range(2)])
    assert len(big) > 32 * 2**20
    assert best_time(lambda: read_model(big), repeats=2) < 0.5
    typed = model_bytes(initializers=[helper.make_tensor(
        "t", TensorProto.INT64, [250_000], rng.integers(-(2**40), 2**40, 250_000).tolist())])
    assert best_time(lambda: read_model(typed), repeats=2) < 0.5


# --- refused features ----------------------------------------------------------------------

def test_string_and_bfloat16_tensors_are_refused_by_name() -> None:
    strings = helper.make_tensor("names", TensorProto.STRING, [1], [b"a"])
    with pytest.raises(ModelFormatError, match=r"Tensor model > graph 'g' > initializer\[0\] "
                       r"'names' has data type STRING, which is not supported; supported types "
                       r"are FLOAT, UINT8, .*BOOL, FLOAT16, DOUBLE\."):
        read_model(model_bytes(initializers=[strings]))
    bfloat = TensorProto(name="bf", data_type=TensorProto.BFLOAT16, dims=[1], raw_data=b"\0\0")
    with pytest.raises(ModelFormatError, match=r"'bf' has data type BFLOAT16, which is not"):
        read_model(tensor_model(bfloat.SerializeToString()))
    float8 = TensorProto(name="f8", data_type=TensorProto.FLOAT8E4M3FN, dims=[1], raw_data=b"\0")
    with pytest.raises(ModelFormatError, match=r"'f8' has data type FLOAT8E4M3FN"):
        read_model(tensor_model(float8.SerializeToString()))


def test_external_data_is_refused() -> None:
    tensor = numpy_helper.from_array(np.ones(4, np.float32), "w")
    onnx.external_data_helper.set_external_data(tensor, location="weights.bin")
    tensor.data_location = TensorProto.EXTERNAL
    tensor.ClearField("raw_data")
    with pytest.raises(ModelFormatError, match=r"'w' keeps its data in an external file; "
                       r"external data is not supported"):
        read_model(model_bytes(initializers=[tensor]))
    flagged = TensorProto(name="v", data_type=1, dims=[0], data_location=TensorProto.EXTERNAL)
    with pytest.raises(ModelFormatError, match=r"'v' keeps its data in an external file"):
        read_model(tensor_model(flagged.SerializeToString()))


def test_segments_are_refused() -> None:
    tensor = numpy_helper.from_array(np.ones(4, np.float32), "w")
    tensor.segment.begin, tensor.segment.end = 0, 4
    with pytest.raises(ModelFormatError, match=r"'w' is a segment of a larger tensor"):
        read_model(model_bytes(initializers=[tensor]))


def test_sparse_initializers_are_refused() -> None:
    sparse = helper.make_sparse_tensor(
        numpy_helper.from_array(np.ones(1, np.float32), "s"),
        numpy_helper.from_array(np.zeros(1, np.int64), "i"), [4])
    graph = helper.make_graph([], "g", [], [], sparse_initializer=[sparse])
    with pytest.raises(ModelFormatError, match=r"model > graph 'g' has 1 sparse initializer\(s\);"
                       r" sparse tensors are not supported"):
        read_model(helper.make_model(graph).SerializeToString())


def test_subgraph_attributes_are_refused() -> None:
    branch = helper.make_graph([], "branch", [], [])
    node = helper.make_node("If", ["cond"], ["y"], name="choose", then_branch=branch,
                            else_branch=branch)
    with pytest.raises(ModelFormatError, match=r"Attribute model > graph 'g' > node\[0\] 'choose' "
                       r"\(op_type If\) > attribute\[0\] 'else_branch' holds a subgraph \(GRAPH\); "
                       r"subgraphs are not supported"):
        read_model(node_model(node))
    node = helper.make_node("Loop", [], [], bodies=[branch])
    with pytest.raises(ModelFormatError, match=r"'bodies' holds a subgraph \(GRAPHS\)"):
        read_model(node_model(node))


def test_other_attribute_types_are_refused_by_name() -> None:
    node = helper.make_node("Op", [], [], tensors=[numpy_helper.from_array(np.ones(1), "t")])
    with pytest.raises(ModelFormatError, match=r"'tensors' has type TENSORS, which is not "
                       r"supported; supported types are FLOAT, INT, STRING, TENSOR, FLOATS, INTS "
                       r"and STRINGS\."):
        read_model(node_model(node))
    sparse = helper.make_sparse_tensor(numpy_helper.from_array(np.ones(1, np.float32), "v"),
                                       numpy_helper.from_array(np.zeros(1, np.int64), "i"), [2])
    node = helper.make_node("Op", [], [], sparse=sparse,
                            kind=helper.make_tensor_type_proto(TensorProto.FLOAT, [1]))
    with pytest.raises(ModelFormatError, match=r"'kind' has type TYPE_PROTO, which is not"):
        read_model(node_model(node))
    node.attribute.pop(0)
    with pytest.raises(ModelFormatError, match=r"'sparse' has type SPARSE_TENSOR, which is not"):
        read_model(node_model(node))
    # The generated classes refuse unknown enum values, so write type code 99 by hand.
    node_bytes = helper.make_node("Op", [], []).SerializeToString() + length_delimited(
        5, AttributeProto(name="odd", i=1).SerializeToString() + tag(20, 0) + varint(99))
    with pytest.raises(ModelFormatError, match=r"'odd' has unknown type code 99"):
        read_model(model_bytes(length_delimited(1, node_bytes)))


def test_sequence_typed_values_are_refused() -> None:
    sequence = helper.make_tensor_sequence_value_info("seq", TensorProto.FLOAT, [2])
    graph = helper.make_graph([], "g", [sequence], [])
    with pytest.raises(ModelFormatError, match=r"Value model > graph 'g' > input\[0\] 'seq' has a "
                       r"sequence type; only tensor types are supported\."):
        read_model(helper.make_model(graph).SerializeToString())


def test_function_overloads_are_refused() -> None:
    node = helper.make_node("Custom", [], [], domain="local", overload="v2")
    with pytest.raises(ModelFormatError, match=r"calls function overload 'v2'; function overloads "
                       r"are not supported"):
        read_model(node_model(node))


# --- malformed models ----------------------------------------------------------------------

def test_missing_graph_and_empty_input_are_refused() -> None:
    with pytest.raises(ModelFormatError, match=r"model \(ModelProto\) has no graph; an ONNX model "
                       r"must contain one\."):
        read_model(b"")
    with pytest.raises(ModelFormatError, match=r"`data` of 'model' must be bytes, got str\."):
        read_model("not bytes")  # type: ignore[arg-type]


def test_raw_data_length_must_match_dims() -> None:
    tensor = TensorProto(name="w", data_type=TensorProto.FLOAT, dims=[2, 2], raw_data=b"\0" * 12)
    with pytest.raises(ModelFormatError, match=r"'w' has 12 bytes of raw_data but its 4 FLOAT "
                       r"elements need 16 bytes\."):
        read_model(tensor_model(tensor.SerializeToString()))


def test_typed_data_count_must_match_dims() -> None:
    tensor = TensorProto(name="w", data_type=TensorProto.INT64, dims=[3], int64_data=[1, 2])
    with pytest.raises(ModelFormatError, match=r"'w' has 2 values in int64_data but its dims "
                       r"need 3\."):
        read_model(model_bytes(initializers=[tensor]))


def test_typed_data_in_the_wrong_field_is_refused() -> None:
    tensor = TensorProto(name="w", data_type=TensorProto.FLOAT, dims=[1], int64_data=[1])
    with pytest.raises(ModelFormatError, match=r"'w' of type FLOAT stores values in int64_data; "
                       r"it must use raw_data or float_data\."):
        read_model(tensor_model(tensor.SerializeToString()))
    tensor = TensorProto(name="w", data_type=TensorProto.FLOAT, dims=[1], float_data=[1],
                         raw_data=b"\0" * 4)
    with pytest.raises(ModelFormatError, match=r"'w' sets both raw_data and float_data"):
        read_model(tensor_model(tensor.SerializeToString()))


def test_negative_dims_are_refused() -> None:
    tensor = TensorProto(name="w", data_type=TensorProto.FLOAT, dims=[-1, 2])
    with pytest.raises(ModelFormatError, match=r"'w' has dims \(-1, 2\); dims must be "
                       r"non-negative\."):
        read_model(tensor_model(tensor.SerializeToString()))


def test_element_count_over_the_cap_is_refused_before_allocation() -> None:
    tensor = numpy_helper.from_array(np.zeros((4, 4), np.float32), "w")
    with pytest.raises(ModelFormatError, match=r"'w' with dims \(4, 4\) holds 16 elements; the "
                       r"limit `max_tensor_elements` is 10\."):
        read_model(model_bytes(initializers=[tensor]), limits=Limits(max_tensor_elements=10))
    # Dims claiming 2^62 elements carry no data; the count is refused, nothing is allocated.
    huge = TensorProto(name="h", data_type=TensorProto.FLOAT, dims=[2**31, 2**31])
    with pytest.raises(ModelFormatError, match=r"holds 4611686018427387904 elements"):
        read_model(tensor_model(huge.SerializeToString()))
    node = helper.make_node("Op", [], [], many=list(range(11)))
    with pytest.raises(ModelFormatError, match=r"'many' holds 11 elements; the limit"):
        read_model(node_model(node), limits=Limits(max_tensor_elements=10))


def test_too_many_dims_and_nodes_are_refused() -> None:
    tensor = TensorProto(name="w", data_type=TensorProto.FLOAT, dims=[1] * 33, float_data=[1])
    with pytest.raises(ModelFormatError, match=r"'w' has 33 dimensions; at most 32 are supported"):
        read_model(tensor_model(tensor.SerializeToString()))
    nodes = [helper.make_node("Relu", ["x"], ["x"]) for _ in range(3)]
    with pytest.raises(ModelFormatError, match=r"Field node \(1\) of model > graph "
                       r"\(GraphProto\) occurs more than 2 times; repeated fields are limited "
                       r"by `max_graph_nodes`, which is 2\."):
        read_model(model_bytes(nodes=nodes), limits=Limits(max_graph_nodes=2))


def test_invalid_utf8_attribute_string_is_refused() -> None:
    node = helper.make_node("Op", [], [], name="n")
    node.attribute.append(AttributeProto(name="mode", type=AttributeProto.STRING, s=b"\xff"))
    with pytest.raises(ModelFormatError, match=r"Attribute model > graph 'g' > node\[0\] 'n' "
                       r"\(op_type Op\) > attribute\[0\] 'mode' holds a string that is not valid "
                       r"UTF-8"):
        read_model(node_model(node))


def test_ambiguous_and_empty_untyped_attributes_are_refused() -> None:
    node = helper.make_node("Op", [], [])
    node.attribute.append(AttributeProto(name="both", f=1.0, i=2))
    with pytest.raises(ModelFormatError, match=r"'both' has no type and sets several value fields "
                       r"\(f, i\)"):
        read_model(node_model(node))
    node = helper.make_node("Op", [], [])
    node.attribute.append(AttributeProto(name="none"))
    with pytest.raises(ModelFormatError, match=r"'none' has neither a type nor a value"):
        read_model(node_model(node))


def test_nodes_need_an_op_type_and_unique_attributes() -> None:
    with pytest.raises(ModelFormatError, match=r"node\[0\] 'n' \(NodeProto\) has no op_type"):
        read_model(node_model(onnx.NodeProto(name="n")))
    node = helper.make_node("Op", [], [], alpha=1.0)
    node.attribute.append(helper.make_attribute("alpha", 2.0))
    with pytest.raises(ModelFormatError, match=r"sets attribute 'alpha' twice"):
        read_model(node_model(node))


def test_nesting_past_the_depth_limit_is_refused() -> None:
    # model (1) > graph (2) > node (3) > attribute (4)
    data = node_model(helper.make_node("Op", [], [], alpha=1.0))
    read_model(data, limits=Limits(max_protobuf_depth=4))
    with pytest.raises(ModelFormatError, match=r"model > graph 'g' > node\[0\] \(op_type Op\) > "
                       r"attribute\[0\] \(AttributeProto\) is nested 4 messages deep; the limit "
                       r"`max_protobuf_depth` is 3\."):
        read_model(data, limits=Limits(max_protobuf_depth=3))


def test_nesting_through_an_unknown_field_counts() -> None:
    data = model_bytes(length_delimited(999, b""))
    read_model(data, limits=Limits(max_protobuf_depth=3))
    with pytest.raises(ModelFormatError, match=r"Unknown field 999 of model > graph "
                       r"\(GraphProto\) sits 3 messages deep; the limit `max_protobuf_depth` "
                       r"is 2\."):
        read_model(data, limits=Limits(max_protobuf_depth=2))


def test_wire_faults_name_the_message() -> None:
    with pytest.raises(ModelFormatError, match=r"Malformed protobuf in model > graph "
                       r"\(GraphProto\): varint at byte \d+ is longer than 10 bytes"):
        read_model(model_bytes(tag(999, 0) + b"\x80" * 10 + b"\x01"))
    with pytest.raises(ModelFormatError, match=r"Malformed protobuf in model \(ModelProto\): "
                       r"field 9 declares 4611686018427387904 bytes"):
        read_model(model_bytes() + tag(9, 2) + varint(2**62))
    with pytest.raises(ModelFormatError, match=r"field 99 uses wire type 3 \(group start\)"):
        read_model(model_bytes(tag(99, 3)))
    with pytest.raises(ModelFormatError, match=r"field number 536870912 is outside"):
        read_model(tag(2**29, 0) + b"\x00" + model_bytes())


def test_models_over_the_size_limit_are_refused() -> None:
    data = model_bytes()
    with pytest.raises(ModelFormatError, match=rf"holds {len(data)} bytes; the limit"):
        read_model(data, limits=Limits(max_model_bytes=len(data) - 1))
    assert read_model(data, limits=Limits(max_model_bytes=len(data))).graph.name == "g"


# --- robustness ----------------------------------------------------------------------------


def test_every_truncation_raises_only_model_format_error() -> None:
    for length in range(len(SMALL)):
        prefix = SMALL[:length]
        try:
            reference = onnx.ModelProto.FromString(prefix)
        except DecodeError:
            reference = None
        try:
            model = read_model(prefix)
        except ModelFormatError:
            continue
        # A cut between two top-level fields is a valid (smaller) message; then we must agree
        # with protobuf's reading of it.
        assert reference is not None, length
        assert_model_matches(model, reference)


EDITS = st.lists(st.tuples(st.sampled_from(["flip", "insert", "delete", "huge"]),
                           st.integers(min_value=0, max_value=len(SMALL)),
                           st.binary(min_size=1, max_size=4)), min_size=1, max_size=4)


@given(EDITS)
@settings(max_examples=400, deadline=timedelta(milliseconds=500), database=None,
          suppress_health_check=[HealthCheck.too_slow])
def test_random_mutations_raise_only_model_format_error(edits) -> None:
    try:
        model = read_model(mutate(SMALL, edits))
    except ModelFormatError:
        return
    for tensor in model.graph.initializers:
        assert not tensor.array.flags.writeable
