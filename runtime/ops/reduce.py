"""Reductions: ReduceMean, ReduceSum, ReduceMax, ReduceMin.

Before their axes became an input (opset 13 for ReduceSum, 18 for the others) they took an
`axes` attribute; both forms reduce every axis when none are given, unless
``noop_with_empty_axes=1`` asks the input form to return the data unchanged instead.

Reducing over a dimension of size zero gives the reduction's identity, as the spec asks:
0 for sums, NaN for means (0/0), −inf for ReduceMax and +inf for ReduceMin (for integer types
their smallest and largest values, for bool False and True).
"""

from __future__ import annotations

import numpy as np

from ._common import int_values, normalize_axes
from .registry import register


@register("ReduceMean", 1)
def ReduceMean_1(data, *, axes=None, keepdims=1):
    """ReduceMean (opset 1): mean over the `axes` attribute (all axes if absent)."""
    return _reduce(np.mean, "ReduceMean", data, axes, keepdims)


@register("ReduceMean", 18)
def ReduceMean_18(data, axes=None, *, keepdims=1, noop_with_empty_axes=0):
    """ReduceMean (opset 18): mean over the axes given as an optional int64 input."""
    return _reduce(np.mean, "ReduceMean", data, axes, keepdims, noop_with_empty_axes)


@register("ReduceSum", 1)
def ReduceSum_1(data, *, axes=None, keepdims=1):
    """ReduceSum (opset 1): sum over the `axes` attribute (all axes if absent)."""
    return _reduce(np.sum, "ReduceSum", data, axes, keepdims)


@register("ReduceSum", 13)
def ReduceSum_13(data, axes=None, *, keepdims=1, noop_with_empty_axes=0):
    """ReduceSum (opset 13): sum over the axes given as an optional int64 input."""
    return _reduce(np.sum, "ReduceSum", data, axes, keepdims, noop_with_empty_axes)


@register("ReduceMax", 1)
def ReduceMax_1(data, *, axes=None, keepdims=1):
    """ReduceMax (opset 1): maximum over the `axes` attribute (all axes if absent)."""
    return _reduce(_maximum, "ReduceMax", data, axes, keepdims)


@register("ReduceMax", 18)
def ReduceMax_18(data, axes=None, *, keepdims=1, noop_with_empty_axes=0):
    """ReduceMax (opset 18): maximum over the axes given as an optional int64 input."""
    return _reduce(_maximum, "ReduceMax", data, axes, keepdims, noop_with_empty_axes)


@register("ReduceMin", 1)
def ReduceMin_1(data, *, axes=None, keepdims=1):
    """ReduceMin (opset 1): minimum over the `axes` attribute (all axes if absent)."""
    return _reduce(_minimum, "ReduceMin", data, axes, keepdims)


@register("ReduceMin", 18)
def ReduceMin_18(data, axes=None, *, keepdims=1, noop_with_empty_axes=0):
    """ReduceMin (opset 18): minimum over the axes given as an optional int64 input."""
    return _reduce(_minimum, "ReduceMin", data, axes, keepdims, noop_with_empty_axes)


def _reduce(reduction, op_type, data, axes, keepdims, noop_with_empty_axes=0):
    axes = () if axes is None else int_values(axes)
    if not axes and noop_with_empty_axes:
        return data
    selected = normalize_axes(axes, data.ndim, op_type=op_type) if axes else None
    result = reduction(data, axis=selected, keepdims=bool(keepdims))
    # NumPy returns scalars for full reductions and widens integer sums; ONNX keeps the type.
    return np.asarray(result).astype(data.dtype, copy=False)


def _maximum(data, *, axis, keepdims):
    # np.max refuses empty reductions; `initial` gives them the identity and changes nothing
    # else, since every element is ≥ the lowest value of the type.
    return np.max(data, axis=axis, keepdims=keepdims, initial=_lowest(data.dtype))


def _minimum(data, *, axis, keepdims):
    return np.min(data, axis=axis, keepdims=keepdims, initial=_highest(data.dtype))


def _lowest(dtype: np.dtype):
    if dtype.kind == "f":
        return -np.inf
    if dtype.kind == "b":
        return False
    return np.iinfo(dtype).min


def _highest(dtype: np.dtype):
    if dtype.kind == "f":
        return np.inf
    if dtype.kind == "b":
        return True
    return np.iinfo(dtype).max
