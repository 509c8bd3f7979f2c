"""Test-only builders, shared by the test files (which never import one another).

- ONNX level models and bundles with known exact flow maps. The exact maps come from the
  matrix exponential: for x' = A x, x(t) = expm(A t) x(0) (the standard solution of linear
  ODEs; scipy.linalg.expm computes it).
- A minimal protobuf wire-format encoder and model-byte builders, for crafting (faulty) inputs.
- The single-node operator harness: our op, onnxruntime and onnx's ReferenceEvaluator on the
  same inputs.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import onnxruntime
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator
from scipy.linalg import expm

from stridecast.runtime import (
    DECODER_FILE,
    ENCODER_FILE,
    SAMPLES_FILE,
    EnvelopeSamples,
    LevelEntry,
    Manifest,
    ModelFile,
    Reduction,
    ValidationCurve,
    encode_samples,
    write_bundle,
)
from stridecast.runtime.ops import resolve

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


def linear_map_model(matrix: np.ndarray, *, input_name: str, output_name: str,
                     dtype=np.float64, use_gemm: bool = False) -> onnx.ModelProto:
    """A graph computing output = input @ matrix.T, matrix (out, in): one MatMul or one Gemm
    (an encoder or decoder made of a linear basis)."""
    elem = TensorProto.DOUBLE if np.dtype(dtype) == np.float64 else TensorProto.FLOAT
    width_out, width_in = matrix.shape
    if use_gemm:  # the weight as stored by torch.nn.Linear, (out, in), with transB
        weight = numpy_helper.from_array(np.ascontiguousarray(matrix, dtype=dtype), "weight")
        node = helper.make_node("Gemm", [input_name, "weight"], [output_name], transB=1)
    else:
        weight = numpy_helper.from_array(np.ascontiguousarray(matrix.T, dtype=dtype), "weight")
        node = helper.make_node("MatMul", [input_name, "weight"], [output_name])
    graph = helper.make_graph(
        [node], "map",
        [helper.make_tensor_value_info(input_name, elem, ["batch", width_in])],
        [helper.make_tensor_value_info(output_name, elem, ["batch", width_out])],
        initializer=[weight],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model


def reduced_bundle(out: Path, latent_system: np.ndarray, basis: np.ndarray, *,
                   base_step: float, strides: Sequence[int], mean: Sequence[float],
                   scale: Sequence[float], update: str = "replace", dtype=np.float64,
                   use_gemm: bool = False, encoder_matrix: np.ndarray | None = None,
                   envelope: tuple[Sequence[float], Sequence[float]] | None = None,
                   samples: np.ndarray | None = None, radius: float = 0.5,
                   reconstruction: float | None = None, overwrite: bool = False) -> Path:
    """A reduced bundle with exact latent flow maps: encoder z ↦ Vᵀz, level k the exact flow
    map expm(A_r k Δt) of y' = A_r y (scipy.linalg.expm; as an increment, that minus I),
    decoder y ↦ V y, with the manifest normalisation z = (x − mean)/scale on the full state.

    `basis` V is (d, r); `encoder_matrix` (r, d) replaces Vᵀ (e.g. to build a mismatched
    bundle). `envelope` and `samples` are latent (length r; samples (count, r));
    `reconstruction` is the normalised-RMS threshold of the off-subspace check.
    """
    dim, latent_dim = basis.shape
    files = {}
    for stride in strides:
        flow = expm(latent_system * stride * base_step)
        if update == "increment":
            flow = flow - np.eye(latent_dim)
        files[stride] = linear_level_model(flow, dtype=dtype,
                                           use_gemm=use_gemm).SerializeToString()
    encoder = basis.T if encoder_matrix is None else encoder_matrix
    extra = {
        ENCODER_FILE: linear_map_model(encoder, input_name="z", output_name="latent",
                                       dtype=dtype, use_gemm=use_gemm).SerializeToString(),
        DECODER_FILE: linear_map_model(basis, input_name="latent", output_name="z",
                                       dtype=dtype, use_gemm=use_gemm).SerializeToString(),
    }
    if samples is not None:
        extra[SAMPLES_FILE] = encode_samples(samples)
    manifest = Manifest(
        name="reduced",
        state_names=tuple(f"u{i}" for i in range(dim)),
        state_units=("K",) * dim,
        base_step=base_step,
        mean=tuple(float(v) for v in mean),
        scale=tuple(float(v) for v in scale),
        update=update,
        levels=tuple(LevelEntry(stride=s, file="", sha256=PLACEHOLDER_SHA) for s in strides),
        envelope_min=None if envelope is None else tuple(float(v) for v in envelope[0]),
        envelope_max=None if envelope is None else tuple(float(v) for v in envelope[1]),
        envelope_samples=None if samples is None else EnvelopeSamples(
            file=SAMPLES_FILE, sha256=PLACEHOLDER_SHA, count=len(samples), radius=radius),
        reduction=Reduction(latent_dim=latent_dim,
                            encoder=ModelFile(ENCODER_FILE, PLACEHOLDER_SHA),
                            decoder=ModelFile(DECODER_FILE, PLACEHOLDER_SHA),
                            reconstruction_threshold=reconstruction),
    )
    return write_bundle(out, manifest, files, overwrite=overwrite, extra_files=extra)


def sine_basis(dim: int, count: int) -> np.ndarray:
    """(dim, count): the first `count` eigenvectors sin(jkπ/(dim+1)) of the second-difference
    matrix, orthonormal with the factor √(2/(dim+1)) (standard result), as a POD-like basis."""
    points = np.arange(1, dim + 1)
    return np.sqrt(2.0 / (dim + 1)) * np.sin(np.outer(points, np.arange(1, count + 1))
                                             * np.pi / (dim + 1))


def field_bundle(out: Path, *, dim: int, rates: Sequence[float], base_step: float,
                 strides: Sequence[int], mean: float = 0.0, scale: float = 1.0,
                 dtype=np.float64, reconstruction: float | None = None) -> Path:
    """A reduced bundle of a field of `dim` components whose latent modes decay (or grow) at
    `rates`: y' = diag(rates) y on the sine basis (`sine_basis`), levels the exact flow maps
    (`reduced_bundle`, scipy.linalg.expm), uniform `mean` and `scale`."""
    basis = sine_basis(dim, len(rates))
    return reduced_bundle(out, np.diag(np.asarray(rates, dtype=np.float64)), basis,
                          base_step=base_step, strides=strides, mean=np.full(dim, mean),
                          scale=np.full(dim, scale), dtype=dtype,
                          reconstruction=reconstruction)


def oscillator_matrix(omega: float = 2.0, damping: float = 0.0) -> np.ndarray:
    """x'' + 2ζω x' + ω² x = 0 as a first-order system (position, velocity)."""
    return np.array([[0.0, 1.0], [-omega**2, -2.0 * damping * omega]])


