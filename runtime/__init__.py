"""stridecast.runtime: load a bundle and forecast with NumPy alone (no torch, no onnxruntime)."""

from __future__ import annotations

from .bundle import read_manifest, sha256_hex, write_bundle
from .errors import (
    BundleError,
    ExtrapolationError,
    ExtrapolationWarning,
    ModelFormatError,
    NonFiniteError,
    StateError,
    StridecastError,
    TimeError,
    UnsupportedOperatorError,
)
from .findings import Finding
from .limits import DEFAULT_LIMITS, Limits
from .loader import load
from .manifest import (
    SAMPLES_FILE,
    EnvelopeSamples,
    LevelEntry,
    Manifest,
    ValidationCurve,
    parse_manifest,
    parse_manifest_text,
)
from .plan import Plan
from .samples import encode_samples
from .stepper import ForecastInfo, Stepper

__all__ = [
    "DEFAULT_LIMITS",
    "SAMPLES_FILE",
    "BundleError",
    "EnvelopeSamples",
    "ExtrapolationError",
    "ExtrapolationWarning",
    "Finding",
    "ForecastInfo",
    "LevelEntry",
    "Limits",
    "Manifest",
    "ModelFormatError",
    "NonFiniteError",
    "Plan",
    "StateError",
    "Stepper",
    "StridecastError",
    "TimeError",
    "UnsupportedOperatorError",
    "ValidationCurve",
    "encode_samples",
    "load",
    "parse_manifest",
    "parse_manifest_text",
    "read_manifest",
    "sha256_hex",
    "write_bundle",
]
