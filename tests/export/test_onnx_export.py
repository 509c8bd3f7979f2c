"""normalise_model: local functions inlined, contract names, shape and type checks."""

from __future__ import annotations

import numpy as np
import onnx
import onnxruntime
import pytest
from onnx import TensorProto, helper, numpy_helper

from stridecast.export.onnx_export import normalise_model
from stridecast.runtime import BundleError


def model_with_function(*, batch="batch", elem=TensorProto.FLOAT, rank=2) -> onnx.ModelProto:
    """x ↦ Tanh(x · W) where Tanh sits inside a model-local function `local.Act`."""
    function = helper.make_function(
        "local", "Act", ["a"], ["b"], [helper.make_node("Tanh", ["a"], ["b"])],
        [helper.make_opsetid("", 18)])
    weight = numpy_helper.from_array(np.array([[0.5, -1.0], [2.0, 0.25]], np.float32), "W")
    shape = [batch, 2] if rank == 2 else [batch, 2, 1]
    graph = helper.make_graph(
        [helper.make_node("MatMul", ["input_0", "W"], ["h"]),
         helper.make_node("Act", ["h"], ["out_0"], domain="local")],
        "level", [helper.make_tensor_value_info("input_0", elem, shape)],
        [helper.make_tensor_value_info("out_0", elem, shape)], initializer=[weight])
    return helper.make_model(graph, functions=[function], opset_imports=[
        helper.make_opsetid("", 18), helper.make_opsetid("local", 1)])


def test_inlines_functions_and_names_contract():
    model = normalise_model(model_with_function(), where="level stride 1", state_dim=2)
    assert len(model.functions) == 0
    assert [entry.domain for entry in model.opset_import] == [""]
    assert [node.op_type for node in model.graph.node] == ["MatMul", "Tanh"]
    assert model.graph.input[0].name == "state" and model.graph.output[0].name == "next"
    states = np.array([[1.0, 2.0], [-0.5, 0.3], [0.0, 1.0]], np.float32)
    session = onnxruntime.InferenceSession(model.SerializeToString(),
                                           providers=["CPUExecutionProvider"])
    # Expected: tanh(x W) computed by NumPy (the function's definition).
    expected = np.tanh(states @ np.array([[0.5, -1.0], [2.0, 0.25]], np.float32))
    np.testing.assert_allclose(session.run(None, {"state": states})[0], expected, rtol=1e-6)


@pytest.mark.parametrize(("change", "message"), [
    ({"batch": 4}, r"level stride 1: graph value 'state' has a fixed batch size 4; the batch "
                   r"axis must be dynamic\."),
    ({"elem": TensorProto.DOUBLE}, r"graph value 'state' has element type DOUBLE; expected "
                                   r"FLOAT\."),
    ({"rank": 3}, r"graph value 'state' has rank 3; expected 2\."),
])
def test_refuses_contract_violations(change, message):
    with pytest.raises(BundleError, match=message):
        normalise_model(model_with_function(**change), where="level stride 1", state_dim=2)


def test_refuses_wrong_width():
    with pytest.raises(BundleError, match=r"graph value 'state' has 2 components; expected 3\."):
        normalise_model(model_with_function(), where="level stride 1", state_dim=3)
