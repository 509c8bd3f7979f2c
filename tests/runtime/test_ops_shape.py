"""Shape, selection and tensor-making ops against onnxruntime and onnx's ReferenceEvaluator (the
expected values of every case come from those two; see test_ops.py for the harness).
"""

from __future__ import annotations

import numpy as np
import pytest
from onnx import helper

from tests.builders import FLOATS, Case, check_against_references, ids, sample

RNG = np.random.default_rng(20250112)
INT64_MAX, INT64_MIN = np.iinfo(np.int64).max, np.iinfo(np.int64).min


def _i64(*values) -> np.ndarray:
    return np.array(values, dtype=np.int64)


def _layout_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        x = sample(RNG, (2, 3, 4), dtype)
        cases += [Case("Identity", opset, (x,)) for opset in (1, 16)]
        cases += [Case("Transpose", opset, (x,), note="reverse") for opset in (1, 21)]
        cases += [Case("Transpose", 13, (x,), {"perm": perm}, note=f"perm{perm}")
                  for perm in [(0, 2, 1), (2, 0, 1), (0, 1, 2)]]
        # 0 copies the input's dimension, −1 is inferred; allowzero=1 makes 0 literal.
        for shape in [(4, 6), (-1,), (0, -1), (0, 0, 2, 2), (2, -1, 1), (24, 1)]:
            cases += [Case("Reshape", opset, (x, _i64(*shape)), note=f"shape{shape}")
                      for opset in (5, 14)]
        empty = np.zeros((0, 3), dtype)
        cases.append(Case("Reshape", 14, (empty, _i64(3, 0)), {"allowzero": 1},
                          note="allowzero"))
        cases += [Case("Flatten", opset, (x,), {"axis": axis}, note=f"axis{axis}")
                  for opset, axis in [(1, 0), (1, 1), (9, 2), (11, 3), (11, -1), (13, -3)]]
        cases.append(Case("Flatten", 13, (x,), note="default-axis"))

        column = sample(RNG, (3, 1, 4, 1), dtype)
        cases += [
            Case("Squeeze", 1, (column,), note="all"),
            Case("Squeeze", 1, (column,), {"axes": (1,)}, note="axes1"),
            Case("Squeeze", 11, (column,), {"axes": (-1, 1)}, note="negative"),
            Case("Squeeze", 13, (column,), note="all"),
            Case("Squeeze", 13, (column, _i64(3)), note="input-axes"),
            Case("Squeeze", 21, (column, _i64(1, -1)), note="input-axes-negative"),
            # Axes refer to positions in the output, which has rank r + len(axes).
            Case("Unsqueeze", 1, (x,), {"axes": (0,)}, note="front"),
            Case("Unsqueeze", 11, (x,), {"axes": (-1, 1)}, note="negative"),
            Case("Unsqueeze", 13, (x, _i64(0, 4)), note="input-axes"),
            Case("Unsqueeze", 13, (x, _i64(-1)), note="input-axes-negative"),
            Case("Unsqueeze", 13, (sample(RNG, (), dtype), _i64(0)), note="scalar"),
        ]
        others = [sample(RNG, (2, 3, 4), dtype), sample(RNG, (2, 5, 4), dtype)]
        cases += [
            Case("Concat", 4, (x, others[0]), {"axis": 0}, note="axis0"),
            Case("Concat", 11, (x, others[1], x), {"axis": -2}, note="three-negative-axis"),
            Case("Concat", 13, (x,), {"axis": 2}, note="single"),
        ]
        cases += [Case("Expand", opset, (column, _i64(*shape)), note=f"shape{shape}")
                  for opset in (8, 13)
                  for shape in [(3, 2, 4, 5), (1, 1), (2, 1, 1, 1, 1)]]
    return cases


def _slice_cases() -> list[Case]:
    cases = []
    x = sample(RNG, (5, 6, 7), np.float32)
    # Attribute form: starts/ends clamped to the dimension; negative values count from the end.
    for starts, ends, axes in [((1,), (3,), None), ((0, -3), (2, 1000), (0, 2)),
                               ((-100, 2), (-1, -2), (1, -1))]:
        attributes = {"starts": starts, "ends": ends}
        if axes is not None:
            attributes["axes"] = axes
        cases.append(Case("Slice", 1, (x,), attributes, note=f"{starts}-{ends}-{axes}"))
    # Input form with steps, negative steps and the INT64 sentinels PyTorch exports.
    for starts, ends, axes, steps in [
        ((1,), (4,), None, None),
        ((0, 1), (INT64_MAX, -1), (1, 2), (2, 3)),
        ((-1,), (INT64_MIN,), (0,), (-1,)),  # reverse the whole axis
        ((4, 10), (1, -100), (0, 1), (-2, -1)),
        ((5,), (0,), (2,), (-3,)),
        ((-3,), (INT64_MAX,), (-1,), (1,)),
        ((3,), (3,), (0,), (1,)),  # empty
        ((0, 0, 0), (1, 1, 1), None, (1, 1, 1)),
    ]:
        inputs = [x, _i64(*starts), _i64(*ends)]
        if axes is not None or steps is not None:
            inputs.append(None if axes is None else _i64(*axes))
        if steps is not None:
            inputs.append(_i64(*steps))
        note = f"{starts}-{ends}-{axes}-{steps}"
        cases += [Case("Slice", opset, tuple(inputs), note=note) for opset in (10, 13)]
    # int32 bounds are allowed too.
    cases.append(Case("Slice", 13, (x, np.array([1], np.int32), np.array([-1], np.int32)),
                      note="int32-bounds"))
    return cases


