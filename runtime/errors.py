"""The exception hierarchy of stridecast, rooted at `StridecastError`.

Errors caused by bad input also subclass `ValueError`, so callers that already catch
`ValueError` keep working.
"""

from __future__ import annotations


class StridecastError(Exception):
    """Base class of every error stridecast raises on purpose."""


class BundleError(StridecastError, ValueError):
    """A bundle directory or its manifest is missing, malformed, tampered with or unsafe."""


class ModelFormatError(StridecastError, ValueError):
    """An ONNX file is malformed, exceeds a limit, or uses a feature the reader does not support."""


class UnsupportedOperatorError(ModelFormatError):
    """A graph uses an operator (or operator version) the runtime does not implement."""


class StateError(StridecastError, ValueError):
    """A state array has the wrong shape or dtype, is non-finite, or became non-finite."""


class TimeError(StridecastError, ValueError):
    """A requested time is negative, non-finite, unreachable or beyond the work limits."""


class OptionError(StridecastError, ValueError):
    """An option of a call is not one this bundle or the runtime offers: a stride the bundle
    lacks, a `vector_field` that is not callable, an unknown integrator or off-grid policy, a
    tolerance or step size that is not a positive number."""


class NonFiniteError(StateError):
    """A network step produced NaN or infinity; the message names the step and the level."""


class ExtrapolationError(StridecastError, ValueError):
    """An answer would rest on extrapolation (a state outside the training envelope, or a time
    past the validated horizon) and the stepper was loaded with on_extrapolation="error"."""


class ExtrapolationWarning(UserWarning):
    """An answer rests on extrapolation: the message names the states, components, times and
    by how much (see `Finding`)."""
