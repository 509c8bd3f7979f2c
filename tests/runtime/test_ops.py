"""The operator registry and the calling convention.

The harness the test_ops_* files use (tests/builders.py: `Case`, `check_against_references`)
runs each operator case as one single-node ONNX model with our registered function,
onnxruntime (CPUExecutionProvider) and onnx's ReferenceEvaluator on the same inputs; our
outputs must match both references within the case's tolerance class.
"""

from __future__ import annotations

import inspect

import numpy as np
import onnx
import onnx.defs
import pytest
from onnx import helper

from stridecast.runtime.errors import UnsupportedOperatorError
from stridecast.runtime.ops import register, resolve, supported_operators

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
