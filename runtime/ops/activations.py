"""Activation operators: the ReLU family, sigmoid-like and smooth activations, Gelu, Softmax.

Each keeps its input's dtype. Where a textbook formula overflows or cancels (sigmoid of large
negative x, softplus of large x, the tail of Gelu) an equivalent stable form is used.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import ModelFormatError
from ._common import float32_value, like, normalize_axis
from .registry import register
from .special import erfc

# Float attribute defaults are float32 values (see `float32_value`). Selu's are the float32
# roundings of Klambauer et al.'s constants, exactly as the spec writes them.
_SELU_ALPHA = 1.67326319217681884765625
_SELU_GAMMA = 1.05070102214813232421875
_LEAKY_RELU_ALPHA = float32_value(0.01)
_HARD_SIGMOID_ALPHA = float32_value(0.2)
_HARD_SWISH_ALPHA = float32_value(1 / 6)


@register("Relu", 6)
def Relu(x):
    """Relu (opset 6): max(x, 0)."""
    return np.maximum(x, like(0, x))


@register("LeakyRelu", 6)
def LeakyRelu(x, *, alpha=_LEAKY_RELU_ALPHA):
    """LeakyRelu (opset 6): x for x ≥ 0, alpha·x otherwise."""
    return np.where(x >= 0, x, x * like(alpha, x))


@register("PRelu", 7)
def PRelu(x, slope):
    """PRelu (opset 7): x for x ≥ 0, slope·x otherwise; `slope` broadcasts to x's shape."""
    return np.where(x < 0, x * slope, x).astype(x.dtype, copy=False)


@register("Elu", 6)
def Elu(x, *, alpha=1.0):
    """Elu (opset 6): x for x > 0, alpha·(eˣ − 1) otherwise (via expm1, accurate near 0)."""
    # min(x, 0) keeps expm1 from overflowing on the positive side, which `where` discards.
    return np.where(x > 0, x, like(alpha, x) * np.expm1(np.minimum(x, like(0, x))))


@register("Selu", 6)
def Selu(x, *, alpha=_SELU_ALPHA, gamma=_SELU_GAMMA):
    """Selu (opset 6): gamma·x for x > 0, gamma·alpha·(eˣ − 1) otherwise."""
    negative = like(alpha, x) * np.expm1(np.minimum(x, like(0, x)))
    return like(gamma, x) * np.where(x > 0, x, negative)


@register("Sigmoid", 6)
def Sigmoid(x):
    """Sigmoid (opset 6): 1 / (1 + e⁻ˣ), computed without overflow for either sign."""
    return _sigmoid(x)


@register("HardSigmoid", 6)
def HardSigmoid(x, *, alpha=_HARD_SIGMOID_ALPHA, beta=0.5):
    """HardSigmoid (opset 6): max(0, min(1, alpha·x + beta))."""
    return np.clip(like(alpha, x) * x + like(beta, x), 0, 1)


@register("HardSwish", 14)
def HardSwish(x):
    """HardSwish (opset 14): x · max(0, min(1, alpha·x + 1/2)) with alpha = 1/6.

    The spec defines it as x · HardSigmoid(x, alpha=1/6), an attribute, hence float32(1/6).
    """
    return x * HardSigmoid(x, alpha=_HARD_SWISH_ALPHA, beta=0.5)


@register("Tanh", 6)
def Tanh(x):
    """Tanh (opset 6): hyperbolic tangent."""
    return np.tanh(x)


@register("Softplus", 1)
def Softplus(x):
    """Softplus (opset 1): log(1 + eˣ), computed stably as logaddexp(x, 0)."""
    return np.logaddexp(x, like(0, x))


@register("Softsign", 1)
def Softsign(x):
    """Softsign (opset 1): x / (1 + |x|)."""
    return x / (1 + np.abs(x))


@register("Mish", 18)
def Mish(x):
    """Mish (opset 18): x · tanh(softplus(x))."""
    return x * np.tanh(Softplus(x))


@register("Gelu", 20)
def Gelu(x, *, approximate="none"):
    """Gelu (opset 20): x·Φ(x), Φ the standard normal CDF, exact or with the tanh approximation.

    ``approximate="none"``: x·erfc(−x/√2)/2, evaluated in float64 and rounded to x's dtype;
    erfc rather than 1 + erf keeps the relative accuracy for negative x.
    ``approximate="tanh"``: x·(1 + tanh(u))/2 with u = √(2/π)·(x + 0.044715·x³), evaluated as
    the identical x·sigmoid(2u), which does not cancel for negative x.
    """
    if approximate == "none":
        wide = x.astype(np.float64)
        return (0.5 * wide * erfc(wide * -math.sqrt(0.5))).astype(x.dtype, copy=False)
    if approximate == "tanh":
        inner = like(math.sqrt(2 / math.pi), x) * (x + like(0.044715, x) * x * x * x)
        return x * _sigmoid(inner + inner)
    raise ModelFormatError(
        f"Gelu `approximate` {approximate!r} is not supported; expected 'none' or 'tanh'."
    )


@register("Softmax", 1)
def Softmax_1(x, *, axis=1):
    """Softmax (opset 1): softmax over the flattened dimensions [axis, rank), as opsets 1–12 do.

    Those versions coerce the input to 2-D at `axis` and normalise each row, which is the same
    as normalising jointly over every dimension from `axis` on.
    """
    start = normalize_axis(axis, x.ndim, op_type="Softmax")
    return _softmax(x, tuple(range(start, x.ndim)))


@register("Softmax", 13)
def Softmax_13(x, *, axis=-1):
    """Softmax (opset 13): exp(x) / Σ exp(x) along the single dimension `axis`."""
    return _softmax(x, (normalize_axis(axis, x.ndim, op_type="Softmax"),))


def _softmax(x, axes):
    # Subtracting the maximum leaves the result unchanged and keeps exp from overflowing.
    exponentials = np.exp(x - np.max(x, axis=axes, keepdims=True))
    exponentials /= np.sum(exponentials, axis=axes, keepdims=True)
    return exponentials


def _sigmoid(x):
    # e = exp(−|x|) ≤ 1 never overflows; sigmoid is 1/(1 + e) for x ≥ 0 and e/(1 + e) below.
    decay = np.exp(-np.abs(x))
    reciprocal = 1 / (1 + decay)
    return np.where(x >= 0, reciprocal, decay * reciprocal)
