"""Elementwise arithmetic and math operators: Add … Pow, Sqrt … Erf, variadic Max/Min/Sum, Clip.

Binary operators broadcast multidirectionally, exactly as NumPy does. Outputs keep the input
dtype; attribute scalars are cast to it first (see `_common.like`).
"""

from __future__ import annotations

from functools import reduce

import numpy as np

from ._common import like
from .registry import register
from .special import erf


@register("Add", 7)
def Add(a, b):
    """Add (opset 7): a + b with multidirectional broadcasting."""
    return np.add(a, b)


@register("Sub", 7)
def Sub(a, b):
    """Sub (opset 7): a − b with multidirectional broadcasting."""
    return np.subtract(a, b)


@register("Mul", 7)
def Mul(a, b):
    """Mul (opset 7): a · b with multidirectional broadcasting."""
    return np.multiply(a, b)


@register("Div", 7)
def Div(a, b):
    """Div (opset 7): a / b; integer division truncates toward zero, as in C.

    NumPy's floor division rounds toward −∞, so the quotient of operands of opposite signs
    with a remainder is moved up by one.
    """
    if a.dtype.kind in "iu":
        quotient = np.floor_divide(a, b)
        inexact = (np.remainder(a, b) != 0) & ((a < 0) != (b < 0))
        return (quotient + inexact).astype(a.dtype, copy=False)
    return np.divide(a, b)


@register("Pow", 7)
def Pow(x, y):
    """Pow (opset 7): x ** y elementwise; the result has the dtype of the base `x`.

    From opset 12 the exponent may have another numeric type; NumPy would promote to it, so the
    result is cast back to the base's dtype as the spec requires.
    """
    if x.dtype.kind == "f" and y.dtype.kind == "f":
        y = y.astype(x.dtype, copy=False)
    return np.power(x, y).astype(x.dtype, copy=False)


@register("Neg", 6)
def Neg(x):
    """Neg (opset 6): −x."""
    return np.negative(x)


@register("Abs", 6)
def Abs(x):
    """Abs (opset 6): |x|."""
    return np.abs(x)


@register("Reciprocal", 6)
def Reciprocal(x):
    """Reciprocal (opset 6): 1 / x."""
    return np.reciprocal(x)


@register("Sqrt", 6)
def Sqrt(x):
    """Sqrt (opset 6): √x (NaN for negative x)."""
    return np.sqrt(x)


@register("Exp", 6)
def Exp(x):
    """Exp (opset 6): eˣ."""
    return np.exp(x)


@register("Log", 6)
def Log(x):
    """Log (opset 6): natural logarithm."""
    return np.log(x)


@register("Sin", 7)
def Sin(x):
    """Sin (opset 7): sine of x in radians."""
    return np.sin(x)


@register("Cos", 7)
def Cos(x):
    """Cos (opset 7): cosine of x in radians."""
    return np.cos(x)


@register("Erf", 9)
def Erf(x):
    """Erf (opset 9): the error function, evaluated in float64 and rounded to x's dtype.

    See `special.erf` for the method (fdlibm's rational approximations) and its accuracy.
    """
    return erf(x).astype(x.dtype, copy=False)


@register("Max", 8)
def Max(*data):
    """Max (opset 8): elementwise maximum of one or more inputs, broadcast together."""
    return reduce(np.maximum, data)


@register("Min", 8)
def Min(*data):
    """Min (opset 8): elementwise minimum of one or more inputs, broadcast together."""
    return reduce(np.minimum, data)


@register("Sum", 8)
def Sum(*data):
    """Sum (opset 8): elementwise sum of one or more inputs, broadcast together."""
    return reduce(np.add, data)


# Clip-6's attribute defaults: the float32 range, i.e. no clipping for float inputs.
_FLOAT32_LOWEST = float(np.finfo(np.float32).min)
_FLOAT32_HIGHEST = float(np.finfo(np.float32).max)


@register("Clip", 6)
def Clip_6(x, *, min=_FLOAT32_LOWEST, max=_FLOAT32_HIGHEST):
    """Clip (opset 6): limit x to [min, max], the bounds given as attributes."""
    lower = None if min == _FLOAT32_LOWEST else like(min, x)
    upper = None if max == _FLOAT32_HIGHEST else like(max, x)
    return _clip(x, lower, upper)


@register("Clip", 11)
def Clip_11(x, min_value=None, max_value=None):
    """Clip (opset 11): limit x to [min, max], the bounds given as optional scalar inputs.

    When min > max every element becomes max, as the spec prescribes (from opset 13; earlier
    versions leave it unspecified).
    """
    lower = None if min_value is None else min_value.astype(x.dtype, copy=False)
    upper = None if max_value is None else max_value.astype(x.dtype, copy=False)
    return _clip(x, lower, upper)


def _clip(x, lower, upper):
    # max first, then min: an empty interval yields `upper` everywhere.
    result = x if lower is None else np.maximum(x, lower)
    return result if upper is None else np.minimum(result, upper)
