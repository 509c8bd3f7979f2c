"""The operator library: one NumPy function per ONNX operator, looked up with `resolve`."""

from __future__ import annotations

from .registry import resolve, supported_operators

__all__ = ["resolve", "supported_operators"]
