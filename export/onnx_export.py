"""One level to ONNX bytes: prepare the torch object, export it, and normalise the graph.

The result always honours the level contract of the bundle format: one float32 input
`state` of shape (batch, d) with a symbolic batch axis, one output `next` of the same shape,
local functions inlined, weights stored inside the model.
"""

from __future__ import annotations

import contextlib
import copy
import io
import logging
import warnings
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import onnx
import onnx.inliner
import torch

from stridecast.runtime.errors import BundleError

logger = logging.getLogger(__name__)

INPUT_NAME = "state"
OUTPUT_NAME = "next"
# An example batch larger than one, so no exporter can specialise the batch axis to 1.
EXAMPLE_BATCH = 8
# Loggers that report on optional parts (torchvision), retries and optimiser passes while
# exporting, with the level each is held at meanwhile.
_NOISY_LOGGERS = {"torch.onnx": logging.ERROR, "torch.export": logging.ERROR,
                  "torch._export": logging.ERROR, "onnxscript": logging.WARNING,
                  "onnx_ir": logging.WARNING}


@dataclass(frozen=True)
class PreparedLevel:
    """A level ready to export: what to hand the exporter and how to evaluate it in torch."""

    stride: int
    kind: str  # "module", "script" (TorchScript) or "program" (torch.export)
    source: Any
    call: Callable[[torch.Tensor], torch.Tensor]


@dataclass(frozen=True)
class ExportedLevel:
    """The serialized ONNX model of one level and how it was made."""

    stride: int
    onnx_bytes: bytes
    exporter: str
    opset: int
    operators: tuple[str, ...]


def infer_state_dim(level: Any) -> int | None:
    """Guess d from a program's input shape or a module's first `in_features`, if any."""
    if isinstance(level, torch.export.ExportedProgram):
        shape = _program_input_shape(level)
        return int(shape[-1]) if shape is not None and isinstance(shape[-1], int) else None
    if isinstance(level, torch.nn.Module):
        for sub in level.modules():
            features = getattr(sub, "in_features", None)
            if isinstance(features, int) and features > 0:
                return features
    return None


def prepare_level(stride: int, level: Any, state_dim: int,
                  example: torch.Tensor, *, where: str | None = None,
                  output_dim: int | None = None) -> PreparedLevel:
    """Copy the module to float32 eval mode (or wrap a program) and check its output shape.

    Parameters
    ----------
    stride : int
        Only for messages.
    level : torch.nn.Module or torch.export.ExportedProgram
        The network N of the level, mapping (B, d) to (B, d) in normalised units.
    state_dim : int
        d.
    example : torch.Tensor, shape (EXAMPLE_BATCH, d), float32
        States in normalised units used for the shape check (and later as export example).
    where : str, optional
        How messages name the network (default "level stride N"; e.g. "the encoder").
    output_dim : int, optional
        The width of the output when it differs from the input's (an encoder maps d to the
        latent r, a decoder r to d); default `state_dim`.
    """
    where = f"level stride {stride}" if where is None else where
    if isinstance(level, torch.export.ExportedProgram):
        shape = _program_input_shape(level)
        if shape is not None and len(shape) == 2 and isinstance(shape[0], int):
            raise BundleError(
                f"{where}: the torch.export program has a fixed batch size of {shape[0]}; "
                "re-export it with dynamic_shapes={0: torch.export.Dim('batch')} on the input."
            )
        kind, source, call = "program", level, level.module()
    elif isinstance(level, torch.nn.Module):
        kind = "script" if isinstance(level, torch.jit.ScriptModule) else "module"
        try:
            # A copy: converting to float32 and eval mode must not change the caller's module.
            with quiet_torch():
                source = copy.deepcopy(level).float().eval()
        except (RuntimeError, TypeError) as error:
            raise BundleError(f"{where}: the module cannot be copied for export: {error}.") \
                from error
        call = source
    else:
        raise BundleError(
            f"{where} is a {type(level).__name__}; expected a torch.nn.Module or a "
            "torch.export.ExportedProgram."
        )
    _check_output(where, call, example, state_dim if output_dim is None else output_dim)
    return PreparedLevel(stride=stride, kind=kind, source=source, call=call)


