"""The operator registry, the calling convention, and the harness the test_ops_* files share.

Each operator case is one single-node ONNX model built with `onnx.helper`; our registered
function, onnxruntime (CPUExecutionProvider) and onnx's ReferenceEvaluator all run it on the
same inputs, and our outputs must match both references within the case's tolerance class.
"""

from __future__ import annotations

import inspect
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import onnx
import onnx.defs
import onnxruntime
import pytest
from onnx import helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from stridecast.runtime.errors import UnsupportedOperatorError
from stridecast.runtime.ops import register, resolve, supported_operators

FLOATS = (np.float32, np.float64)

# (rtol, atol) per tolerance class and float dtype; integer and bool outputs are always exact.
# The worst differences measured over all cases (onnxruntime 1.32 and onnx 1.23 on x86-64)
# are quoted; the bounds leave a margin of about ten for other CPUs' kernels.
TOLERANCES: dict[str, dict[type, tuple[float, float]]] = {
    # No arithmetic (shape ops, selection, comparison, casts): bit-identical results.
    "exact": {np.float32: (0.0, 0.0), np.float64: (0.0, 0.0)},
    # A few correctly rounded IEEE operations (+ − × ÷ √): implementations may order or fuse
    # them differently (x·a + b versus fma), which moves the result by a few ulp; results that
    # cancel to near zero keep the absolute error of their unit-scale operands, hence atol.
    # Measured: 4.8e-7 (float32), 7.7e-16 (float64), both in BatchNormalization.
    "rounded": {np.float32: (1e-6, 1e-6), np.float64: (2e-15, 2e-15)},
    # Library transcendentals (exp, log, tanh, erf …): onnxruntime's vectorised float32
    # kernels (MLAS) approximate them to a few ulp and some ops use other formulas (1 + tanh
    # where we use a sigmoid form). Measured: 2.0e-7 (float32), 5.4e-16 (float64), in Mish.
    "transcendental": {np.float32: (2e-6, 5e-7), np.float64: (1e-14, 1e-15)},
    # Sums and dot products: blocked BLAS and pairwise summation round differently, by about
    # √n·eps·Σ|terms| for n ≤ 60 unit-scale terms here. Measured: 1.4e-7 (float32, in
    # LayerNormalization), 8.3e-16 (float64, in ReduceSum).
    "accumulate": {np.float32: (2e-6, 2e-6), np.float64: (1e-14, 1e-14)},
}


@dataclass(frozen=True)
class Case:
    """One single-node model to run three ways; `None` inputs are omitted optional inputs."""

    op_type: str
    opset: int
    inputs: tuple[np.ndarray | None, ...] = ()
    attributes: Mapping[str, Any] = field(default_factory=dict)
    outputs: int = 1
    tolerance: str = "exact"
    # False where onnxruntime has no kernel for this op, opset or dtype; the case then names
    # why in a comment and is compared with the ReferenceEvaluator only.
    onnxruntime: bool = True
    # False where the ReferenceEvaluator deviates from the spec; the comment says how.
    reference: bool = True
    note: str = ""

    def __post_init__(self) -> None:
        # 0-d inputs built with NumPy arithmetic come out as NumPy scalars; make them arrays.
        arrays = tuple(None if x is None else np.asarray(x) for x in self.inputs)
        object.__setattr__(self, "inputs", arrays)

    def __str__(self) -> str:
        dtypes = sorted({str(x.dtype) for x in self.inputs if x is not None})
        return "-".join(
            part for part in (self.op_type, f"opset{self.opset}", *dtypes, self.note) if part
        )


def ids(cases: list[Case]) -> list[str]:
    return [str(case) for case in cases]


