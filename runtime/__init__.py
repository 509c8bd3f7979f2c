"""stridecast.runtime: load a bundle and forecast with NumPy alone (no torch, no onnxruntime)."""

from __future__ import annotations

from .bundle import read_manifest, sha256_hex, write_bundle
from .errors import (
    BundleError,
    ModelFormatError,
    NonFiniteError,
    OptionError,
    StateError,
    StridecastError,
    TimeError,
    UnsupportedOperatorError,
)
from .limits import DEFAULT_LIMITS, Limits
from .loader import load
from .manifest import LevelEntry, Manifest, parse_manifest, parse_manifest_text
from .plan import Plan
from .stepper import ForecastInfo, Stepper

__all__ = [
    "DEFAULT_LIMITS",
    "BundleError",
    "ForecastInfo",
    "LevelEntry",
    "Limits",
    "Manifest",
    "ModelFormatError",
    "NonFiniteError",
    "OptionError",
    "Plan",
    "StateError",
    "Stepper",
    "StridecastError",
    "TimeError",
    "UnsupportedOperatorError",
    "load",
    "parse_manifest",
    "parse_manifest_text",
    "read_manifest",
    "sha256_hex",
    "write_bundle",
]
