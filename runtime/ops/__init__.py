"""The operator library: one NumPy function per ONNX operator, looked up with `resolve`.

Calling convention: ``resolve(op_type, opset)(*inputs, **attributes)`` with inputs as ndarrays
in node order (None for an omitted optional input) and attributes as keyword arguments named as
in the ONNX spec. An op returns one ndarray, or a tuple for multi-output ops (Dropout,
LayerNormalization). Ops never write into their inputs; their outputs may be views of them
and are to be treated as read-only.
"""

from __future__ import annotations

# Importing the op modules registers their operators.
from . import (  # noqa: F401
    activations,
    elementwise,
    linalg,
    logic,
    normalization,
    reduce,
    shape,
    tensors,
)
from .registry import register, resolve, supported_operators

__all__ = ["register", "resolve", "supported_operators"]
