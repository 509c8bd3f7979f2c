"""`runtime/onnx_model.py`: the element-type table and the small records the reader fills.

Expected values: the `onnx` package (`onnx.TensorProto` data type codes and names,
`onnx.helper.tensor_dtype_to_np_dtype`), which is generated from onnx.proto; the ONNX IR
specification (docs/IR.md, "Operator Sets": the empty domain and "ai.onnx" both name the
default operator set).
"""

from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper

from stridecast.runtime import onnx_model
from stridecast.runtime.onnx_model import DTYPE_NAMES, NUMPY_DTYPES, Attribute, Graph, Model, Node
from stridecast.runtime.onnx_reader import read_model


@pytest.mark.parametrize("name", ["FLOAT", "UINT8", "INT8", "UINT16", "INT16", "INT32", "INT64",
                                  "STRING", "BOOL", "FLOAT16", "DOUBLE"])
def test_type_codes_are_onnx_s(name):
    assert getattr(onnx_model, name) == getattr(TensorProto, name)


@pytest.mark.parametrize("code", sorted(DTYPE_NAMES))
def test_type_names_are_onnx_s(code):
    assert DTYPE_NAMES[code] == TensorProto.DataType.Name(code)


@pytest.mark.parametrize("code", sorted(NUMPY_DTYPES))
def test_numpy_dtypes_are_onnx_s(code):
    expected = np.dtype(helper.tensor_dtype_to_np_dtype(code))
    assert NUMPY_DTYPES[code] == expected
    # Tensors are stored little-endian (onnx.proto, TensorProto: "stored in little-endian").
    assert NUMPY_DTYPES[code].str[0] in "<|"


def _graph() -> Graph:
    return Graph(name="g", nodes=(), initializers=(), inputs=(), outputs=())


@pytest.mark.parametrize(("imports", "opset"), [
    ({"": 17}, 17), ({"ai.onnx": 13}, 13), ({"": 18, "com.microsoft": 1}, 18),
    ({"com.microsoft": 1}, 0), ({}, 0),
])
def test_opset_is_the_default_domain_s(imports, opset):
    assert Model(ir_version=8, opset_imports=imports, graph=_graph()).opset == opset


@pytest.mark.parametrize("domain", ["", "ai.onnx"])
def test_opset_of_a_model_made_by_onnx(domain):
    graph = helper.make_graph([helper.make_node("Relu", ["x"], ["y"])], "g",
                              [helper.make_tensor_value_info("x", TensorProto.FLOAT, [2])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [2])])
    made = helper.make_model(graph, opset_imports=[helper.make_opsetid(domain, 15)])
    onnx.checker.check_model(made)
    assert read_model(made.SerializeToString()).opset == 15


def test_node_attribute_dict_and_description():
    node = Node(op_type="Gemm", inputs=("a", "b"), outputs=("y",), name="fc1",
                attributes=(Attribute("alpha", 0.5), Attribute("transB", 1)))
    assert node.attribute_dict() == {"alpha": 0.5, "transB": 1}
    assert node.describe() == "node 'fc1' (op_type 'Gemm')"
    assert Node(op_type="Relu", inputs=("x",), outputs=("y",)).describe() == \
        "node (op_type 'Relu')"


def test_attribute_values_match_onnx_s_decoding():
    made = helper.make_node("Gemm", ["a", "b"], ["y"], alpha=0.25, transB=1)
    graph = helper.make_graph([made], "g",
                              [helper.make_tensor_value_info("a", TensorProto.FLOAT, [1, 2]),
                               helper.make_tensor_value_info("b", TensorProto.FLOAT, [3, 2])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 3])])
    model = read_model(helper.make_model(graph).SerializeToString())
    expected = {attribute.name: helper.get_attribute_value(attribute)
                for attribute in made.attribute}
    assert model.graph.nodes[0].attribute_dict() == expected
