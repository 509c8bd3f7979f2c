"""The operator registry: op type and opset version → the NumPy function that implements it.

Op modules register with `@register(op_type, since_version)`; the interpreter calls `resolve`.
"""

from __future__ import annotations

import functools
from bisect import bisect_right
from collections.abc import Callable
from typing import TypeVar

import numpy as np

from ..errors import UnsupportedOperatorError

Operator = TypeVar("Operator", bound=Callable)

# The default ONNX operator set may be named either way in a model's opset imports.
DEFAULT_DOMAINS = ("", "ai.onnx")

# op type → {since_version: function}; filled at import time by the op modules.
_IMPLEMENTATIONS: dict[str, dict[int, Callable]] = {}


def register(op_type: str, since_version: int) -> Callable[[Operator], Operator]:
    """Decorator: record the decorated function as `op_type` for opsets ≥ `since_version`.

    Parameters
    ----------
    op_type : str
        The ONNX operator name, e.g. ``"Gemm"``.
    since_version : int
        The first opset of the default domain whose semantics the function implements; it
        serves every later opset until a newer registration of the same op type takes over.

    Returns
    -------
    callable
        The function, wrapped so that it always returns ndarrays: NumPy ufuncs turn 0-d
        arrays into NumPy scalars, and callers may rely on ``.shape`` and ``.dtype``.
    """

    def decorator(function: Operator) -> Operator:
        versions = _IMPLEMENTATIONS.setdefault(op_type, {})
        if since_version in versions:
            raise ValueError(
                f"Operator {op_type!r} is already registered for opset {since_version} "
                f"(by {versions[since_version].__qualname__}); expected one function per version."
            )
        operator = _returning_arrays(function)
        versions[since_version] = operator
        return operator

    return decorator


def _returning_arrays(function: Operator) -> Operator:
    @functools.wraps(function)
    def operator(*inputs, **attributes):
        result = function(*inputs, **attributes)
        if isinstance(result, tuple):
            return tuple(np.asarray(value) for value in result)
        return np.asarray(result)

    return operator  # type: ignore[return-value]


def supported_operators() -> dict[str, tuple[int, ...]]:
    """Every registered op type with the opset versions at which its implementations start."""
    return {
        op_type: tuple(sorted(versions))
        for op_type, versions in sorted(_IMPLEMENTATIONS.items())
    }


def resolve(op_type: str, opset: int, domain: str = "") -> Callable:
    """Return the implementation of `op_type` for a model importing `opset` of `domain`.

    Picks the newest registered implementation whose since-version is ≤ `opset`, as ONNX
    versioning prescribes.

    Parameters
    ----------
    op_type : str
        The node's operator name.
    opset : int
        The version of the node's domain that the model imports.
    domain : str
        The node's domain; only the default domain (``""`` or ``"ai.onnx"``) is implemented.

    Raises
    ------
    UnsupportedOperatorError
        If the domain is not the default one, the op type is unknown, or every implementation
        of it is newer than `opset`. The message lists the supported op types.
    """
    where = f"(domain {domain!r}, opset {opset})"
    if domain not in DEFAULT_DOMAINS:
        raise UnsupportedOperatorError(
            f"Operator {op_type!r} {where} is not supported: only the default ONNX domain "
            f"('' or 'ai.onnx') is implemented; supported operator types: {_names()}."
        )
    versions = _IMPLEMENTATIONS.get(op_type)
    if versions is None:
        raise UnsupportedOperatorError(
            f"Operator {op_type!r} {where} is not supported; "
            f"supported operator types: {_names()}."
        )
    since_versions = sorted(versions)
    position = bisect_right(since_versions, opset)
    if position == 0:
        raise UnsupportedOperatorError(
            f"Operator {op_type!r} {where} is not supported at that opset; this runtime "
            f"implements it from opset {since_versions[0]} on; supported operator types: "
            f"{_names()}."
        )
    return versions[since_versions[position - 1]]


def _names() -> str:
    return ", ".join(sorted(_IMPLEMENTATIONS))
