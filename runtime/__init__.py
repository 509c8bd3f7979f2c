"""stridecast.runtime: load a bundle and forecast with NumPy alone (no torch, no onnxruntime)."""

from __future__ import annotations

from .errors import (
    BundleError,
    ModelFormatError,
    NonFiniteError,
    StateError,
    StridecastError,
    TimeError,
    UnsupportedOperatorError,
)
from .limits import DEFAULT_LIMITS, Limits

__all__ = [
    "DEFAULT_LIMITS",
    "BundleError",
    "Limits",
    "ModelFormatError",
    "NonFiniteError",
    "StateError",
    "StridecastError",
    "TimeError",
    "UnsupportedOperatorError",
]
