"""Level kernels: one network step in physical units, on a fast path where the graph allows.

A kernel maps states x (B, d) to x after one stride. The fast path recognises chains of affine
layers and activations, folds the manifest normalisation into the first and last affine layers,
and reuses per-thread buffers; every other graph runs in the generic interpreter.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from .graph import BoundNode, Program
from .threads import ThreadPolicy

# Activations that NumPy can apply in place without temporaries.
_IN_PLACE: dict[str, Callable[[np.ndarray], object]] = {
    "Tanh": lambda h: np.tanh(h, out=h),
    "Relu": lambda h: np.maximum(h, 0, out=h),
    "Identity": lambda h: None,
}
_ACTIVATIONS = {
    "Tanh", "Relu", "Sigmoid", "LeakyRelu", "Elu", "Selu", "Softplus", "Mish", "Gelu",
    "HardSigmoid", "HardSwish", "Identity",
}
_BUFFER_CACHE_SIZE = 4
# Shape-preserving ops that may be fused into one activation stage (with scalar constants).
_ELEMENTWISE = _ACTIVATIONS | {
    "Mul", "Add", "Sub", "Div", "Where", "Greater", "Less", "Exp", "Log", "Neg", "Abs", "Erf",
    "Sqrt", "Pow", "Clip", "Min", "Max", "Reciprocal", "Softsign",
}
# Up to this batch size the bias rides inside the matrix product (fewer NumPy calls).
SMALL_BATCH = 16


@dataclass(frozen=True)
class Affine:
    """h @ weight + bias, with weight (in, out) C-contiguous."""

    weight: np.ndarray
    bias: np.ndarray | None


@dataclass(frozen=True)
class Activation:
    op_type: str
    function: Callable[[np.ndarray], object]  # works in place on its argument


Stage = Affine | Activation


class GenericKernel:
    """Runs the interpreter on normalised states and applies the update form.

    With a thread policy, large batches run with BLAS at one thread; they are never split,
    since a general graph may mix the rows of a batch.
    """

    path = "interpreter"

    def __init__(self, program: Program, mean: np.ndarray, scale: np.ndarray, update: str,
                 policy: ThreadPolicy | None = None):
        self.program = program
        self.mean = mean
        self.scale = scale
        self.update = update
        self.policy = policy

    def __call__(self, state: np.ndarray) -> np.ndarray:
        policy = self.policy
        if policy is not None and policy.applies(state.shape[0]):
            return policy.run(self._run, state, splittable=False)
        return self._run(state)

    def _run(self, state: np.ndarray) -> np.ndarray:
        normalised = (state - self.mean) / self.scale
        network = np.asarray(self.program.run(normalised))
        if network.shape != state.shape:
            return network  # the caller reports the shape mismatch
        if self.update == "increment":
            return state + self.scale * network
        return self.mean + self.scale * network


class ChainKernel:
    """Affine+activation chain with normalisation folded into the end layers.

    Small batches run with the bias folded into the weights (a constant-one column appended to
    each activation buffer), which halves the number of NumPy calls per layer; large batches run
    with plain contiguous buffers, where BLAS throughput matters more than call overhead.
    With a thread policy, large batches run with BLAS at one thread and are split by rows over
    the policy's threads (every stage maps rows independently).
    """

    path = "affine-chain"

    def __init__(self, stages: Sequence[Stage], *, residual: bool,
                 input_shift: np.ndarray | None, input_scale: np.ndarray | None,
                 policy: ThreadPolicy | None = None):
        self.residual = residual
        self.policy = policy
        # Only set when the first stage is not affine, so the normalisation cannot be folded.
        self.input_shift = input_shift
        self.input_scale = input_scale
        leading, layers = _group_layers(tuple(stages))
        self.augmented = tuple(
            np.ascontiguousarray(np.vstack([
                layer.weight,
                (np.zeros(layer.weight.shape[1], layer.weight.dtype) if layer.bias is None
                 else layer.bias)[None, :],
            ]))
            for layer, _ in layers
        )
        # One copy of the weights: the large-batch path reads views of the augmented
        # matrices (the first rows are the weight, C-contiguous; the last row is the bias).
        self.leading = leading
        self.layers = tuple(
            (Affine(weights[:-1], None if layer.bias is None else weights[-1]), activations)
            for weights, (layer, activations) in zip(self.augmented, layers, strict=True))
        self.stages = (*leading, *(stage for layer, activations in self.layers
                                   for stage in (layer, *activations)))
        self._local = threading.local()
        # One state takes the 1-D path unless something must happen before the first product.
        self.vector_path = input_shift is None and not leading

    def _cache(self) -> OrderedDict:
        cache = getattr(self._local, "cache", None)
        if cache is None:
            cache = self._local.cache = OrderedDict()
        return cache

    def _buffers(self, batch: int) -> tuple[np.ndarray, ...]:
        cache = self._cache()
        buffers = cache.get(batch)
        if buffers is None:
            if batch <= SMALL_BATCH:
                # Width + 1 columns; the last stays 1 and multiplies the bias row.
                first = self.augmented[0].shape[0] - 1
                widths = [first] + [w.shape[1] for w in self.augmented[:-1]]
                buffers = tuple(np.ones((batch, width + 1), dtype=self.augmented[0].dtype)
                                for width in widths)
            else:
                buffers = tuple(np.empty((batch, layer.weight.shape[1]), layer.weight.dtype)
                                for layer, _ in self.layers[:-1])
            cache[batch] = buffers
            if len(cache) > _BUFFER_CACHE_SIZE:
                cache.popitem(last=False)
        else:
            cache.move_to_end(batch)
        return buffers

    def _vector_plan(self) -> tuple:
        """Per-thread 1-D buffers for `_single`, laid out as the steps it runs.

        Returns ``(first, steps, last)``: `first` is where the state is copied (the first
        buffer less its constant-one entry); each step is ``(source, weights, out,
        activations, target)``, the product ``source @ weights`` written into `out` (a view
        of the next buffer, whose last entry stays 1 and multiplies the next bias row) and
        the activations applied in place to `target`, the same memory as (1, width), as at
        any batch; `last` is ``(source, weights, activations)`` of the final layer, whose
        result is a fresh array since it leaves the kernel.
        """
        plan = getattr(self._local, "vector_plan", None)
        if plan is None:
            first = self.augmented[0].shape[0] - 1
            widths = [first] + [w.shape[1] for w in self.augmented[:-1]]
            buffers = [np.ones(width + 1, dtype=self.augmented[0].dtype) for width in widths]
            steps = tuple(
                (buffers[index], weights, buffers[index + 1][:-1],
                 tuple(a.function for a in self.layers[index][1]),
                 buffers[index + 1][None, :-1])
                for index, weights in enumerate(self.augmented[:-1]))
            last = (buffers[-1], self.augmented[-1],
                    tuple(a.function for a in self.layers[-1][1]))
            plan = self._local.vector_plan = (buffers[0][:-1], steps, last)
        return plan

    def _single(self, state: np.ndarray) -> np.ndarray:
        """One state: 1-D products (matrix-vector, gemv) with the bias row folded in.

        At batch 1 the cost is NumPy call overhead, not arithmetic; vectors avoid the 2-D
        slicing and let BLAS use its matrix-vector kernel, and the loop runs over prepared
        steps so that each layer costs one product and its activations, little else.
        """
        first, steps, (source, weights, activations) = self._vector_plan()
        row = state[0]
        first[...] = row
        dot = np.dot
        for step_source, step_weights, out, step_activations, target in steps:
            dot(step_source, step_weights, out=out)
            for activation in step_activations:
                activation(target)
        hidden = dot(source, weights)  # fresh: the result leaves the kernel
        target = hidden[None, :]
        for activation in activations:
            activation(target)
        if self.residual:
            hidden += row
        return target

    def __call__(self, state: np.ndarray) -> np.ndarray:
        if state.shape[0] == 1 and self.vector_path:
            return self._single(state)
        policy = self.policy
        if policy is not None and policy.applies(state.shape[0]):
            return policy.run(self._batch, state, splittable=True)
        return self._batch(state)

    def _batch(self, state: np.ndarray) -> np.ndarray:
        """Any batch of two or more states (or one, when the vector path does not apply)."""
        hidden = state
        if self.input_shift is not None:
            hidden = (state - self.input_shift) / self.input_scale
        for activation in self.leading:
            hidden = hidden.copy() if hidden is state else hidden
            activation.function(hidden)
        batch = state.shape[0]
        buffers = self._buffers(batch)
        last = len(self.layers) - 1
        if batch <= SMALL_BATCH:
            inputs = buffers[0]
            inputs[:, :-1] = hidden
            hidden = inputs
            for index, (weights, (_, activations)) in enumerate(
                    zip(self.augmented, self.layers, strict=True)):
                if index == last:
                    hidden = np.matmul(hidden, weights)
                    target = hidden
                else:
                    target = buffers[index + 1][:, :-1]
                    np.matmul(hidden, weights, out=target)
                    hidden = buffers[index + 1]
                for activation in activations:
                    activation.function(target)
        else:
            for index, (layer, activations) in enumerate(self.layers):
                out = None if index == last else buffers[index]
                hidden = np.matmul(hidden, layer.weight, out=out)
                if layer.bias is not None:
                    hidden += layer.bias
                for activation in activations:
                    activation.function(hidden)
        if self.residual:
            hidden += state
        return hidden


Layer = tuple[Affine, tuple[Activation, ...]]


def _group_layers(stages: Sequence[Stage]) -> tuple[tuple[Activation, ...], tuple[Layer, ...]]:
    """Split stages into leading activations and (affine, following activations) layers."""
    leading: list[Activation] = []
    layers: list[tuple[Affine, list[Activation]]] = []
    for stage in stages:
        if isinstance(stage, Affine):
            layers.append((stage, []))
        elif layers:
            layers[-1][1].append(stage)
        else:
            leading.append(stage)
    return tuple(leading), tuple((affine, tuple(acts)) for affine, acts in layers)


def make_kernel(program: Program, *, mean: Sequence[float], scale: Sequence[float],
                update: str, fast_path: bool = True, policy: ThreadPolicy | None = None
                ) -> GenericKernel | ChainKernel:
    """Build the kernel of one level: the fast chain where recognised, else the interpreter.

    `policy` (shared by the levels of one stepper) decides how large batches use threads;
    None runs every batch as called, with BLAS as the process has it.
    """
    dtype = program.dtype
    mean_array = np.asarray(mean, dtype=dtype)
    scale_array = np.asarray(scale, dtype=dtype)
    if fast_path:
        stages = recognise_chain(program)
        if stages is not None and _widths_chain(stages, mean_array.size):
            return _fold_normalisation(stages, mean_array, scale_array, update, dtype,
                                       policy)
    return GenericKernel(program, mean_array, scale_array, update, policy)


def _widths_chain(stages: Sequence[Stage], dim: int) -> bool:
    """Whether the affine layers map dim → … → dim; if not, the interpreter reports it."""
    width = dim
    for stage in stages:
        if isinstance(stage, Affine):
            if stage.weight.shape[0] != width:
                return False
            width = stage.weight.shape[1]
    return width == dim


def recognise_chain(program: Program) -> list[Stage] | None:
    """Return the stages if the program is a single chain of affine layers and activations."""
    constants = program.constants
    current = program.input_name
    stages: list[Stage] = []
    consumers: dict[str, int] = {}
    for bound in program.nodes:
        for name in bound.node.inputs:
            consumers[name] = consumers.get(name, 0) + 1
    nodes = program.nodes
    index = 0
    while index < len(nodes):
        bound = nodes[index]
        node = bound.node
        if current != program.input_name and consumers.get(current, 0) != 1:
            block = _elementwise_block(nodes, index, current, constants, program.output_name)
            if block is None:
                return None
            stages.append(block[0])
            index, current = block[1], block[2]
            continue
        stage = None
        if len(node.outputs) == 1 and current in node.inputs[:2]:
            stage = _stage_of(bound, current, constants, stages)
        if stage is None:
            block = _elementwise_block(nodes, index, current, constants, program.output_name)
            if block is None:
                return None
            stages.append(block[0])
            index, current = block[1], block[2]
            continue
        if stage != "merged":
            stages.append(stage)
        current = node.outputs[0]
        index += 1
    if current != program.output_name or not any(isinstance(s, Affine) for s in stages):
        return None
    return stages


def _stage_of(bound: BoundNode, current: str, constants, stages: list[Stage]):
    node = bound.node
    attributes = dict(bound.attributes)
    others = [name for name in node.inputs if name and name != current]
    if any(name not in constants for name in others):
        return None
    if node.op_type == "Gemm":
        if (attributes.get("transA", 0) or len(node.inputs) < 2 or node.inputs[0] != current
                or current in node.inputs[1:]):
            return None
        weight = constants[node.inputs[1]]
        if weight.ndim != 2:
            return None
        if attributes.get("transB", 0):
            weight = weight.T
        weight = weight * weight.dtype.type(attributes.get("alpha", 1.0))
        bias = None
        if len(node.inputs) > 2 and node.inputs[2]:
            bias = _bias_vector(constants[node.inputs[2]], weight.shape[1])
            if bias is None:
                return None
            bias = bias * bias.dtype.type(attributes.get("beta", 1.0))
        return Affine(np.ascontiguousarray(weight), bias)
    if node.op_type == "MatMul":
        weight = constants[node.inputs[1]] if node.inputs[0] == current else None
        if weight is None or weight.ndim != 2 or node.inputs[1] == current:
            return None
        return Affine(np.ascontiguousarray(weight), None)
    if node.op_type == "Add":
        last = stages[-1] if stages else None
        if not isinstance(last, Affine) or last.bias is not None or len(others) != 1:
            return None
        bias = _bias_vector(constants[others[0]], last.weight.shape[1])
        if bias is None:
            return None
        stages[-1] = Affine(last.weight, bias)
        return "merged"
    if node.op_type in _ACTIVATIONS and node.inputs == (current,):
        function = _IN_PLACE.get(node.op_type)
        if function is None:
            operator, attrs = bound.function, attributes

            def function(h, operator=operator, attrs=attrs):
                h[...] = operator(h, **attrs)
        if node.op_type == "Identity":
            return "merged"
        return Activation(node.op_type, function)
    return None


def _elementwise_block(nodes: Sequence[BoundNode], start: int, current: str, constants,
                       output_name: str) -> tuple[Activation, int, str] | None:
    """Fuse a run of elementwise nodes with one input and one escaping value (e.g. SiLU as
    Sigmoid then Mul, or a thresholded Softplus) into one activation stage."""
    produced: set[str] = set()
    block: list[BoundNode] = []
    for end in range(start, len(nodes)):
        bound = nodes[end]
        node = bound.node
        if node.op_type not in _ELEMENTWISE or len(node.outputs) != 1:
            return None
        for name in node.inputs:
            if not name or name == current or name in produced:
                continue
            if name not in constants or constants[name].size != 1:
                return None
        block.append(bound)
        produced.add(node.outputs[0])
        later = {name for b in nodes[end + 1:] for name in b.node.inputs}
        escaping = {name for name in produced if name in later or name == output_name}
        if current not in later and escaping == {node.outputs[0]}:
            return Activation("+".join(b.node.op_type for b in block),
                              _block_function(tuple(block), current, constants)), end + 1, \
                node.outputs[0]
    return None


def _block_function(block: tuple[BoundNode, ...], input_name: str, constants):
    result_name = block[-1].node.outputs[0]

    def function(h: np.ndarray) -> None:
        values = {input_name: h}
        for bound in block:
            arguments = [values[n] if n in values else constants.get(n) if n else None
                         for n in bound.node.inputs]
            values[bound.node.outputs[0]] = bound.function(*arguments, **bound.attributes)
        h[...] = values[result_name]

    return function


def _bias_vector(value: np.ndarray, width: int) -> np.ndarray | None:
    if value.size == 1:
        return np.full(width, value.reshape(()), dtype=value.dtype)
    if value.shape in ((width,), (1, width)):
        return np.ascontiguousarray(value.reshape(width))
    return None


def _fold_normalisation(stages: list[Stage], mean: np.ndarray, scale: np.ndarray, update: str,
                        dtype: np.dtype, policy: ThreadPolicy | None = None) -> ChainKernel:
    """Fold z = (x − mean)/scale into the first affine and x' = … into the last."""
    stages = list(stages)
    # Fold in float64 so the folded weights are as close as possible to the exact product.
    mean64, scale64 = mean.astype(np.float64), scale.astype(np.float64)
    input_shift = input_scale = None
    if isinstance(stages[0], Affine):
        first = stages[0]
        weight = first.weight.astype(np.float64)
        bias = np.zeros(weight.shape[1]) if first.bias is None else first.bias.astype(np.float64)
        stages[0] = Affine(weight / scale64[:, None], bias - (mean64 / scale64) @ weight)
    else:
        input_shift, input_scale = mean, scale
    residual = update == "increment"
    if isinstance(stages[-1], Affine):
        last = stages[-1]
        weight = last.weight.astype(np.float64)
        bias = np.zeros(weight.shape[1]) if last.bias is None else last.bias.astype(np.float64)
        weight = weight * scale64[None, :]
        bias = bias * scale64 if residual else bias * scale64 + mean64
        stages[-1] = Affine(weight, bias)
    else:
        # An activation ends the chain: apply the output side explicitly.
        stages.append(Affine(np.diag(scale64), None if residual else mean64))
    stages = [
        Affine(np.ascontiguousarray(s.weight, dtype=dtype),
               None if s.bias is None else np.ascontiguousarray(s.bias, dtype=dtype))
        if isinstance(s, Affine) else s
        for s in stages
    ]
    return ChainKernel(stages, residual=residual, input_shift=input_shift,
                       input_scale=input_scale, policy=policy)
