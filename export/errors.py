"""Errors the exporter adds to the stridecast hierarchy.

Everything else it raises comes from `stridecast.runtime.errors` (`BundleError` for bad export
arguments, `StateError` for bad trajectories).
"""

from __future__ import annotations

from stridecast.runtime.errors import StridecastError


class VerificationError(StridecastError):
    """The exported levels disagree with the torch modules beyond the float32 tolerance.

    Raised by `export_bundle` after writing into a private staging directory; nothing is left
    under the requested output path.
    """


class TrainingError(StridecastError, ValueError):
    """A training setting is out of range (epochs, batch size, rollout, layer widths, ...)."""