def tanh_bundle(out, *, dim=4, hidden=16, strides=(1, 2, 4, 8)):
    """A bundle of small random tanh networks (Gemm + Tanh, two hidden layers), float32,
    increment update, normalisation mean 0.5 and scale 2; returns (path, {stride: bytes})."""
    rng = np.random.default_rng(3)
    files = {}
    for stride in strides:
        weights = [rng.normal(0, 0.3, (hidden, dim)), rng.normal(0, 0.3, (hidden, hidden)),
                   rng.normal(0, 0.03, (dim, hidden))]
        biases = [rng.normal(0, 0.1, w.shape[0]) for w in weights]
        nodes, inits, current = [], [], "state"
        for index, (w, b) in enumerate(zip(weights, biases, strict=True)):
            inits += [numpy_helper.from_array(w.astype(np.float32), f"w{index}"),
                      numpy_helper.from_array(b.astype(np.float32), f"b{index}")]
            output = "next" if index == len(weights) - 1 else f"g{index}"
            nodes.append(helper.make_node("Gemm", [current, f"w{index}", f"b{index}"],
                                          [output], transB=1))
            current = output
            if index < len(weights) - 1:
                nodes.append(helper.make_node("Tanh", [current], [f"h{index}"]))
                current = f"h{index}"
        graph = helper.make_graph(
            nodes, "level",
            [helper.make_tensor_value_info("state", TensorProto.FLOAT, ["batch", dim])],
            [helper.make_tensor_value_info("next", TensorProto.FLOAT, ["batch", dim])],
            initializer=inits)
        model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
        model.ir_version = 8
        files[stride] = model.SerializeToString()
    manifest = Manifest(state_names=tuple(f"x{i}" for i in range(dim)),
                        state_units=("",) * dim, base_step=0.1, mean=(0.5,) * dim,
                        scale=(2.0,) * dim,
                        levels=tuple(LevelEntry(stride=s, file="", sha256="0" * 64)
                                     for s in strides))
    return write_bundle(out, manifest, files), files


