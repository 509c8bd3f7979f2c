"""Activation ops against onnxruntime and onnx's ReferenceEvaluator (the expected values of every
case come from those two; see test_ops.py for the harness and the tolerance classes).
"""

from __future__ import annotations

import numpy as np
import pytest

from tests.runtime.test_ops import FLOATS, Case, check_against_references, ids, sample

RNG = np.random.default_rng(20250108)
SHAPES = [(2, 3, 5), (9,), ()]


def _pointwise_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        for shape in SHAPES:
            # [−6, 6] reaches the saturated tails of sigmoid, tanh, Gelu and softplus.
            x = sample(RNG, shape, dtype, low=-6, high=6)
            cases += [
                Case("Relu", 6, (x,)),
                Case("Relu", 14, (x,)),
                Case("LeakyRelu", 6, (x,), tolerance="rounded"),
                Case("LeakyRelu", 16, (x,), {"alpha": 0.2}, tolerance="rounded"),
                Case("Elu", 6, (x,), tolerance="transcendental"),
                Case("Elu", 22, (x,), {"alpha": 0.5}, tolerance="transcendental"),
                Case("Selu", 6, (x,), tolerance="transcendental"),
                Case("Selu", 22, (x,), {"alpha": 1.5, "gamma": 2.0}, tolerance="transcendental"),
                Case("Sigmoid", 6, (x,), tolerance="transcendental"),
                Case("Sigmoid", 13, (x,), tolerance="transcendental"),
                Case("Tanh", 6, (x,), tolerance="transcendental"),
                Case("Tanh", 13, (x,), tolerance="transcendental"),
                Case("HardSigmoid", 6, (x,), tolerance="rounded"),
                Case("HardSigmoid", 22, (x,), {"alpha": 0.3, "beta": 0.4}, tolerance="rounded"),
                Case("HardSwish", 14, (x,), tolerance="rounded"),
                Case("HardSwish", 22, (x,), tolerance="rounded"),
                Case("Softplus", 1, (x,), tolerance="transcendental"),
                Case("Softplus", 22, (x,), tolerance="transcendental"),
                Case("Softsign", 1, (x,), tolerance="rounded"),
                Case("Mish", 18, (x,), tolerance="transcendental"),
                Case("Mish", 22, (x,), tolerance="transcendental"),
                Case("Gelu", 20, (x,), tolerance="transcendental", note="exact"),
                Case("Gelu", 20, (x,), {"approximate": "tanh"}, tolerance="transcendental",
                     note="tanh"),
            ]
    return cases


def _prelu_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        x = sample(RNG, (2, 3, 4), dtype)
        # The slope broadcasts to x unidirectionally: per last axis, per channel, or scalar.
        for slope_shape in [(4,), (3, 1), (1,), (2, 3, 4)]:
            slope = sample(RNG, slope_shape, dtype, low=0.0, high=0.5)
            cases += [Case("PRelu", opset, (x, slope), tolerance="rounded",
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
                cases.append(Case("Softmax", opset, (x,), attributes, tolerance="transcendental",
                                  note=f"axis{axis}"))
    return cases


CASES = _pointwise_cases() + _prelu_cases() + _softmax_cases()


@pytest.mark.parametrize("case", CASES, ids=ids(CASES))
def test_matches_onnxruntime_and_reference(case):
    check_against_references(case)