def _gather_cases() -> list[Case]:
    cases = []
    for dtype in (*FLOATS, np.int64):
        data = sample(RNG, (4, 5, 3), dtype)
        for axis, indices in [
            (0, _i64(0, 3, -1)),
            (1, _i64(-5, 4, 2, 2)),
            (-1, np.array([[0, 2], [-1, 1]], np.int64)),
            (1, np.array(3, np.int64)),  # a scalar index drops the axis
            (0, np.array([1, -2], np.int32)),
        ]:
            cases += [Case("Gather", opset, (data, indices), {"axis": axis},
                           note=f"axis{axis}-{indices.shape}") for opset in (1, 13)]
    return cases


def _shape_and_cast_cases() -> list[Case]:
    cases = []
    x = sample(RNG, (2, 3, 4, 5), np.float32)
    cases += [Case("Shape", opset, (x,)) for opset in (1, 13)]
    # start/end from opset 15: negative values count from the end, out of range is clamped.
    for start, end in [(1, None), (None, -1), (-3, 3), (-10, 10), (3, 1), (0, 0)]:
        attributes = {key: value for key, value in (("start", start), ("end", end))
                      if value is not None}
        cases.append(Case("Shape", 15, (x,), attributes, note=f"{start}-{end}"))
    fractional = np.array([-2.7, -0.5, 0.0, 0.5, 2.7, 3.0, 1e6], np.float32)
    values = {
        np.float32: fractional,
        np.float64: fractional.astype(np.float64) * 1.0000001,
        np.int64: np.array([-3, 0, 2, 40_000, -(2**40)], np.int64),
        np.int32: np.array([-3, 0, 2, 70_000], np.int32),
        np.bool_: np.array([True, False, True]),
    }
    targets = {"float32": 1, "float64": 11, "int64": 7, "int32": 6, "bool": 9, "float16": 10}
    for source, data in values.items():
        for target_name, target in targets.items():
            if source is np.bool_ and target_name == "float16":
                continue  # onnxruntime has no bool → float16 Cast kernel; covered by others
            for opset in (6, 13, 19, 21):
                cases.append(Case("Cast", opset, (data,), {"to": target},
                                  note=f"to-{target_name}"))
            like = np.zeros((1, 2), helper.tensor_dtype_to_np_dtype(target))
            for opset in (15, 19, 21):
                cases.append(Case("CastLike", opset, (data, like), note=f"like-{target_name}"))
    return cases


def _size_cases() -> list[Case]:
    shapes = [(), (0,), (3,), (2, 0, 4), (2, 3, 4)]
    return [Case("Size", opset, (np.zeros(shape, dtype),), note=f"{shape}")
            for shape in shapes for opset in (1, 13, 19, 21) for dtype in (np.float32, np.int64)]


def _constant_cases() -> list[Case]:
    tensor = sample(RNG, (2, 3), np.float64)
    cases = [
        Case("Constant", 1, (), {"value": tensor.astype(np.float32)}, note="tensor"),
        Case("Constant", 13, (), {"value": tensor}, note="tensor-double"),
        Case("Constant", 13, (), {"value": np.array([3, -1], np.int64)}, note="tensor-int"),
        Case("Constant", 12, (), {"value_float": 0.1}, note="float"),
        Case("Constant", 13, (), {"value_floats": (0.1, -2.0, 3.5)}, note="floats"),
        Case("Constant", 19, (), {"value_int": -7}, note="int"),
        Case("Constant", 21, (), {"value_ints": (1, 2, 3)}, note="ints"),
    ]
    for value in [None, np.array([1.5], np.float64), np.array([7], np.int64),
                  np.array([0.25], np.float32)]:
        attributes = {} if value is None else {"value": value}
        for shape in [_i64(2, 3), _i64(4), np.zeros(0, np.int64), _i64(0, 2)]:
            cases.append(Case("ConstantOfShape", 9, (shape,), attributes,
                              note=f"{None if value is None else value.dtype}-{shape.tolist()}"))
    # Range: count = max(⌈(limit − start)/delta⌉, 0); empty when the step points away.
    for dtype, (start, limit, delta) in [
        (np.int64, (3, 9, 3)), (np.int64, (10, 4, -2)), (np.int32, (0, 5, 1)),
        (np.int64, (5, 5, 1)), (np.int64, (0, 10, -1)),
        (np.float32, (0.5, 3.0, 0.25)), (np.float64, (1.0, -2.0, -0.5)),
        (np.float32, (-1.0, 1.0, 0.3)), (np.float64, (0.0, 1.0, 0.1)),
    ]:
        scalars = tuple(np.array(value, dtype) for value in (start, limit, delta))
        # onnxruntime accumulates start + delta + delta + …, while the spec (and we, and the
        # ReferenceEvaluator) compute start + i·delta: inexact floats differ by a few ulp.
        tolerance = "rounded" if np.dtype(dtype).kind == "f" else "exact"
        cases.append(Case("Range", 11, scalars, tolerance=tolerance,
                          note=f"{start}-{limit}-{delta}"))
    return cases


CASES = (_layout_cases() + _slice_cases() + _gather_cases() + _shape_and_cast_cases()
         + _size_cases() + _constant_cases())


@pytest.mark.parametrize("case", CASES, ids=ids(CASES))
def test_matches_onnxruntime_and_reference(case):
    check_against_references(case)
