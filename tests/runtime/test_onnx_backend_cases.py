"""The ONNX backend node test cases, run through the runtime's reader and interpreter.

Source of truth: the node test cases that ship with the `onnx` package, the conformance suite
every ONNX backend is held to. Each case is one model (usually one node) with input and
expected output tensors. Released wheels store them as files under
``onnx/backend/test/data/node/<case>/`` (``model.onnx``, ``test_data_set_*/input_*.pb`` and
``output_*.pb``); where an installation lacks those files, the same cases are regenerated in
memory from ``onnx.backend.test.case.node``, the code those files are written from.

Every case whose operators (including those inside its local functions) the registry covers
runs; a case is skipped only for a feature the runtime does not implement, named in the
reason. The tolerance is the case's own (rtol 1e-3, atol 1e-7 for node cases, as onnx's
backend runner uses).
"""

from __future__ import annotations

import functools
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import numpy_helper

from stridecast.runtime.errors import StridecastError
from stridecast.runtime.graph import run_graph
from stridecast.runtime.onnx_model import NUMPY_DTYPES
from stridecast.runtime.onnx_reader import read_model
from stridecast.runtime.ops import supported_operators

NODE_DATA = Path(onnx.__file__).parent / "backend" / "test" / "data" / "node"

# The runtime holds these element types only (onnx_model.NUMPY_DTYPES).
HELD = set(NUMPY_DTYPES.values())

# Cases that use a feature the runtime does not implement, with the feature. Everything not
# listed here must match the expected outputs.
_TRAINING = ("training mode (random dropout masks, batch statistics): the runtime runs "
             "inference only")
UNSUPPORTED: dict[str, str] = {
    "test_training_dropout": _TRAINING,
    "test_training_dropout_default": _TRAINING,
    "test_training_dropout_mask": _TRAINING,
    "test_training_dropout_default_mask": _TRAINING,
    "test_batchnorm_example_training_mode": _TRAINING,
    "test_batchnorm_epsilon_training_mode": _TRAINING,
}


@dataclass(frozen=True)
class NodeCase:
    name: str
    model: bytes
    inputs: tuple[np.ndarray, ...]
    outputs: tuple[np.ndarray, ...]
    rtol: float = 1e-3
    atol: float = 1e-7


def _operators(model: onnx.ModelProto) -> set[tuple[str, str]]:
    local = {(function.domain, function.name) for function in model.functions}
    used = {(node.domain, node.op_type) for node in model.graph.node}
    for function in model.functions:
        used |= {(node.domain, node.op_type) for node in function.node}
    return used - local


def _covered(model: onnx.ModelProto) -> bool:
    known = supported_operators()
    return all(domain in ("", "ai.onnx") and op_type in known
               for domain, op_type in _operators(model))


def _array(value) -> np.ndarray | None:
    if isinstance(value, onnx.TensorProto):
        try:
            return numpy_helper.to_array(value)
        except Exception:  # types NumPy cannot hold (float8, int4): no array for the case
            return None
    return np.asarray(value) if isinstance(value, np.ndarray | np.generic) else None


def _from_files() -> list[NodeCase]:
    cases = []
    for folder in sorted(NODE_DATA.iterdir()):
        model_path = folder / "model.onnx"
        if not model_path.is_file():
            continue
        data = model_path.read_bytes()
        model = onnx.load_from_string(data)
        if not _covered(model):
            continue
        for data_set in sorted(folder.glob("test_data_set_*")):
            def tensors(kind, data_set=data_set):
                paths = sorted(data_set.glob(f"{kind}_*.pb"),
                               key=lambda path: int(path.stem.split("_")[-1]))
                return tuple(_array(onnx.load_tensor(str(path))) for path in paths)

            cases.append(NodeCase(f"{folder.name}/{data_set.name}", data,
                                  tensors("input"), tensors("output")))
    return cases


def _generated() -> list[NodeCase]:
    from onnx.backend.test.case import node

    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        generated = node.collect_testcases(None)
    cases = []
    for case in generated:
        if not _covered(case.model):
            continue
        data = case.model.SerializeToString()
        for index, (inputs, outputs) in enumerate(case.data_sets):
            cases.append(NodeCase(f"{case.name}/{index}", data,
                                  tuple(_array(x) for x in inputs),
                                  tuple(_array(x) for x in outputs), case.rtol, case.atol))
    return cases


@functools.cache
def node_cases() -> tuple[NodeCase, ...]:
    return tuple(_from_files() if NODE_DATA.is_dir() else _generated())


def _unsupported_feature(case: NodeCase) -> str | None:
    """Why the runtime cannot run `case`, or None if it should."""
    base = case.name.split("/")[0]
    if base in UNSUPPORTED:
        return UNSUPPORTED[base]
    arrays = case.inputs + case.outputs
    if any(array is None for array in arrays):
        return "an element type NumPy cannot hold (8-bit floats, 4-bit integers…)"
    foreign = sorted({str(array.dtype) for array in arrays if array.dtype not in HELD})
    if foreign:
        return f"element types the runtime does not hold: {', '.join(foreign)}"
    floats = {array.dtype for array in arrays if array.dtype.kind == "f"}
    if np.dtype(np.float16) in floats:
        return ("float16 tensors: the runtime computes every floating tensor in one precision, "
                "float32 or float64 (the compute-precision policy in runtime/ops/tensors.py)")
    if len(floats) > 1:
        return (f"floating tensors of several precisions {sorted(map(str, floats))}: the runtime "
                "computes every floating tensor in one precision")
    return None


def _ids() -> list[str]:
    return [case.name for case in node_cases()]


def test_the_node_cases_were_found():
    # A guard: if the cases cannot be found, the test below would silently check nothing.
    assert len(node_cases()) > 500


@pytest.mark.parametrize("case", node_cases(), ids=_ids())
def test_node_case_matches_the_expected_outputs(case: NodeCase) -> None:
    reason = _unsupported_feature(case)
    if reason:
        pytest.skip(reason)
    model = read_model(case.model, source=case.name)
    floats = {array.dtype for array in case.inputs + case.outputs if array.dtype.kind == "f"}
    dtype = floats.pop() if floats else np.dtype(np.float32)
    names = [info.name for info in model.graph.inputs
             if info.name not in {tensor.name for tensor in model.graph.initializers}]
    feeds = dict(zip(names, case.inputs, strict=False))
    try:
        with np.errstate(all="ignore"):
            results = run_graph(model, feeds, dtype=dtype)
    except StridecastError as error:
        pytest.fail(f"{case.name}: {error}")
    assert len(results) == len(case.outputs)
    for (name, mine), expected in zip(results.items(), case.outputs, strict=True):
        label = f"{case.name}: output {name!r}"
        assert mine.shape == expected.shape, label
        assert mine.dtype == expected.dtype, label
        if expected.dtype.kind == "f":
            np.testing.assert_allclose(mine, expected, rtol=case.rtol, atol=case.atol,
                                       equal_nan=True, err_msg=label)
        else:
            np.testing.assert_array_equal(mine, expected, err_msg=label)