def check_against_references(case: Case) -> None:
    """Run `case` with our op, onnxruntime and the ReferenceEvaluator; compare every output."""
    model, feeds = single_node_model(case)
    ours = run_ours(case, model.graph.node[0])
    expected: dict[str, list[np.ndarray]] = {}
    if case.onnxruntime:
        options = onnxruntime.SessionOptions()
        options.log_severity_level = 3  # no warnings about graph optimisers skipping old opsets
        session = onnxruntime.InferenceSession(
            model.SerializeToString(), options, providers=["CPUExecutionProvider"]
        )
        expected["onnxruntime"] = session.run(None, feeds)
    if case.reference:
        # Its Cast warns where the spec defines the result (float overflow to ±inf).
        with np.errstate(over="ignore"):
            expected["ReferenceEvaluator"] = ReferenceEvaluator(model).run(None, feeds)
    assert expected, f"{case} has no reference to compare with"
    for source, outputs in expected.items():
        assert len(outputs) == case.outputs
        for index, (mine, theirs) in enumerate(zip(ours, outputs, strict=True)):
            label = f"{case}: output {index} against {source}"
            assert mine.shape == theirs.shape, label
            # Types are checked against onnxruntime where it runs: the ReferenceEvaluator
            # returns LayerNormalization's Mean and InvStdDev in X's type, not the spec's float.
            if source == next(iter(expected)):
                assert mine.dtype == theirs.dtype, label
            assert_close(mine, theirs, case.tolerance, label)


def assert_close(mine: np.ndarray, theirs: np.ndarray, tolerance: str, label: str) -> None:
    if mine.dtype.kind != "f":
        np.testing.assert_array_equal(mine, theirs, err_msg=label)
        return
    # float16 results (from Cast only) are held to the float32 bounds.
    bounds = TOLERANCES[tolerance]
    rtol, atol = bounds.get(mine.dtype.type, bounds[np.float32])
    np.testing.assert_allclose(mine, theirs.astype(mine.dtype), rtol=rtol, atol=atol,
                               equal_nan=True, err_msg=label)


