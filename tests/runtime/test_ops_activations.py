"""Activation ops against onnxruntime and onnx's ReferenceEvaluator (the expected values of every
case come from those two; see test_ops.py for the harness and the tolerance classes).
"""

from __future__ import annotations

import numpy as np
import pytest

from tests.builders import FLOATS, Case, check_against_references, ids, sample

RNG = np.random.default_rng(20250108)
SHAPES = [(2, 3, 5), (9,), ()]

# onnxruntime 1.32's CPU kernels for these (op, opset) pairs take float32 only (probed by
# building the model); their float64 cases are compared with the ReferenceEvaluator alone.
ONNXRUNTIME_FLOAT32_ONLY = {
    ("LeakyRelu", 6), ("Elu", 6), ("Elu", 22), ("Selu", 6), ("Selu", 22), ("HardSigmoid", 6),
    ("HardSigmoid", 22), ("HardSwish", 14), ("HardSwish", 22), ("Softplus", 1),
    ("Softplus", 22), ("Softsign", 1), ("Mish", 22), ("Gelu", 20), ("PRelu", 7), ("PRelu", 9),
}


def _case(op_type, opset, inputs, attributes=None, **options) -> Case:
    float64 = inputs[0].dtype == np.float64
    return Case(op_type, opset, inputs, attributes or {},
                onnxruntime=not (float64 and (op_type, opset) in ONNXRUNTIME_FLOAT32_ONLY),
                **options)


def _pointwise_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        for shape in SHAPES:
            # [−6, 6] reaches the saturated tails of sigmoid, tanh, Gelu and softplus.
            x = sample(RNG, shape, dtype, low=-6, high=6)
            cases += [
                _case("Relu", 6, (x,)),
                _case("Relu", 14, (x,)),
                _case("LeakyRelu", 6, (x,), tolerance="rounded"),
                _case("LeakyRelu", 16, (x,), {"alpha": 0.2}, tolerance="rounded"),
                _case("Elu", 6, (x,), tolerance="transcendental"),
                _case("Elu", 22, (x,), {"alpha": 0.5}, tolerance="transcendental"),
                _case("Selu", 6, (x,), tolerance="transcendental"),
                _case("Selu", 22, (x,), {"alpha": 1.5, "gamma": 2.0}, tolerance="transcendental"),
                _case("Sigmoid", 6, (x,), tolerance="transcendental"),
                _case("Sigmoid", 13, (x,), tolerance="transcendental"),
                _case("Tanh", 6, (x,), tolerance="transcendental"),
                _case("Tanh", 13, (x,), tolerance="transcendental"),
                _case("HardSigmoid", 6, (x,), tolerance="rounded"),
                _case("HardSigmoid", 22, (x,), {"alpha": 0.3, "beta": 0.4}, tolerance="rounded"),
                _case("HardSwish", 14, (x,), tolerance="rounded"),
                _case("HardSwish", 22, (x,), tolerance="rounded"),
                _case("Softplus", 1, (x,), tolerance="transcendental"),
                _case("Softplus", 22, (x,), tolerance="transcendental"),
                _case("Mish", 18, (x,), tolerance="transcendental"),
                _case("Mish", 22, (x,), tolerance="transcendental"),
            ]
            if shape or dtype == np.float32:
                # The ReferenceEvaluator's Softsign fails on 0-d inputs (it adds in place to a
                # NumPy scalar), and onnxruntime's takes float32 only.
                cases.append(_case("Softsign", 1, (x,), tolerance="rounded",
                                   reference=bool(shape)))
            if dtype == np.float32:
                # Float64 Gelu is checked in test_ops_special.py against SciPy: onnxruntime has
                # float32 Gelu only, and the ReferenceEvaluator expands Gelu's function body
                # with float32 constants and a float32 Erf.
                cases += [
                    _case("Gelu", 20, (x,), tolerance="transcendental", note="exact"),
                    _case("Gelu", 20, (x,), {"approximate": "tanh"},
                          tolerance="transcendental", note="tanh"),
                ]
    return cases


def _prelu_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        x = sample(RNG, (2, 3, 4), dtype)
        # The slope broadcasts to x unidirectionally: per last axis, per channel, or scalar.
        for slope_shape in [(4,), (3, 1), (1,), (2, 3, 4)]:
            slope = sample(RNG, slope_shape, dtype, low=0.0, high=0.5)
            cases += [_case("PRelu", opset, (x, slope), tolerance="rounded",
                           note=f"slope{slope_shape}") for opset in (7, 9, 16)]
    return cases


def _softmax_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        x = sample(RNG, (2, 3, 4), dtype, low=-5, high=5)
        # Opsets 1–12 normalise over all dimensions from `axis` on; 13 over `axis` alone.
        for opset in (1, 11, 13):
            for axis in (0, 1, -1, None):
                attributes = {} if axis is None else {"axis": axis}
                # The ReferenceEvaluator applies opset-13 semantics at every opset, so before 13
                # it serves as a reference only where both agree: a normalised last axis.
                same_semantics = opset >= 13 or axis == -1
                cases.append(Case("Softmax", opset, (x,), attributes, tolerance="transcendental",
                                  reference=same_semantics, note=f"axis{axis}"))
    return cases


CASES = _pointwise_cases() + _prelu_cases() + _softmax_cases()


@pytest.mark.parametrize("case", CASES, ids=ids(CASES))
def test_matches_onnxruntime_and_reference(case):
    check_against_references(case)
