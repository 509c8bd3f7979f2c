"""LayerNormalization, BatchNormalization and Dropout (inference) against onnxruntime and onnx's
ReferenceEvaluator (the table's expected values come from those two; see test_ops.py), and the
corners neither reference covers against the spec's formulas.
"""

from __future__ import annotations

import numpy as np
import pytest

from stridecast.runtime.ops import resolve
from tests.builders import (
    FLOATS,
    TOLERANCES,
    Case,
    check_against_references,
    ids,
    sample,
)

RNG = np.random.default_rng(20250111)


def _layer_norm_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        x = sample(RNG, (2, 3, 8), dtype, low=-2, high=4)
        for axis in (-1, 1, -2, 0):
            normalized = x.shape[axis:]
            scale = sample(RNG, normalized, dtype, low=0.5, high=1.5)
            bias = sample(RNG, normalized, dtype)
            for inputs, note in [((x, scale, bias), "bias"), ((x, scale), "no-bias")]:
                for outputs in (1, 3):
                    cases.append(Case("LayerNormalization", 17, inputs, {"axis": axis},
                                      outputs=outputs, tolerance="accumulate",
                                      note=f"axis{axis}-{note}-out{outputs}"))
        # A scale of trailing size broadcasting over the normalised dimensions, and epsilon.
        scale = sample(RNG, (8,), dtype, low=0.5, high=1.5)
        cases.append(Case("LayerNormalization", 17, (x, scale), {"axis": 1, "epsilon": 1e-2},
                          outputs=3, tolerance="accumulate", note="broadcast-scale-epsilon"))
    return cases


def _batch_norm_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        for shape in [(4, 3), (2, 3, 5), (2, 3, 4, 2)]:
            x = sample(RNG, shape, dtype)
            channels = shape[1]
            scale, bias, mean = (sample(RNG, (channels,), dtype) for _ in range(3))
            variance = sample(RNG, (channels,), dtype, low=0.1, high=2.0)
            inputs = (x, scale, bias, mean, variance)
            for opset in (7, 9, 14, 15):
                # The ReferenceEvaluator's BatchNormalization for opsets 6–13 fails (returns
                # a nested tuple); onnxruntime is the reference there.
                cases.append(Case("BatchNormalization", opset, inputs, tolerance="rounded",
                                  reference=opset >= 14, note=f"rank{len(shape)}"))
            cases.append(Case("BatchNormalization", 15, inputs, {"epsilon": 0.1},
                              tolerance="rounded", note=f"rank{len(shape)}-epsilon"))
    return cases


def _dropout_cases() -> list[Case]:
    cases = []
    for dtype in FLOATS:
        x = sample(RNG, (3, 4), dtype)
        # Inference: the output is the input. (The mask of opsets 7–11 is checked below: the
        # two references disagree on it.)
        cases += [Case("Dropout", opset, (x,), {"ratio": 0.3}) for opset in (7, 10)]
        ratio, off = np.array(0.3, dtype), np.array(False)
        for opset in (12, 13, 22):
            cases += [
                Case("Dropout", opset, (x,), outputs=2, note="defaults"),
                Case("Dropout", opset, (x, ratio), note="ratio"),
                Case("Dropout", opset, (x, ratio, off), outputs=2, note="training-off"),
                Case("Dropout", opset, (x, None, off), note="ratio-omitted"),
            ]
    return cases


CASES = _layer_norm_cases() + _batch_norm_cases() + _dropout_cases()


@pytest.mark.parametrize("case", CASES, ids=ids(CASES))
def test_matches_onnxruntime_and_reference(case):
    check_against_references(case)


@pytest.mark.parametrize("dtype", FLOATS)
def test_batch_normalization_spatial_zero_uses_per_element_statistics(dtype):
    # Neither reference runs spatial=0 (onnxruntime refuses it, the ReferenceEvaluator fails),
    # so the expected values come from the inference formula of Ioffe & Szegedy (2015),
    # y = (x − mean)/√(var + ε)·scale + b, with parameters shaped like x.shape[1:].
    x = sample(RNG, (2, 3, 4), dtype)
    scale, bias, mean = (sample(RNG, (3, 4), dtype) for _ in range(3))
    variance = sample(RNG, (3, 4), dtype, low=0.1, high=2.0)
    epsilon = 1e-3
    ours = resolve("BatchNormalization", 7)(x, scale, bias, mean, variance, epsilon=epsilon,
                                            spatial=0)
    expected = (x - mean) / np.sqrt(variance + dtype(epsilon)) * scale + bias
    assert ours.dtype == dtype
    rtol, atol = TOLERANCES["rounded"][dtype]
    np.testing.assert_allclose(ours, expected, rtol=rtol, atol=atol)


@pytest.mark.parametrize(("opset", "mask_dtype"), [(7, np.float32), (10, np.bool_),
                                                   (12, np.bool_)])
def test_dropout_mask_keeps_everything_at_inference(opset, mask_dtype):
    # The spec (opset 12's text) defines the inference mask as all true: nothing is dropped.
    # Opset 7's mask has the input's type T, later ones are bool. onnxruntime's kernels for
    # 7–11 return an all-false mask and the ReferenceEvaluator a bool one at opset 7, so
    # neither serves as the reference for these older versions.
    x = sample(RNG, (3, 4), np.float32)
    output, mask = resolve("Dropout", opset)(x)
    np.testing.assert_array_equal(output, x)
    assert mask.dtype == mask_dtype and mask.shape == x.shape
    assert np.all(mask == 1)
