"""The generic ONNX interpreter: inline local functions, order nodes, fold constants, run.

Any graph built from supported operators runs here; `compile` recognises the common
affine+activation chains and replaces them by a faster path that gives the same numbers.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import ModelFormatError, StridecastError, UnsupportedOperatorError
from .onnx_model import NUMPY_DTYPES, Attribute, Function, Model, Node
from .ops import resolve

_DEFAULT_DOMAINS = ("", "ai.onnx")
_MAX_INLINE_DEPTH = 8


@dataclass(frozen=True)
class BoundNode:
    """A node with its operator resolved and its attributes ready as keyword arguments."""

    node: Node
    function: Callable[..., Any]
    attributes: Mapping[str, Any]


@dataclass(frozen=True)
class Program:
    """An executable graph: constants folded, nodes in order, one input and one output."""

    input_name: str
    output_name: str
    constants: Mapping[str, np.ndarray]
    nodes: tuple[BoundNode, ...]
    dtype: np.dtype
    # For each node, the value names whose last use is that node (freed after it runs).
    releases: tuple[tuple[str, ...], ...] = ()

    def run(self, state: np.ndarray) -> np.ndarray:
        values: dict[str, Any] = dict(self.constants)
        values[self.input_name] = state
        for bound, release in zip(self.nodes, self.releases, strict=True):
            _execute(bound, values)
            for name in release:
                values.pop(name, None)
        return values[self.output_name]


def build_program(model: Model, *, input_name: str, output_name: str,
                  dtype: np.dtype | str = "float32", fold_constants: bool = True,
                  max_nodes: int = 100_000) -> Program:
    """Turn a parsed model into a `Program` computing `output_name` from `input_name`.

    `max_nodes` bounds the graph after local functions are inlined, so a small file cannot
    expand into millions of nodes.
    """
    dtype = np.dtype(dtype)
    graph = model.graph
    graph_inputs = [info.name for info in graph.inputs]
    initializer_names = {tensor.name for tensor in graph.initializers}
    runtime_inputs = [name for name in graph_inputs if name not in initializer_names]
    if runtime_inputs != [input_name]:
        raise ModelFormatError(
            f"the graph's runtime inputs are {runtime_inputs}; a level must have exactly one "
            f"input named {input_name!r} (the manifest's `input`)."
        )
    output_names = [info.name for info in graph.outputs]
    if output_name not in output_names:
        raise ModelFormatError(
            f"the graph's outputs are {output_names}; the manifest expects {output_name!r}."
        )

    bound, constants = _prepare(model, [input_name], [output_name], dtype, max_nodes)
    if fold_constants:
        bound = _fold_constants(bound, constants)
    used = {name for b in bound for name in b.node.inputs} | {output_name}
    constants = {name: value for name, value in constants.items() if name in used}
    return Program(input_name=input_name, output_name=output_name, constants=constants,
                   nodes=tuple(bound), dtype=dtype,
                   releases=_release_schedule(bound, output_name, set(constants)))


def run_graph(model: Model, feeds: Mapping[str, np.ndarray], *,
              dtype: np.dtype | str = "float32", max_nodes: int = 100_000
              ) -> dict[str, np.ndarray]:
    """Run a whole graph once: any number of inputs, every declared output.

    The same interpreter as `build_program` (inlining, ordering, binding in the compute
    precision `dtype`), without constant folding or fast paths; for checking operators on
    multi-input graphs such as the ONNX backend test cases.

    Parameters
    ----------
    model : Model
    feeds : mapping of str to ndarray
        A value for each graph input that no initializer provides; floating feeds are
        converted to `dtype`.
    dtype : dtype or str
        The compute precision of floating tensors (float32 or float64).

    Returns
    -------
    dict of str to ndarray
        Each graph output by name, in the graph's order.
    """
    dtype = np.dtype(dtype)
    graph = model.graph
    initializer_names = {tensor.name for tensor in graph.initializers}
    needed = [info.name for info in graph.inputs if info.name not in initializer_names]
    missing = [name for name in needed if name not in feeds]
    if missing:
        raise ModelFormatError(
            f"`feeds` lacks the graph inputs {missing}; expected a value for each of {needed}."
        )
    output_names = [info.name for info in graph.outputs]
    bound, values = _prepare(model, list(feeds), output_names, dtype, max_nodes)
    values.update({name: _as_compute(np.asarray(value), dtype) for name, value in feeds.items()})
    for item in bound:
        _execute(item, values)
    return {name: values[name] for name in output_names}


def _prepare(model: Model, input_names: list[str], output_names: list[str], dtype: np.dtype,
             max_nodes: int) -> tuple[list[BoundNode], dict[str, np.ndarray]]:
    """Inline, order and bind the nodes the outputs need; the initializers in `dtype`."""
    graph = model.graph
    available = {tensor.name for tensor in graph.initializers} | set(input_names)
    nodes = _inline_functions(graph.nodes, model, budget=_Budget(max_nodes))
    nodes = _topological_order(nodes, available)
    produced = {name for node in nodes for name in node.outputs if name}
    for output_name in output_names:
        if output_name not in produced | available:
            raise ModelFormatError(
                f"the graph declares the output {output_name!r} but no node, initializer or "
                "input produces it."
            )
    nodes = _needed_nodes(nodes, output_names)
    constants = {tensor.name: _as_compute(tensor.array, dtype) for tensor in graph.initializers}
    return [_bind(node, model, dtype) for node in nodes], constants


def _as_compute(array: np.ndarray, dtype: np.dtype) -> np.ndarray:
    # The compute-precision policy (documented in ops/tensors.py): floating initializers,
    # constants and casts follow the requested precision; integers and bools keep their type.
    if array.dtype.kind == "f" and array.dtype != dtype:
        array = array.astype(dtype)
    return array


def _execute(bound: BoundNode, values: dict[str, Any]) -> None:
    node = bound.node
    try:
        arguments = [values[name] if name else None for name in node.inputs]
    except KeyError as error:
        raise ModelFormatError(f"{node.describe()} reads {error.args[0]!r} before it is set.") \
            from error
    try:
        result = bound.function(*arguments, **bound.attributes)
    except StridecastError as error:
        raise ModelFormatError(f"{node.describe()}: {error}") from error
    except (ValueError, TypeError, IndexError) as error:
        shapes = [None if a is None else getattr(a, "shape", None) for a in arguments]
        raise ModelFormatError(
            f"{node.describe()} failed on input shapes {shapes}: {error}."
        ) from error
    results = result if isinstance(result, tuple) else (result,)
    for name, value in zip(node.outputs, results, strict=False):
        if name:
            values[name] = value


def _bind(node: Node, model: Model, dtype: np.dtype) -> BoundNode:
    domain = node.domain or ""
    if domain not in _DEFAULT_DOMAINS:
        raise UnsupportedOperatorError(
            f"{node.describe()} is in domain {domain!r}; only the default ONNX domain and "
            "model-local functions are supported."
        )
    opset = model.opset
    function = resolve(node.op_type, opset, domain="")
    attributes = node.attribute_dict()
    target = NUMPY_DTYPES.get(attributes.get("to", 0), np.dtype("O"))
    if node.op_type == "Cast" and target.kind == "f":
        # Casts between float types follow the compute precision, like the initializers.
        attributes["to"] = 11 if dtype == np.float64 else 1
    if node.op_type == "Constant":
        # value_float(s) would make float32 tensors; give them as `value` in `dtype` instead.
        for name in ("value_float", "value_floats"):
            if name in attributes:
                attributes["value"] = np.asarray(attributes.pop(name), dtype=dtype)
        attributes = {k: _as_compute(v, dtype) if isinstance(v, np.ndarray) else v
                      for k, v in attributes.items()}
    return BoundNode(node=node, function=function, attributes=attributes)


def _fold_constants(bound: list[BoundNode], constants: dict[str, np.ndarray]) -> list[BoundNode]:
    """Evaluate, once, every node whose inputs are all known at load."""
    remaining = []
    for item in bound:
        node = item.node
        if all((not name) or name in constants for name in node.inputs):
            values: dict[str, Any] = constants
            _execute(item, values)
            for name in node.outputs:
                if name and isinstance(values.get(name), np.ndarray):
                    values[name] = np.ascontiguousarray(values[name])
        else:
            remaining.append(item)
    return remaining


def _release_schedule(bound: list[BoundNode], output_name: str, constants: set[str]
                      ) -> tuple[tuple[str, ...], ...]:
    last_use: dict[str, int] = {}
    for index, item in enumerate(bound):
        for name in item.node.inputs:
            if name and name not in constants:
                last_use[name] = index
    schedule: list[list[str]] = [[] for _ in bound]
    for name, index in last_use.items():
        if name != output_name:
            schedule[index].append(name)
    return tuple(tuple(names) for names in schedule)


def _topological_order(nodes: tuple[Node, ...], available: set[str]) -> tuple[Node, ...]:
    """Order nodes so each runs after its producers; refuse cycles, undefined and duplicates."""
    producers: dict[str, int] = {}
    for index, node in enumerate(nodes):
        for name in node.outputs:
            if not name:
                continue
            if name in producers or name in available:
                raise ModelFormatError(
                    f"the value {name!r} is produced twice (by {node.describe()}); "
                    "ONNX graphs must be in single-assignment form."
                )
            producers[name] = index
    for node in nodes:
        for name in node.inputs:
            if name and name not in producers and name not in available:
                raise ModelFormatError(
                    f"{node.describe()} reads {name!r}, which no node, initializer or graph "
                    "input defines."
                )
    ordered: list[Node] = []
    state = [0] * len(nodes)  # 0 new, 1 visiting, 2 done
    for start in range(len(nodes)):
        if state[start]:
            continue
        stack = [(start, 0)]
        while stack:
            index, position = stack.pop()
            node = nodes[index]
            if position == 0:
                if state[index] == 2:
                    continue
                state[index] = 1
            inputs = [n for n in node.inputs if n and n in producers]
            if position < len(inputs):
                stack.append((index, position + 1))
                dependency = producers[inputs[position]]
                if state[dependency] == 1:
                    raise ModelFormatError(
                        f"the graph has a cycle through {node.describe()}; ONNX graphs must "
                        "be acyclic."
                    )
                if state[dependency] == 0:
                    stack.append((dependency, 0))
            else:
                state[index] = 2
                ordered.append(node)
    return tuple(ordered)


def _needed_nodes(nodes: tuple[Node, ...], output_names: list[str]) -> tuple[Node, ...]:
    needed = set(output_names)
    kept = []
    for node in reversed(nodes):
        if any(name in needed for name in node.outputs if name):
            kept.append(node)
            needed.update(name for name in node.inputs if name)
    return tuple(reversed(kept))


class _Budget:
    """How many more nodes inlining may produce."""

    def __init__(self, limit: int):
        self.limit = limit
        self.left = limit

    def spend(self, count: int) -> None:
        self.left -= count
        if self.left < 0:
            raise ModelFormatError(
                f"the graph has more than {self.limit} nodes once local functions are inlined "
                "(`max_graph_nodes`)."
            )


def _inline_functions(nodes: tuple[Node, ...], model: Model, depth: int = 0, prefix: str = "",
                      *, budget: _Budget) -> tuple[Node, ...]:
    functions = {(function.domain, function.name): function for function in model.functions}
    if not functions:
        budget.spend(len(nodes))
        return nodes
    inlined: list[Node] = []
    for index, node in enumerate(nodes):
        function = functions.get((node.domain, node.op_type))
        if function is None:
            budget.spend(1)
            inlined.append(node)
            continue
        if depth >= _MAX_INLINE_DEPTH:
            raise ModelFormatError(
                f"local functions nest deeper than {_MAX_INLINE_DEPTH} at {node.describe()}."
            )
        # The prefix carries the whole call path, so every instance gets its own value names.
        call_prefix = f"{prefix}{node.op_type}__{index}__"
        body = _instantiate(function, node, prefix=call_prefix)
        inlined.extend(_inline_functions(body, model, depth + 1, call_prefix, budget=budget))
    return tuple(inlined)


def _instantiate(function: Function, call: Node, *, prefix: str) -> tuple[Node, ...]:
    """Copy a function body with values renamed to the call site and attributes bound."""
    rename: dict[str, str] = {"": ""}
    for formal, actual in zip(function.inputs, call.inputs, strict=False):
        rename[formal] = actual
    for formal in function.inputs[len(call.inputs):]:
        rename[formal] = ""
    for formal, actual in zip(function.outputs, call.outputs, strict=False):
        rename[formal] = actual
    call_attributes = {a.name: a for a in function.attribute_defaults}
    call_attributes.update({a.name: a for a in call.attributes})

    def name_of(value: str) -> str:
        if value not in rename:
            rename[value] = prefix + value
        return rename[value]

    body = []
    for node in function.nodes:
        attributes = []
        for attribute in node.attributes:
            if attribute.ref_attr_name:
                bound = call_attributes.get(attribute.ref_attr_name)
                if bound is not None:
                    attributes.append(Attribute(name=attribute.name, value=bound.value))
            else:
                attributes.append(attribute)
        body.append(Node(
            op_type=node.op_type,
            inputs=tuple(name_of(n) if n else "" for n in node.inputs),
            outputs=tuple(name_of(n) if n else "" for n in node.outputs),
            attributes=tuple(attributes),
            name=prefix + node.name if node.name else "",
            domain=node.domain,
        ))
    return tuple(body)
