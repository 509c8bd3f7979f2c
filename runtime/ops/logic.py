"""Comparison, logical and selection operators: Greater … LessOrEqual, Not/And/Or, Where.

Comparisons return bool tensors and broadcast multidirectionally, as NumPy does.
"""

from __future__ import annotations

import numpy as np

from .registry import register


@register("Greater", 7)
def Greater(a, b):
    """Greater (opset 7): a > b elementwise, as bool."""
    return np.greater(a, b)


@register("Less", 7)
def Less(a, b):
    """Less (opset 7): a < b elementwise, as bool."""
    return np.less(a, b)


@register("Equal", 7)
def Equal(a, b):
    """Equal (opset 7): a == b elementwise, as bool."""
    return np.equal(a, b)


@register("GreaterOrEqual", 12)
def GreaterOrEqual(a, b):
    """GreaterOrEqual (opset 12): a ≥ b elementwise, as bool."""
    return np.greater_equal(a, b)


@register("LessOrEqual", 12)
def LessOrEqual(a, b):
    """LessOrEqual (opset 12): a ≤ b elementwise, as bool."""
    return np.less_equal(a, b)


@register("Not", 1)
def Not(x):
    """Not (opset 1): logical negation of a bool tensor."""
    return np.logical_not(x)


@register("And", 7)
def And(a, b):
    """And (opset 7): logical and of bool tensors, broadcast together."""
    return np.logical_and(a, b)


@register("Or", 7)
def Or(a, b):
    """Or (opset 7): logical or of bool tensors, broadcast together."""
    return np.logical_or(a, b)


@register("Where", 9)
def Where(condition, x, y):
    """Where (opset 9): elements of x where `condition` holds, else of y, broadcast together."""
    return np.where(condition, x, y)
