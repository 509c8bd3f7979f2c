"""The reference model of the benchmark, and torch twins of bundle levels.

The reference model is what the issue describes: d = 4, three hidden layers of 128 with tanh,
increment levels at strides 1, 2, 4, …, 1024, random weights with a small output layer so long
rollouts stay finite, float32. Its ONNX files are written with `onnx.helper` from the torch
weights (Gemm with transB=1 and Tanh, as torch's exporter emits for `nn.Linear`), which takes
milliseconds; `via_export=True` goes through `stridecast.export.export_bundle` instead (slow:
it runs torch's exporter and verifies every level).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import onnx
import torch
from onnx import TensorProto, helper, numpy_helper
from torch import nn

from stridecast.runtime import LevelEntry, Manifest, load, write_bundle

REFERENCE_STRIDES = tuple(2**power for power in range(11))
REFERENCE_HIDDEN = (128, 128, 128)
REFERENCE_STATE_DIM = 4
# Base step of 10 ms: about 40 steps per bob of the crane scenario, and stride 1024 ≈ one swing,
# so the reference model reaches the same times as the solver comparison.
REFERENCE_BASE_STEP = 0.01
# A non-trivial normalisation, so every competitor has to apply it (the runtime folds it in).
REFERENCE_MEAN = (0.5, -24.0, 0.0, 0.1)
REFERENCE_SCALE = (2.0, 0.5, 1.5, 0.25)
# Output-layer gain: increments of a few thousandths in normalised units per step, so even
# 10,000 finest steps stay finite (tanh bounds every increment).
OUTPUT_GAIN = 1e-2
OPSET = 17
PLACEHOLDER_SHA = "0" * 64

_TORCH_ACTIVATIONS: dict[type[nn.Module], str] = {
    nn.Tanh: "Tanh", nn.ReLU: "Relu", nn.Sigmoid: "Sigmoid", nn.Identity: "Identity",
}
_ONNX_ACTIVATIONS: dict[str, type[nn.Module]] = {
    "Tanh": nn.Tanh, "Relu": nn.ReLU, "Sigmoid": nn.Sigmoid, "Identity": nn.Identity,
}


@dataclass(frozen=True)
class ReferenceModel:
    """A bundle on disk with the torch modules it was made from.

    Attributes
    ----------
    path : Path
        The bundle directory.
    modules : mapping of int to torch.nn.Module
        Stride → network on normalised states, (B, d) → increment (B, d).
    mean, scale : tuple of float
        The bundle's normalisation.
    """

    path: Path
    modules: Mapping[int, nn.Module]
    mean: tuple[float, ...]
    scale: tuple[float, ...]
    via_export: bool = False

    def describe(self) -> dict[str, object]:
        """JSON-ready description of the model (not its path: that is temporary)."""
        first = next(iter(self.modules.values()))
        hidden = [layer.out_features for layer in list(first)[:-1] if isinstance(layer, nn.Linear)]
        return {"strides": sorted(self.modules), "hidden": hidden,
                "activation": "tanh", "state_dim": len(self.mean), "update": "increment",
                "base_step": REFERENCE_BASE_STEP, "output_gain": OUTPUT_GAIN,
                "onnx_writer": ("stridecast.export.export_bundle" if self.via_export
                                else "onnx.helper (Gemm transB=1 + Tanh)")}


def reference_modules(strides: Sequence[int] = REFERENCE_STRIDES, *,
                      hidden: Sequence[int] = REFERENCE_HIDDEN,
                      state_dim: int = REFERENCE_STATE_DIM, seed: int = 0) -> dict[int, nn.Module]:
    """One seeded tanh MLP per stride, output layer scaled by `OUTPUT_GAIN`, in eval mode."""
    generator_state = torch.random.get_rng_state()
    torch.manual_seed(seed)
    try:
        modules = {}
        for stride in strides:
            layers: list[nn.Module] = []
            width = state_dim
            for size in hidden:
                layers += [nn.Linear(width, size), nn.Tanh()]
                width = size
            last = nn.Linear(width, state_dim)
            with torch.no_grad():
                last.weight.mul_(OUTPUT_GAIN)
                last.bias.mul_(OUTPUT_GAIN)
            layers.append(last)
            modules[int(stride)] = nn.Sequential(*layers).eval()
    finally:
        torch.random.set_rng_state(generator_state)  # leave the caller's torch RNG as it was
    return modules


def onnx_from_sequential(module: nn.Sequential, state_dim: int) -> bytes:
    """ONNX bytes of a Linear/activation chain: Gemm (transB=1) and activation nodes."""
    nodes, initializers = [], []
    current = "state"
    layers = list(module)
    for index, layer in enumerate(layers):
        output = "next" if index == len(layers) - 1 else f"h{index}"
        if isinstance(layer, nn.Linear):
            weight = layer.weight.detach().numpy().astype(np.float32)
            bias = layer.bias.detach().numpy().astype(np.float32)
            initializers += [numpy_helper.from_array(weight, f"w{index}"),
                             numpy_helper.from_array(bias, f"b{index}")]
            nodes.append(helper.make_node("Gemm", [current, f"w{index}", f"b{index}"], [output],
                                          transB=1, name=f"gemm{index}"))
        elif type(layer) in _TORCH_ACTIVATIONS:
            nodes.append(helper.make_node(_TORCH_ACTIVATIONS[type(layer)], [current], [output],
                                          name=f"act{index}"))
        else:
            raise TypeError(f"layer {index} is a {type(layer).__name__}; expected Linear or "
                            f"one of {[t.__name__ for t in _TORCH_ACTIVATIONS]}.")
        current = output
    graph = helper.make_graph(
        nodes, "level",
        [helper.make_tensor_value_info("state", TensorProto.FLOAT, ["batch", state_dim])],
        [helper.make_tensor_value_info("next", TensorProto.FLOAT, ["batch", state_dim])],
        initializer=initializers,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)],
                              producer_name="stridecast-benchmarks")
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model.SerializeToString()


def write_reference_bundle(out: Path, modules: Mapping[int, nn.Module], *,
                           base_step: float = REFERENCE_BASE_STEP,
                           mean: Sequence[float] = REFERENCE_MEAN,
                           scale: Sequence[float] = REFERENCE_SCALE,
                           name: str = "benchmark-reference", via_export: bool = False) -> Path:
    """Write `modules` as an increment bundle at `out` (replacing what is there)."""
    state_dim = len(mean)
    if via_export:
        from stridecast.export import export_bundle

        return export_bundle(dict(modules), out, base_step=base_step, mean=list(mean),
                             scale=list(scale), update="increment", name=name, overwrite=True,
                             verify_samples=64)
    manifest = Manifest(
        state_names=tuple(f"x{i}" for i in range(state_dim)),
        state_units=("",) * state_dim,
        base_step=float(base_step),
        mean=tuple(float(v) for v in mean),
        scale=tuple(float(v) for v in scale),
        levels=tuple(LevelEntry(stride=stride, file="", sha256=PLACEHOLDER_SHA)
                     for stride in sorted(modules)),
        update="increment",
        name=name,
        description="Random small-weight tanh MLPs for benchmarking; not a trained model.",
    )
    files = {stride: onnx_from_sequential(module, state_dim)
             for stride, module in modules.items()}
    return write_bundle(out, manifest, files, overwrite=True)


def build_reference(directory: Path, *, strides: Sequence[int] = REFERENCE_STRIDES,
                    hidden: Sequence[int] = REFERENCE_HIDDEN, via_export: bool = False,
                    seed: int = 0) -> ReferenceModel:
    """Make the reference modules and write their bundle under `directory`."""
    modules = reference_modules(strides, hidden=hidden, seed=seed)
    path = write_reference_bundle(Path(directory) / "reference.bundle", modules,
                                  via_export=via_export)
    return ReferenceModel(path=path, modules=modules, mean=REFERENCE_MEAN, scale=REFERENCE_SCALE,
                          via_export=via_export)


def finest_only_bundle(bundle: Path, out: Path) -> Path:
    """Copy of `bundle` keeping only its finest level: the naive rollout's model."""
    stepper = load(bundle, verify=True)
    manifest = stepper.manifest
    entry = min(manifest.levels, key=lambda level: level.stride)
    level_bytes = (Path(bundle) / entry.file).read_bytes()
    kept = Manifest(
        state_names=manifest.state_names, state_units=manifest.state_units,
        base_step=manifest.base_step, mean=manifest.mean, scale=manifest.scale,
        levels=(LevelEntry(stride=entry.stride, file="", sha256=PLACEHOLDER_SHA,
                           input=entry.input, output=entry.output),),
        update=manifest.update, time_unit=manifest.time_unit,
        name=f"{manifest.name}-finest-only", description="Finest level only (naive rollout).",
    )
    return write_bundle(out, kept, {entry.stride: level_bytes}, overwrite=True)