def single_node_model(case: Case) -> tuple[onnx.ModelProto, dict[str, np.ndarray]]:
    names = ["" if x is None else f"input{i}" for i, x in enumerate(case.inputs)]
    while names and not names[-1]:
        names.pop()
    feeds = {name: x for name, x in zip(names, case.inputs, strict=False) if name}
    attributes = {
        name: numpy_helper.from_array(value) if isinstance(value, np.ndarray) else value
        for name, value in case.attributes.items()
    }
    node = helper.make_node(case.op_type, names, [f"output{i}" for i in range(case.outputs)],
                            **attributes)
    graph = helper.make_graph(
        [node], "single_node",
        [helper.make_tensor_value_info(name, helper.np_dtype_to_tensor_dtype(x.dtype), x.shape)
         for name, x in feeds.items()],
        [helper.make_empty_tensor_value_info(f"output{i}") for i in range(case.outputs)],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", case.opset)])
    return model, feeds


def run_ours(case: Case, node: onnx.NodeProto) -> list[np.ndarray]:
    """Call our op as the interpreter will: read-only inputs, attributes decoded as stored."""
    inputs = [None if x is None else read_only(x) for x in case.inputs]
    result = resolve(case.op_type, case.opset)(*inputs, **decoded_attributes(node))
    results = result if isinstance(result, tuple) else (result,)
    assert all(isinstance(r, np.ndarray) for r in results), [type(r) for r in results]
    return list(results[: case.outputs])


def decoded_attributes(node: onnx.NodeProto) -> dict[str, Any]:
    """Attributes as the runtime's reader delivers them (floats rounded to float32 as stored)."""
    decoded: dict[str, Any] = {}
    for attribute in node.attribute:
        value = helper.get_attribute_value(attribute)
        if isinstance(value, onnx.TensorProto):
            value = numpy_helper.to_array(value)
        elif isinstance(value, bytes):
            value = value.decode()
        elif isinstance(value, list):
            value = tuple(value)
        decoded[attribute.name] = value
    return decoded


def read_only(x: np.ndarray) -> np.ndarray:
    # Ops must never write into their inputs (they may be shared initializers).
    frozen = np.array(x, copy=True)
    frozen.flags.writeable = False
    return frozen


def sample(rng: np.random.Generator, shape, dtype, *, low=-3.0, high=3.0) -> np.ndarray:
    """Uniform floats in [low, high), integers in [low, high], or random bools, of `dtype`."""
    dtype = np.dtype(dtype)
    if dtype.kind in "iu":
        return rng.integers(int(low), int(high), size=shape, endpoint=True).astype(dtype)
    if dtype.kind == "b":
        return rng.random(shape) < 0.5
    return rng.uniform(low, high, size=shape).astype(dtype)


# ---------------------------------------------------------------------------------------------
# The registry and the calling convention.

REQUIRED = (
    "Gemm", "MatMul", "Add", "Sub", "Mul", "Div", "Neg", "Relu", "LeakyRelu", "Elu", "Selu",
    "Sigmoid", "Tanh", "Softplus", "Mish", "Gelu", "Erf", "Exp", "Log", "Sqrt", "Pow", "Abs",
    "Sin", "Cos", "Clip", "Where", "Greater", "Less", "Equal", "GreaterOrEqual", "LessOrEqual",
    "Not", "And", "Or", "LayerNormalization", "ReduceMean", "ReduceSum", "Transpose", "Reshape",
    "Flatten", "Squeeze", "Unsqueeze", "Concat", "Slice", "Gather", "Shape", "Cast", "Constant",
    "Identity", "Expand", "Softmax", "Max", "Min", "Sum", "Reciprocal", "HardSigmoid",
    "HardSwish", "Dropout", "BatchNormalization", "ConstantOfShape", "Range",
)


def test_every_required_operator_is_registered():
    # The list is design.md §5 plus the operators the ops brief names.
    missing = sorted(set(REQUIRED) - set(supported_operators()))
    assert not missing


def test_supported_operators_lists_versions_in_order():
    operators = supported_operators()
    assert operators["Softmax"] == (1, 13)
    assert operators["ReduceMean"] == (1, 18)
    assert operators["Gelu"] == (20,)
    assert all(versions == tuple(sorted(versions)) for versions in operators.values())


@pytest.mark.parametrize(
    ("op_type", "opset", "expected"),
    [
        ("Softmax", 1, "Softmax_1"),
        ("Softmax", 12, "Softmax_1"),
        ("Softmax", 13, "Softmax_13"),
        ("Softmax", 28, "Softmax_13"),
        ("ReduceMean", 17, "ReduceMean_1"),
        ("ReduceMean", 18, "ReduceMean_18"),
        ("Clip", 10, "Clip_6"),
        ("Clip", 11, "Clip_11"),
        ("Relu", 6, "Relu"),
    ],
)
def test_resolve_picks_the_newest_version_not_after_the_opset(op_type, opset, expected):
    # ONNX versioning: an op's implementation at opset n is the newest with since_version ≤ n.
    assert resolve(op_type, opset).__name__ == expected


def test_resolve_accepts_the_ai_onnx_domain_name():
    assert resolve("Relu", 14, domain="ai.onnx") is resolve("Relu", 14)


def test_resolve_refuses_an_unknown_operator_and_lists_the_known_ones():
    with pytest.raises(UnsupportedOperatorError,
                       match=r"'Conv' \(domain '', opset 17\) is not supported; supported "
                             r"operator types: Abs, Add, .*Gemm.*Where\.$"):
        resolve("Conv", 17)


def test_resolve_refuses_an_opset_older_than_every_implementation():
    with pytest.raises(UnsupportedOperatorError,
                       match=r"'Gelu' \(domain '', opset 19\) is not supported at that opset; "
                             r"this runtime implements it from opset 20 on; supported "
                             r"operator types: Abs, "):
        resolve("Gelu", 19)


def test_resolve_refuses_other_domains():
    with pytest.raises(UnsupportedOperatorError,
                       match=r"'Gelu' \(domain 'com.microsoft', opset 1\) is not supported: "
                             r"only the default ONNX domain .* supported operator types: Abs"):
        resolve("Gelu", 1, domain="com.microsoft")


def _implementations():
    for op_type, versions in supported_operators().items():
        for position, version in enumerate(versions):
            # The implementation serves opsets up to the next registered version.
            last = versions[position + 1] - 1 if position + 1 < len(versions) else None
            yield op_type, version, last


def _schemas(op_type, first, last):
    # Every schema version of the op that applies to some opset in [first, last].
    latest = onnx.defs.onnx_opset_version()
    last = latest if last is None else last
    schemas = {onnx.defs.get_schema(op_type, opset, "").since_version: None
               for opset in range(first, last + 1)}
    return [onnx.defs.get_schema(op_type, version, "") for version in schemas]


@pytest.mark.parametrize(("op_type", "version", "last"), list(_implementations()),
                         ids=[f"{o}-{v}" for o, v, _ in _implementations()])
def test_signature_follows_the_onnx_schema(op_type, version, last):
    # Source of truth: onnx.defs, the operator schemas the ONNX spec is generated from.
    function = resolve(op_type, version)
    schemas = _schemas(op_type, version, last)
    assert schemas[0].since_version == version, "registered at a version where nothing changed"
    parameters = inspect.signature(function).parameters.values()
    keywords = {p.name: p for p in parameters if p.kind is p.KEYWORD_ONLY}
    positional = [p for p in parameters if p.kind is p.POSITIONAL_OR_KEYWORD]
    variadic = any(p.kind is p.VAR_POSITIONAL for p in parameters)
    # Attributes: exactly the spec's names over the opsets served, with the spec's defaults.
    attributes = {name: attribute for schema in schemas
                  for name, attribute in schema.attributes.items()}
    assert set(keywords) == set(attributes)
    for name, attribute in attributes.items():
        default = helper.get_attribute_value(attribute.default_value) \
            if attribute.default_value.name else inspect.Parameter.empty
        if isinstance(default, bytes):
            default = default.decode()
        if isinstance(default, float):
            # Schema defaults are float32; ours may hold the same value at double precision.
            assert np.float32(keywords[name].default) == np.float32(default), name
        elif default is not inspect.Parameter.empty:
            assert keywords[name].default == default, name
        elif attribute.required:
            assert keywords[name].default is inspect.Parameter.empty, name
        else:
            assert keywords[name].default is None, name
    # Inputs: positional, optional ones defaulting to None; variadic ones as *inputs.
    schema_inputs = schemas[-1].inputs
    if any(i.option == onnx.defs.OpSchema.FormalParameterOption.Variadic for i in schema_inputs):
        assert variadic and not positional
    else:
        assert len(positional) == len(schema_inputs)
        for parameter, formal in zip(positional, schema_inputs, strict=True):
            optional = formal.option == onnx.defs.OpSchema.FormalParameterOption.Optional
            assert (parameter.default is None) == optional, parameter.name


@pytest.mark.parametrize(("op_type", "version", "last"), list(_implementations()),
                         ids=[f"{o}-{v}" for o, v, _ in _implementations()])
def test_docstring_names_the_op_and_opset(op_type, version, last):
    # House style: the first docstring line names the op and the opset it implements.
    first_line = resolve(op_type, version).__doc__.splitlines()[0]
    assert first_line.startswith(f"{op_type} (opset {version}")


def test_registering_a_version_twice_is_refused():
    # Relu is registered at opset 6 already; the refusal happens before anything changes.
    with pytest.raises(ValueError, match=r"'Relu' is already registered for opset 6 \(by Relu\)"):
        register("Relu", 6)(lambda x: x)
    assert resolve("Relu", 6).__name__ == "Relu"


@pytest.mark.parametrize(("op_type", "opset", "inputs", "attributes"), [
    ("Neg", 13, (np.array(2.0, np.float32),), {}),
    ("Add", 14, (np.array(1, np.int64), np.array(2, np.int64)), {}),
    ("MatMul", 13, (np.ones(3), np.ones(3)), {}),
    ("ReduceSum", 13, (np.ones((2, 2), np.float32),), {"keepdims": 0}),
])
def test_zero_dimensional_results_are_arrays(op_type, opset, inputs, attributes):
    # NumPy returns scalars for these; the calling convention promises ndarrays.
    result = resolve(op_type, opset)(*inputs, **attributes)
    assert isinstance(result, np.ndarray) and result.shape == ()