def resolve_exporter(prepared: PreparedLevel, exporter: str) -> str:
    """The exporter actually used for a level under the requested choice."""
    if prepared.kind == "script":
        if exporter == "dynamo":
            raise BundleError(
                f"level stride {prepared.stride} is a TorchScript module, which the dynamo "
                "exporter cannot trace; use exporter='legacy' or 'auto'."
            )
        return "legacy"
    if prepared.kind == "program" and exporter == "legacy":
        raise BundleError(
            f"level stride {prepared.stride} is a torch.export program, which only the dynamo "
            "exporter takes; use exporter='dynamo' or 'auto'."
        )
    return "dynamo" if exporter == "auto" else exporter


def export_level(prepared: PreparedLevel, *, state_dim: int, exporter: str, example: torch.Tensor,
                 opset: int | None = None, where: str | None = None,
                 output_dim: int | None = None) -> ExportedLevel:
    """Export one prepared level to in-memory ONNX bytes honouring the level contract
    (`where` and `output_dim` as for `prepare_level`, for an encoder or decoder)."""
    chosen = resolve_exporter(prepared, exporter)
    where = f"level stride {prepared.stride}" if where is None else where
    with quiet_torch():
        try:
            if chosen == "dynamo":
                model = _export_dynamo(prepared, example, opset)
            else:
                model = _export_legacy(prepared, example, opset)
        # torch raises many unrelated types from deep inside tracing; name the level and
        # keep the original as the cause.
        except Exception as error:
            raise BundleError(
                f"{where}: the {chosen} exporter failed: {_summary(error)}."
            ) from error
    model = normalise_model(model, where=where, state_dim=state_dim, output_dim=output_dim)
    opset_version = next(
        (entry.version for entry in model.opset_import if entry.domain in ("", "ai.onnx")), 0)
    return ExportedLevel(
        stride=prepared.stride, onnx_bytes=model.SerializeToString(), exporter=chosen,
        opset=int(opset_version), operators=tuple(node.op_type for node in model.graph.node),
    )


def normalise_model(model: onnx.ModelProto, *, where: str, state_dim: int,
                    output_dim: int | None = None) -> onnx.ModelProto:
    """Inline local functions, name the input/output per contract, and check shapes (input
    width `state_dim`, output width `output_dim`, by default the same)."""
    if len(model.functions):
        model = onnx.inliner.inline_local_functions(model)
        del model.functions[:]
        # The functions' domains are no longer used; a reader need not know them.
        used = {node.domain for node in model.graph.node} | {"", "ai.onnx"}
        kept = [entry for entry in model.opset_import if entry.domain in used]
        del model.opset_import[:]
        model.opset_import.extend(kept)
    graph = model.graph
    initializer_names = {tensor.name for tensor in graph.initializer}
    inputs = [value for value in graph.input if value.name not in initializer_names]
    if len(inputs) != 1 or len(graph.output) != 1:
        raise BundleError(
            f"{where}: the exported graph has {len(inputs)} inputs and {len(graph.output)} "
            "outputs; a level must have exactly one of each."
        )
    _rename_value(graph, inputs[0].name, INPUT_NAME)
    _rename_value(graph, graph.output[0].name, OUTPUT_NAME)
    widths = (state_dim, state_dim if output_dim is None else output_dim)
    for value, width in zip((inputs[0], graph.output[0]), widths, strict=True):
        _check_value_type(value, where=where, state_dim=width)
    onnx.checker.check_model(model)
    return model


def _export_dynamo(prepared: PreparedLevel, example: torch.Tensor,
                   opset: int | None) -> onnx.ModelProto:
    options: dict[str, Any] = {}
    if prepared.kind != "program":
        options["dynamic_shapes"] = ({0: torch.export.Dim("batch")},)
    program = torch.onnx.export(
        prepared.source, (example,), dynamo=True, input_names=[INPUT_NAME],
        output_names=[OUTPUT_NAME], opset_version=opset, verbose=False, optimize=True,
        **options,
    )
    return program.model_proto


def _export_legacy(prepared: PreparedLevel, example: torch.Tensor,
                   opset: int | None) -> onnx.ModelProto:
    buffer = io.BytesIO()
    options: dict[str, Any] = {} if opset is None else {"opset_version": opset}
    torch.onnx.export(
        prepared.source, (example,), buffer, dynamo=False, input_names=[INPUT_NAME],
        output_names=[OUTPUT_NAME], dynamic_axes={INPUT_NAME: {0: "batch"},
                                                  OUTPUT_NAME: {0: "batch"}},
        do_constant_folding=True, **options,
    )
    return onnx.load_from_string(buffer.getvalue())


