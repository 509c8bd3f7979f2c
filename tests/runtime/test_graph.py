"""The generic interpreter (graph.py) on whole graphs, against onnx's ReferenceEvaluator."""

from __future__ import annotations

import numpy as np
import pytest
from onnx import TensorProto, helper
from onnx.reference import ReferenceEvaluator

from stridecast.runtime.errors import ModelFormatError
from stridecast.runtime.graph import build_program, run_graph
from stridecast.runtime.onnx_reader import read_model


def _model(nodes, inputs, outputs, initializers=(), opset=18):
    graph = helper.make_graph(nodes, "g", inputs, outputs, list(initializers))
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])


def _float(name, shape):
    return helper.make_tensor_value_info(name, TensorProto.FLOAT, shape)


def test_run_graph_runs_several_inputs_and_outputs_like_the_reference_evaluator():
    model = _model(
        [helper.make_node("Add", ["a", "b"], ["sum"]),
         helper.make_node("Size", ["sum"], ["count"]),
         helper.make_node("CastLike", ["count", "a"], ["count_f"]),
         helper.make_node("Div", ["sum", "count_f"], ["mean_part"])],
        [_float("a", [2, 3]), _float("b", [2, 3])],
        [_float("mean_part", [2, 3]), helper.make_tensor_value_info("count", TensorProto.INT64,
                                                                   [])],
    )
    rng = np.random.default_rng(0)
    feeds = {"a": rng.normal(size=(2, 3)).astype(np.float32),
             "b": rng.normal(size=(2, 3)).astype(np.float32)}
    ours = run_graph(read_model(model.SerializeToString()), feeds)
    # Reference: onnx's ReferenceEvaluator on the same model.
    theirs = ReferenceEvaluator(model).run(None, feeds)
    assert list(ours) == ["mean_part", "count"]
    np.testing.assert_allclose(ours["mean_part"], theirs[0], rtol=1e-6)
    assert ours["count"].dtype == np.int64 and int(ours["count"]) == 6


def test_run_graph_names_missing_feeds():
    model = _model([helper.make_node("Add", ["a", "b"], ["c"])],
                   [_float("a", [1]), _float("b", [1])], [_float("c", [1])])
    with pytest.raises(ModelFormatError, match=r"`feeds` lacks the graph inputs \['b'\]"):
        run_graph(read_model(model.SerializeToString()), {"a": np.ones(1, np.float32)})


@pytest.mark.parametrize("compute", [np.float32, np.float64])
def test_float16_casts_and_constants_follow_the_compute_precision(compute):
    # Policy (runtime/ops/tensors.py): a Cast to float16 and a float16 constant are bound in
    # the compute precision, so 1 + 2⁻¹³ survives (float16 would round it to 1: its spacing
    # at 1 is 2⁻¹⁰, IEEE 754 binary16).
    tiny = np.array(2.0 ** -13, np.float16)
    model = _model(
        [helper.make_node("Cast", ["x"], ["x16"], to=TensorProto.FLOAT16),
         helper.make_node("Constant", [], ["c"],
                          value=helper.make_tensor("c", TensorProto.FLOAT16, [], [tiny])),
         helper.make_node("CastLike", ["c", "x"], ["c_like"]),
         helper.make_node("Add", ["x16", "c_like"], ["y"])],
        [_float("x", [1])], [_float("y", [1])],
    )
    program = build_program(read_model(model.SerializeToString()), input_name="x",
                            output_name="y", dtype=compute)
    result = program.run(np.ones(1, compute))
    assert result.dtype == compute
    assert result[0] == 1 + 2.0 ** -13


def test_value_float_constants_follow_the_compute_precision():
    model = _model(
        [helper.make_node("Constant", [], ["c"], value_float=0.1),
         helper.make_node("Mul", ["x", "c"], ["y"])],
        [helper.make_tensor_value_info("x", TensorProto.DOUBLE, [1])],
        [helper.make_tensor_value_info("y", TensorProto.DOUBLE, [1])],
    )
    program = build_program(read_model(model.SerializeToString()), input_name="x",
                            output_name="y", dtype="float64")
    result = program.run(np.ones(1))
    # ONNX stores value_float as float32: the constant is float32(0.1), widened exactly.
    assert result.dtype == np.float64 and result[0] == float(np.float32(0.1))
