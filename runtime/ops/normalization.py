"""Normalisation and regularisation layers at inference: LayerNormalization, BatchNormalization,
Dropout.

The runtime only runs trained networks, so batch statistics and dropout masks never change;
asking for training behaviour is refused with `UnsupportedOperatorError`.
"""

from __future__ import annotations

import numpy as np

from ..errors import ModelFormatError, UnsupportedOperatorError
from ._common import float32_value, normalize_axis
from .registry import register

# The spec's float defaults, as the float32 values ONNX attributes hold.
_EPSILON, _MOMENTUM = float32_value(1e-5), float32_value(0.9)
# stash_type 1 (TensorProto FLOAT) is the only stash type the spec allows that NumPy holds.
_STASH_FLOAT = 1


@register("LayerNormalization", 17)
def LayerNormalization(x, scale, b=None, *, axis=-1, epsilon=_EPSILON, stash_type=_STASH_FLOAT):
    """LayerNormalization (opset 17): standardise over dimensions [axis, rank), scale, shift.

    Parameters
    ----------
    x : ndarray
    scale, b : ndarray
        Broadcastable to ``x.shape[axis:]``; `b` may be None.
    axis : int
        First normalised dimension; negative counts from the end.
    epsilon : float
        Added to the variance.
    stash_type : int
        Precision of the statistics: 1 (float32), the spec's only NumPy-representable choice.
        Inputs narrower than float32 are standardised in float32; float64 stays float64.

    Returns
    -------
    tuple of ndarray
        ``(Y, Mean, InvStdDev)``: Y has x's shape and dtype; Mean and InvStdDev have x's
        leading dimensions, size 1 in the normalised ones, and float32 dtype, as the spec's
        type constraint for them (and onnxruntime) has it.
    """
    if stash_type != _STASH_FLOAT:
        raise ModelFormatError(
            f"LayerNormalization `stash_type` {stash_type} is not supported; expected "
            f"{_STASH_FLOAT} (float32)."
        )
    start = normalize_axis(axis, x.ndim, op_type="LayerNormalization")
    axes = tuple(range(start, x.ndim))
    work = x.astype(np.result_type(x.dtype, np.float32), copy=False)
    mean = np.mean(work, axis=axes, keepdims=True)
    centered = work - mean
    # Two passes (mean, then mean of squared deviations) avoid E[x²] − E[x]² cancellation.
    variance = np.mean(centered * centered, axis=axes, keepdims=True)
    inverse_std = 1 / np.sqrt(variance + np.asarray(epsilon, dtype=work.dtype))
    normalized = centered * inverse_std * scale
    if b is not None:
        normalized += b
    return (
        normalized.astype(x.dtype, copy=False),
        mean.astype(np.float32, copy=False),
        inverse_std.astype(np.float32, copy=False),
    )


@register("BatchNormalization", 7)
def BatchNormalization_7(x, scale, b, input_mean, input_var, *, epsilon=_EPSILON,
                         momentum=_MOMENTUM, spatial=1):
    """BatchNormalization (opset 7): inference-mode normalisation with the stored statistics.

    With ``spatial=1`` the parameters have one value per channel (dimension 1); with
    ``spatial=0`` they have the shape of ``x.shape[1:]``. `momentum` only matters in training.
    """
    return _batch_normalization(x, scale, b, input_mean, input_var, epsilon,
                                per_channel=bool(spatial))


@register("BatchNormalization", 9)
def BatchNormalization_9(x, scale, b, input_mean, input_var, *, epsilon=_EPSILON,
                         momentum=_MOMENTUM):
    """BatchNormalization (opset 9): (x − mean)·scale / √(var + epsilon) + b per channel."""
    return _batch_normalization(x, scale, b, input_mean, input_var, epsilon, per_channel=True)


@register("BatchNormalization", 14)
def BatchNormalization_14(x, scale, b, input_mean, input_var, *, epsilon=_EPSILON,
                          momentum=_MOMENTUM, training_mode=0):
    """BatchNormalization (opset 14): as opset 9; ``training_mode=1`` is refused."""
    if training_mode:
        raise UnsupportedOperatorError(
            f"BatchNormalization with `training_mode` {training_mode} is not supported; "
            "the runtime runs inference only (expected 0)."
        )
    return _batch_normalization(x, scale, b, input_mean, input_var, epsilon, per_channel=True)


def _batch_normalization(x, scale, b, mean, variance, epsilon, *, per_channel):
    # From opset 15 the parameters may be wider than x: compute in the widest, return x's dtype.
    work = np.result_type(x, scale, b, mean, variance)
    # Per-channel parameters of shape (C,) line up with dimension 1 of (N, C, D1, …).
    shape = (-1,) + (1,) * (x.ndim - 2) if per_channel else None

    def prepared(parameter):
        parameter = parameter.astype(work, copy=False)
        return parameter.reshape(shape) if per_channel else parameter

    factor = prepared(scale) / np.sqrt(prepared(variance) + np.asarray(epsilon, dtype=work))
    result = (x - prepared(mean)) * factor + prepared(b)
    return result.astype(x.dtype, copy=False)


@register("Dropout", 7)
def Dropout_7(data, *, ratio=0.5):
    """Dropout (opset 7): identity at inference; the optional mask is all ones of data's dtype."""
    return data, np.ones(data.shape, dtype=data.dtype)


@register("Dropout", 10)
def Dropout_10(data, *, ratio=0.5):
    """Dropout (opset 10): identity at inference; the optional mask is all True."""
    return data, _all_true(data)


@register("Dropout", 12)
def Dropout_12(data, ratio=None, training_mode=None, *, seed=None):
    """Dropout (opset 12): identity unless `training_mode` is true with a nonzero ratio.

    Training-mode dropout is random and has no place in a deployed forecast, so it is refused.
    """
    training = training_mode is not None and bool(np.asarray(training_mode))
    if training and (ratio is None or float(np.asarray(ratio)) != 0):
        raise UnsupportedOperatorError(
            "Dropout with `training_mode` true is not supported; the runtime runs inference "
            "only (expected training_mode false or absent)."
        )
    return data, _all_true(data)


def _all_true(data):
    # A read-only broadcast view: no allocation for a mask the graph rarely uses.
    return np.broadcast_to(np.True_, data.shape)
