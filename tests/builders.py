"""Test-only builders: ONNX level models and bundles with known exact flow maps.

The exact maps come from the matrix exponential: for x' = A x, x(t) = expm(A t) x(0) (the
standard solution of linear ODEs; scipy.linalg.expm computes it).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper
from scipy.linalg import expm

from stridecast.runtime import (
    SAMPLES_FILE,
    EnvelopeSamples,
    LevelEntry,
    Manifest,
    ValidationCurve,
    encode_samples,
    write_bundle,
)

PLACEHOLDER_SHA = "0" * 64


def linear_level_model(matrix: np.ndarray, bias: np.ndarray | None = None, *,
                       dtype=np.float64, use_gemm: bool = False, opset: int = 17
                       ) -> onnx.ModelProto:
    """A level computing next = state @ matrix.T + bias, as one Gemm or a MatMul(+Add)."""
    elem = TensorProto.DOUBLE if np.dtype(dtype) == np.float64 else TensorProto.FLOAT
    dim = matrix.shape[0]
    weight = numpy_helper.from_array(np.ascontiguousarray(matrix.T, dtype=dtype), "weight")
    initializers = [weight]
    if use_gemm:
        inputs = ["state", "weight"]
        if bias is not None:
            initializers.append(numpy_helper.from_array(np.asarray(bias, dtype=dtype), "bias"))
            inputs.append("bias")
        nodes = [helper.make_node("Gemm", inputs, ["next"], name="gemm")]
    else:
        if bias is None:
            nodes = [helper.make_node("MatMul", ["state", "weight"], ["next"], name="matmul")]
        else:
            initializers.append(numpy_helper.from_array(np.asarray(bias, dtype=dtype), "bias"))
            nodes = [helper.make_node("MatMul", ["state", "weight"], ["product"], name="matmul"),
                     helper.make_node("Add", ["product", "bias"], ["next"], name="add")]
    graph = helper.make_graph(
        nodes, "level",
        [helper.make_tensor_value_info("state", elem, ["batch", dim])],
        [helper.make_tensor_value_info("next", elem, ["batch", dim])],
        initializer=initializers,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    return model


def linear_bundle(out: Path, system: np.ndarray, *, base_step: float, strides: Sequence[int],
                  mean: Sequence[float] | None = None, scale: Sequence[float] | None = None,
                  update: str = "replace", dtype=np.float64, use_gemm: bool = False,
                  name: str = "linear", overwrite: bool = False,
                  envelope: tuple[Sequence[float], Sequence[float]] | None = None,
                  samples: np.ndarray | None = None, radius: float = 0.5,
                  validation: ValidationCurve | None = None,
                  validated_horizon: float | None = None) -> Path:
    """A bundle whose level k is the exact flow map expm(A k Δt), in normalised coordinates.

    With z = (x − m)/s and x' = M x, the network must give z' = S⁻¹ M S z + S⁻¹ (M m − m)
    ("replace"), or that minus z ("increment"). `envelope` is (min, max) in physical units;
    `samples` are normalised states (count, d) kept as the data-based envelope with `radius`
    (they need `envelope`).
    """
    dim = system.shape[0]
    mean = np.zeros(dim) if mean is None else np.asarray(mean, dtype=np.float64)
    scale = np.ones(dim) if scale is None else np.asarray(scale, dtype=np.float64)
    files = {}
    for stride in strides:
        flow = expm(system * stride * base_step)
        normalised = (flow * scale[None, :]) / scale[:, None]
        bias = (flow @ mean - mean) / scale
        if update == "increment":
            normalised = normalised - np.eye(dim)
        model = linear_level_model(normalised, bias if mean.any() else None, dtype=dtype,
                                   use_gemm=use_gemm)
        files[stride] = model.SerializeToString()
    manifest = Manifest(
        name=name,
        state_names=tuple(f"x{i}" for i in range(dim)),
        state_units=("",) * dim,
        base_step=base_step,
        mean=tuple(float(v) for v in mean),
        scale=tuple(float(v) for v in scale),
        update=update,
        levels=tuple(LevelEntry(stride=s, file="", sha256=PLACEHOLDER_SHA,
                                input="state", output="next") for s in strides),
        envelope_min=None if envelope is None else tuple(float(v) for v in envelope[0]),
        envelope_max=None if envelope is None else tuple(float(v) for v in envelope[1]),
        envelope_samples=None if samples is None else EnvelopeSamples(
            file=SAMPLES_FILE, sha256=PLACEHOLDER_SHA, count=len(samples), radius=radius),
        validation=validation,
        validated_horizon=validated_horizon,
    )
    extra = None if samples is None else {SAMPLES_FILE: encode_samples(samples)}
    return write_bundle(out, manifest, files, overwrite=overwrite, extra_files=extra)


def oscillator_matrix(omega: float = 2.0, damping: float = 0.0) -> np.ndarray:
    """x'' + 2ζω x' + ω² x = 0 as a first-order system (position, velocity)."""
    return np.array([[0.0, 1.0], [-omega**2, -2.0 * damping * omega]])
