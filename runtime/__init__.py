"""stridecast.runtime: load a bundle and forecast with NumPy alone (no torch, no onnxruntime)."""

from __future__ import annotations

from .bundle import read_manifest, sha256_hex, write_bundle
from .errors import (
    BundleError,
    ExtrapolationError,
    ExtrapolationWarning,
    ModelFormatError,
    NonFiniteError,
    OptionError,
    StateError,
    StridecastError,
    TimeError,
    UnsupportedOperatorError,
)
from .findings import Finding
from .limits import DEFAULT_LIMITS, Limits
from .loader import load
from .manifest import (
    DECODER_FILE,
    ENCODER_FILE,
    SAMPLES_FILE,
    EnvelopeSamples,
    LevelEntry,
    Manifest,
    ModelFile,
    Reduction,
    ValidationCurve,
    parse_manifest,
    parse_manifest_text,
)
from .plan import Plan
from .samples import encode_samples
from .stepper import ForecastInfo, Stepper
from .threads import ThreadPolicy

__all__ = [
    "DECODER_FILE",
    "DEFAULT_LIMITS",
    "ENCODER_FILE",
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
    "ModelFile",
    "ModelFormatError",
    "NonFiniteError",
    "OptionError",
    "Plan",
    "Reduction",
    "StateError",
    "Stepper",
    "StridecastError",
    "ThreadPolicy",
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
