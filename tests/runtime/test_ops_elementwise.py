"""Elementwise arithmetic, math, comparison and selection ops against onnxruntime and onnx's
ReferenceEvaluator (the expected values of every case come from those two; see test_ops.py).
"""

from __future__ import annotations

import numpy as np
import pytest

from tests.builders import FLOATS, Case, check_against_references, ids, sample

RNG = np.random.default_rng(20250107)

# Shape pairs exercising multidirectional broadcasting: equal, trailing vector, both sides
# stretched, and a 0-d operand.
BROADCAST_SHAPES = [((3, 4), (3, 4)), ((2, 3, 4), (4,)), ((2, 1, 4), (3, 1)), ((), (2, 3))]


def _binary_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        for shape_a, shape_b in BROADCAST_SHAPES:
            a, b = sample(RNG, shape_a, dtype), sample(RNG, shape_b, dtype)
            # Divisors kept away from zero, bases positive so that real powers exist.
            divisor = np.copysign(sample(RNG, shape_b, dtype, low=0.5, high=2.0), b)
            base = sample(RNG, shape_a, dtype, low=0.1, high=3.0)
            for opset in (7, 14):
                cases += [
                    Case("Add", opset, (a, b), tolerance="rounded"),
                    Case("Sub", opset, (a, b), tolerance="rounded"),
                    Case("Mul", opset, (a, b), tolerance="rounded"),
                    Case("Div", opset, (a, divisor), tolerance="rounded"),
                ]
            cases.append(Case("Pow", 7, (base, b), tolerance="transcendental"))
            cases.append(Case("Pow", 15, (base, b), tolerance="transcendental"))
    numerator = RNG.integers(-20, 21, size=(4, 5))
    for dtype in (np.int64, np.int32):
        # Integer division truncates toward zero (C semantics) in both references.
        denominator = np.where(RNG.random((4, 5)) < 0.5, -1, 1) * RNG.integers(1, 7, (4, 5))
        cases.append(Case("Div", 14, (numerator.astype(dtype), denominator.astype(dtype)),
                          note="truncation"))
        cases.append(Case("Add", 14, (numerator.astype(dtype), denominator.astype(dtype))))
    # From opset 12 the exponent may be an integer, or another float type than the base.
    base = sample(RNG, (3, 4), np.float32, low=0.5, high=2.0)
    cases.append(Case("Pow", 15, (base, RNG.integers(-3, 4, (3, 4))), tolerance="transcendental",
                      note="int-exponent"))
    cases.append(Case("Pow", 15, (base, sample(RNG, (4,), np.float64)),
                      tolerance="transcendental", note="double-exponent"))
    return cases


def _unary_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        for shape in [(2, 3, 4), (7,), ()]:
            x = sample(RNG, shape, dtype, low=-4, high=4)
            positive = sample(RNG, shape, dtype, low=0.05, high=5)
            nonzero = np.copysign(positive, x)
            for opset in (6, 13):
                cases += [
                    Case("Neg", opset, (x,)),
                    Case("Abs", opset, (x,)),
                    Case("Reciprocal", opset, (nonzero,), tolerance="rounded"),
                    Case("Sqrt", opset, (positive,), tolerance="rounded"),
                    Case("Exp", opset, (x,), tolerance="transcendental"),
                    Case("Log", opset, (positive,), tolerance="transcendental"),
                ]
            for opset in (7, 22):
                cases += [
                    Case("Sin", opset, (x,), tolerance="transcendental"),
                    Case("Cos", opset, (x,), tolerance="transcendental"),
                ]
            # Erf in float64 is checked in test_ops_erf.py instead, against SciPy and math.erf:
            # onnxruntime implements Erf for float32 only, and the ReferenceEvaluator rounds its
            # float64 Erf through float32.
            if dtype == np.float32:
                cases += [Case("Erf", opset, (x,), tolerance="transcendental") for opset in (9, 13)]
    return cases


def _variadic_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        operand_sets = [
            (sample(RNG, (3, 4), dtype),),
            (sample(RNG, (3, 4), dtype), sample(RNG, (4,), dtype)),
            (sample(RNG, (2, 1, 4), dtype), sample(RNG, (3, 1), dtype), sample(RNG, (), dtype)),
        ]
        for operands in operand_sets:
            for opset in (8, 13):
                cases += [
                    Case("Max", opset, operands),
                    Case("Min", opset, operands),
                    Case("Sum", opset, operands, tolerance="rounded"),
                ]
    return cases


def _clip_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        x = sample(RNG, (3, 5), dtype)
        lower, upper = np.array(-1.0, dtype), np.array(0.5, dtype)
        # onnxruntime's Clip kernels for opsets 6–11 take float32 only (float64 from 12 on).
        float32 = dtype == np.float32
        for attributes in ({}, {"min": -1.0}, {"max": 0.5}, {"min": -1.0, "max": 0.5}):
            cases.append(Case("Clip", 6, (x,), attributes, onnxruntime=float32,
                              note="-".join(attributes)))
        for opset in (11, 13):
            for bounds, note in [((lower, upper), "both"), ((lower,), "min"),
                                 ((None, upper), "max"), ((), "none")]:
                cases.append(Case("Clip", opset, (x, *bounds), onnxruntime=float32 or opset > 11,
                                  note=note))
        # When min > max every element becomes max (the spec from opset 13).
        cases.append(Case("Clip", 13, (x, upper, lower), note="empty-interval"))
    return cases


def _logic_cases() -> list[Case]:
    cases = []
    for dtype in (*FLOATS, np.int64):
        for shape_a, shape_b in BROADCAST_SHAPES:
            # Small integers (also as floats) make equal pairs common.
            a = RNG.integers(-2, 3, shape_a).astype(dtype)
            b = RNG.integers(-2, 3, shape_b).astype(dtype)
            # Opset 7's Greater and Less accept float types only; integers from opset 9.
            first = 7 if dtype in FLOATS else 9
            cases += [Case(op, opset, (a, b)) for op, opset in
                      [("Greater", first), ("Greater", 13), ("Less", first), ("Equal", 11),
                       ("Equal", 19), ("GreaterOrEqual", 12), ("LessOrEqual", 16)]]
    for shape_a, shape_b in BROADCAST_SHAPES:
        a, b = RNG.random(shape_a) < 0.5, RNG.random(shape_b) < 0.5
        cases += [Case("And", 7, (a, b)), Case("Or", 7, (a, b)), Case("Not", 1, (a,))]
    for dtype in FLOATS:
        condition = RNG.random((2, 1, 4)) < 0.5
        x, y = sample(RNG, (3, 1), dtype), sample(RNG, (4,), dtype)
        cases += [Case("Where", 9, (condition, x, y)), Case("Where", 16, (condition, y, x))]
    return cases


CASES = _binary_cases() + _unary_cases() + _variadic_cases() + _clip_cases() + _logic_cases()


@pytest.mark.parametrize("case", CASES, ids=ids(CASES))
def test_matches_onnxruntime_and_reference(case):
    check_against_references(case)
