"""Gemm, MatMul and the reductions against onnxruntime and onnx's ReferenceEvaluator (the
expected values of every case come from those two; see test_ops.py for the harness).
"""

from __future__ import annotations

import numpy as np
import pytest

from tests.builders import FLOATS, Case, check_against_references, ids, sample

RNG = np.random.default_rng(20250110)
M, K, N = 5, 7, 3


def _gemm_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        for trans_a in (0, 1):
            for trans_b in (0, 1):
                a = sample(RNG, (K, M) if trans_a else (M, K), dtype)
                b = sample(RNG, (N, K) if trans_b else (K, N), dtype)
                # C broadcasts unidirectionally to (M, N): full, row, column, 1×1, scalar.
                for c_shape in [(M, N), (N,), (M, 1), (1, 1), ()]:
                    c = sample(RNG, c_shape, dtype)
                    attributes = {"transA": trans_a, "transB": trans_b}
                    cases.append(Case("Gemm", 7, (a, b, c), attributes, tolerance="accumulate",
                                      note=f"tA{trans_a}-tB{trans_b}-C{c_shape}"))
                cases.append(Case("Gemm", 13, (a, b, sample(RNG, (N,), dtype)),
                                  {"transA": trans_a, "transB": trans_b, "alpha": 0.5,
                                   "beta": -2.0}, tolerance="accumulate",
                                  note=f"tA{trans_a}-tB{trans_b}-scaled"))
        # C is optional from opset 11.
        a, b = sample(RNG, (M, K), dtype), sample(RNG, (K, N), dtype)
        cases.append(Case("Gemm", 11, (a, b), {"alpha": 2.0}, tolerance="accumulate",
                          note="no-C"))
        cases.append(Case("Gemm", 13, (a, b, None), tolerance="accumulate", note="C-omitted"))
    return cases


def _matmul_cases() -> list[Case]:
    cases = []
    # NumPy's matmul rules are ONNX's: 1-D operands promoted and dropped, batches broadcast.
    shape_pairs = [((M, K), (K, N)), ((2, M, K), (K, N)), ((2, 1, M, K), (3, K, N)),
                   ((K,), (K, N)), ((M, K), (K,)), ((K,), (K,))]
    for dtype in FLOATS:
        for shape_a, shape_b in shape_pairs:
            a, b = sample(RNG, shape_a, dtype), sample(RNG, shape_b, dtype)
            cases += [Case("MatMul", opset, (a, b), tolerance="accumulate") for opset in (1, 13)]
    return cases


def _reduce_cases() -> list[Case]:
    cases = []
    axes_choices = [None, (1,), (0, 2), (-1,), (-3, -1)]
    for dtype in FLOATS:
        data = sample(RNG, (3, 4, 5), dtype)
        for op_type, attribute_opset, input_opset in [("ReduceMean", 13, 18),
                                                      ("ReduceSum", 11, 13),
                                                      ("ReduceMax", 13, 18),
                                                      ("ReduceMin", 13, 18)]:
            # Sums differ only by summation order; max and min are exact.
            tolerance = "accumulate" if op_type in ("ReduceMean", "ReduceSum") else "exact"
            for axes in axes_choices:
                for keepdims in (0, 1):
                    note = f"axes{axes}-keep{keepdims}"
                    attributes = {"keepdims": keepdims}
                    if axes is not None:
                        attributes["axes"] = axes
                    for opset in (1, attribute_opset):
                        cases.append(Case(op_type, opset, (data,), attributes,
                                          tolerance=tolerance, note=note))
                    axes_input = None if axes is None else np.array(axes, np.int64)
                    cases.append(Case(op_type, input_opset, (data, axes_input),
                                      {"keepdims": keepdims}, tolerance=tolerance, note=note))
            # Empty axes: reduce everything, or (noop_with_empty_axes=1) nothing.
            empty = np.zeros(0, np.int64)
            for noop in (0, 1):
                cases.append(Case(op_type, input_opset, (data, empty),
                                  {"noop_with_empty_axes": noop}, tolerance=tolerance,
                                  note=f"empty-axes-noop{noop}"))
    # Integer sums keep their type.
    integers = RNG.integers(-100, 100, (3, 4)).astype(np.int32)
    cases.append(Case("ReduceSum", 13, (integers, np.array([1], np.int64))))
    # Reducing a dimension of size zero gives the identity: −inf for max, +inf for min, and
    # the type's extremes for integers (the spec, opset 18 and 20).
    for dtype in (*FLOATS, np.int64, np.int32):
        hollow = np.zeros((2, 0, 3), dtype)
        for op_type in ("ReduceMax", "ReduceMin"):
            for keepdims in (0, 1):
                cases.append(Case(op_type, 18, (hollow, np.array([1], np.int64)),
                                  {"keepdims": keepdims}, note=f"empty-dim-keep{keepdims}"))
            cases.append(Case(op_type, 13, (hollow,), {"axes": (1,)}, note="empty-dim"))
    # bool max and min (opset 20) over an empty dimension: False and True. onnxruntime 1.32
    # refuses these ("ReduceMax is not defined for empty set with bool type"), so only the
    # ReferenceEvaluator (and onnx's test_reduce_max_empty_set_bool case) checks them.
    for op_type in ("ReduceMax", "ReduceMin"):
        cases.append(Case(op_type, 20, (np.zeros((2, 0), bool), np.array([1], np.int64)),
                          {"keepdims": 0}, onnxruntime=False, note="empty-dim-bool"))
    return cases


CASES = _gemm_cases() + _matmul_cases() + _reduce_cases()


@pytest.mark.parametrize("case", CASES, ids=ids(CASES))
def test_matches_onnxruntime_and_reference(case):
    check_against_references(case)