def _check_output(where: str, call: Callable, example: torch.Tensor, state_dim: int) -> None:
    with torch.no_grad():
        try:
            result = call(example)
        # User code may raise anything; name the level and keep the original as the cause.
        except Exception as error:
            raise BundleError(
                f"{where}: calling the module on a float32 batch of shape "
                f"{tuple(example.shape)} failed: {_summary(error)}."
            ) from error
    if not isinstance(result, torch.Tensor):
        raise BundleError(
            f"{where}: the module returned a {type(result).__name__}; expected one tensor "
            f"of shape (batch, {state_dim})."
        )
    expected = (example.shape[0], state_dim)
    if tuple(result.shape) != expected:
        kind = ("a (B, d) → (B, d) map" if state_dim == example.shape[1]
                else f"a (B, {example.shape[1]}) → (B, {state_dim}) map")
        raise BundleError(
            f"{where}: the module maps a batch of shape {tuple(example.shape)} to shape "
            f"{tuple(result.shape)}; expected {expected} ({kind})."
        )
    if result.dtype != torch.float32:
        raise BundleError(
            f"{where}: the module returns {result.dtype} for float32 input; export it in "
            "float32."
        )


def _summary(error: BaseException) -> str:
    """Type and first line of an error from torch (whose messages run to many lines)."""
    lines = str(error).strip().splitlines()
    first = lines[0].rstrip(".") if lines else ""
    return f"{type(error).__name__}: {first}" if first else type(error).__name__


def _program_input_shape(program: torch.export.ExportedProgram
                         ) -> tuple[int | str, ...] | None:
    user_inputs = set(program.graph_signature.user_inputs)
    for node in program.graph.nodes:
        if node.op == "placeholder" and node.name in user_inputs:
            value = node.meta.get("val")
            if value is None or not hasattr(value, "shape"):
                return None
            return tuple(int(size) if isinstance(size, int) else str(size)
                         for size in value.shape)
    return None


def _rename_value(graph: onnx.GraphProto, old: str, new: str) -> None:
    if old == new:
        return
    for collection in (graph.input, graph.output, graph.value_info):
        for value in collection:
            if value.name == old:
                value.name = new
    for node in graph.node:
        for index, name in enumerate(node.input):
            if name == old:
                node.input[index] = new
        for index, name in enumerate(node.output):
            if name == old:
                node.output[index] = new


def _check_value_type(value: onnx.ValueInfoProto, *, where: str, state_dim: int) -> None:
    tensor_type = value.type.tensor_type
    if tensor_type.elem_type != onnx.TensorProto.FLOAT:
        raise BundleError(
            f"{where}: graph value {value.name!r} has element type "
            f"{onnx.TensorProto.DataType.Name(tensor_type.elem_type)}; expected FLOAT."
        )
    if not tensor_type.HasField("shape"):
        return
    dims = tensor_type.shape.dim
    if len(dims) != 2:
        raise BundleError(f"{where}: graph value {value.name!r} has rank {len(dims)}; expected 2.")
    if dims[0].HasField("dim_value"):
        raise BundleError(
            f"{where}: graph value {value.name!r} has a fixed batch size {dims[0].dim_value}; "
            "the batch axis must be dynamic."
        )
    if dims[1].HasField("dim_value") and dims[1].dim_value != state_dim:
        raise BundleError(
            f"{where}: graph value {value.name!r} has {dims[1].dim_value} components; "
            f"expected {state_dim}."
        )


@contextlib.contextmanager
def quiet_torch() -> Iterator[None]:
    """Silence torch's chatter while exporting or loading; log warnings instead of showing them.

    The legacy exporter's deprecation notice and torchvision hints are noise here; a
    `TracerWarning` can mean a branch was frozen into the graph, so it is logged.
    """
    saved = {name: logging.getLogger(name).level for name in _NOISY_LOGGERS}
    for name, level in _NOISY_LOGGERS.items():
        logging.getLogger(name).setLevel(level)
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            yield
    finally:
        for name, level in saved.items():
            logging.getLogger(name).setLevel(level)
    for warning in caught:
        level = logging.WARNING if warning.category.__name__ == "TracerWarning" else logging.DEBUG
        logger.log(level, "exporter: %s: %s", warning.category.__name__, warning.message)