def torch_from_onnx(path: Path) -> nn.Sequential | None:
    """A torch twin of an ONNX level that is a plain Gemm/MatMul(+Add)/activation chain.

    Returns None for any other graph (the torch competitor is then left out).
    """
    model = onnx.load(str(path))
    constants = {init.name: numpy_helper.to_array(init) for init in model.graph.initializer}
    layers: list[nn.Module] = []
    for node in model.graph.node:
        if node.op_type == "Constant":
            constants[node.output[0]] = numpy_helper.to_array(node.attribute[0].t)
            continue
        attributes = {a.name: helper.get_attribute_value(a) for a in node.attribute}
        if node.op_type == "Gemm" and not attributes.get("transA", 0) \
                and node.input[1] in constants:
            weight = constants[node.input[1]].astype(np.float32)
            weight = weight if attributes.get("transB", 0) else weight.T
            weight = weight * attributes.get("alpha", 1.0)
            bias = None
            if len(node.input) > 2 and node.input[2]:
                bias = np.broadcast_to(constants[node.input[2]] * attributes.get("beta", 1.0),
                                       (weight.shape[0],))
            layers.append(_linear(weight, bias))
        elif node.op_type == "MatMul" and node.input[1] in constants:
            layers.append(_linear(constants[node.input[1]].T, None))
        elif (node.op_type == "Add" and layers and isinstance(layers[-1], nn.Linear)
              and layers[-1].bias is None and node.input[1] in constants):
            last = layers[-1]
            layers[-1] = _linear(last.weight.detach().numpy(), np.broadcast_to(
                constants[node.input[1]], (last.out_features,)))
        elif node.op_type in _ONNX_ACTIVATIONS and not attributes:
            layers.append(_ONNX_ACTIVATIONS[node.op_type]())
        else:
            return None
    return nn.Sequential(*layers).eval() if layers else None


def _linear(weight: np.ndarray, bias: np.ndarray | None) -> nn.Linear:
    out_features, in_features = weight.shape
    layer = nn.Linear(in_features, out_features, bias=bias is not None)
    with torch.no_grad():
        layer.weight.copy_(torch.from_numpy(np.array(weight, dtype=np.float32)))
        if bias is not None:
            layer.bias.copy_(torch.from_numpy(np.array(bias, dtype=np.float32)))
    return layer.eval()


def torch_twins(bundle: Path) -> dict[int, nn.Module] | None:
    """Torch twins of every level of `bundle`, or None if any level is not a plain chain."""
    stepper = load(bundle, verify=False)
    twins = {}
    for entry in stepper.manifest.levels:
        twin = torch_from_onnx(Path(bundle) / entry.file)
        if twin is None:
            return None
        twins[entry.stride] = twin
    return twins