def edit_manifest(bundle: Path, change) -> None:
    path = bundle / "manifest.json"
    document = json.loads(path.read_text())
    change(document)
    path.write_text(json.dumps(document))


# --- protobuf wire format (the protobuf "Encoding" guide) ------------------------------------

# Minimal encoder, written from the protobuf encoding guide, for crafting (faulty) inputs.
# Minimal encoder, written from the protobuf encoding guide, for crafting (faulty) inputs.
def varint(value: int) -> bytes:
    value &= (1 << 64) - 1
    out = bytearray()
    while True:
        low, value = value & 0x7F, value >> 7
        out.append(low | (0x80 if value else 0))
        if not value:
            return bytes(out)


def tag(number: int, wire: int) -> bytes:
    return varint(number << 3 | wire)


def length_delimited(number: int, payload: bytes) -> bytes:
    return tag(number, 2) + varint(len(payload)) + payload


# --- model bytes ----------------------------------------------------------------------------

def model_bytes(graph_extra: bytes = b"", *, nodes=(), initializers=()) -> bytes:
    """A serialized model whose GraphProto (field 7) ends with `graph_extra` appended raw."""
    graph = helper.make_graph(list(nodes), "g", [], [], initializer=list(initializers))
    bare = helper.make_model(helper.make_graph([], "g", [], []),
                             opset_imports=[helper.make_opsetid("", 17)])
    bare.ClearField("graph")
    return bare.SerializeToString() + length_delimited(7, graph.SerializeToString()
                                                       + graph_extra)


def tensor_model(tensor_bytes: bytes) -> bytes:
    """A model whose only initializer is the serialized TensorProto `tensor_bytes`."""
    return model_bytes(length_delimited(5, tensor_bytes))


def node_model(node: onnx.NodeProto) -> bytes:
    return model_bytes(nodes=[node])


def small_model() -> bytes:
    weight = numpy_helper.from_array(np.arange(4, dtype=np.float32).reshape(2, 2), "w")
    node = helper.make_node("Gemm", ["x", "w"], ["y"], name="g", alpha=0.5, transB=1,
                            perm=[1, 0])
    graph = helper.make_graph(
        [node], "small", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["n", 2])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, ["n", 2])],
        initializer=[weight, helper.make_tensor("i", TensorProto.INT64, [2], [-1, 300])])
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]
                             ).SerializeToString()


SMALL = small_model()


def mutate(data: bytes, edits) -> bytes:
    buffer = bytearray(data)
    for kind, position, payload in edits:
        position %= len(buffer) + 1
        if kind == "flip":
            if position < len(buffer):
                buffer[position] ^= payload[0] or 1
        elif kind == "insert":
            buffer[position:position] = payload
        elif kind == "delete":
            del buffer[position:position + len(payload)]
        else:  # a huge varint: 2^64 - 1, or a length of about 2^62
            buffer[position:position + 1] = (b"\xff" * 9 + b"\x01" if payload[:1] < b"\x80"
                                             else b"\xff" * 8 + b"\x3f")
    return bytes(buffer)


# --- the single-node operator harness ---------------------------------------------------------

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


def older_crane_bundle(out: Path) -> Path:
    """The shipped crane bundle as bundles were written before the optional `validation` block
    and envelope samples existed (format version 1 all the same): a copy with both removed."""
    from stridecast import demo_bundle

    shutil.copytree(demo_bundle(), out)
    path = out / "manifest.json"
    document = json.loads(path.read_text(encoding="utf-8"))
    document.pop("validation", None)
    (document.get("envelope") or {}).pop("samples", None)
    path.write_text(json.dumps(document, indent=2), encoding="utf-8")
    shutil.rmtree(out / "envelope", ignore_errors=True)
    return out


@pytest.fixture(autouse=True)
def private_cache(tmp_path, monkeypatch):
    """The caution's session marker in a temporary cache folder (autouse where a conftest
    imports it): never the user's real ~/.cache; each test starts a fresh session of use."""
    folder = tmp_path / "cache"
    monkeypatch.setenv("XDG_CACHE_HOME", str(folder))
    return folder
