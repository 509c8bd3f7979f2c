"""Operators that move or select elements without arithmetic: Transpose, Reshape, Flatten,
Squeeze, Unsqueeze, Concat, Slice, Gather, Expand, Shape, Size, Identity.

Many return NumPy views that share memory with their input; like every op output they are to
be treated as read-only.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import ModelFormatError
from ._common import check_output_size, int_values, normalize_axes, normalize_axis
from .registry import register


@register("Identity", 1)
def Identity(x):
    """Identity (opset 1): x itself."""
    return x


@register("Transpose", 1)
def Transpose(data, *, perm=None):
    """Transpose (opset 1): permute dimensions by `perm`; by default reverse them."""
    if perm is None:
        return np.transpose(data)
    perm = int_values(perm)
    if sorted(perm) != list(range(data.ndim)):
        raise ModelFormatError(
            f"Transpose `perm` {perm} is not a permutation of the {data.ndim} dimensions of an "
            f"input of shape {data.shape}."
        )
    return np.transpose(data, perm)


@register("Reshape", 5)
def Reshape(data, shape, *, allowzero=0):
    """Reshape (opset 5; `allowzero` from 14): give `data` the shape in the `shape` tensor.

    A −1 entry is inferred from the element count; a 0 entry copies the input's dimension at
    that position, unless ``allowzero=1``, which makes 0 a literal empty dimension.
    """
    requested = list(int_values(shape))
    if not allowzero:
        for position, extent in enumerate(requested):
            if extent == 0:
                if position >= data.ndim:
                    raise ModelFormatError(
                        f"Reshape `shape` {tuple(requested)} copies dimension {position} (a 0 "
                        f"entry) from an input of rank {data.ndim}; expected a position < "
                        f"{data.ndim}."
                    )
                requested[position] = data.shape[position]
    if requested.count(-1) > 1 or any(extent < -1 for extent in requested):
        raise ModelFormatError(
            f"Reshape `shape` {tuple(int_values(shape))} is invalid; expected sizes ≥ 0 and at "
            "most one −1."
        )
    try:
        return np.reshape(data, requested)
    except ValueError as error:
        raise ModelFormatError(
            f"Reshape cannot give an input of shape {data.shape} ({data.size} elements) the "
            f"shape {tuple(int_values(shape))}; expected the same number of elements."
        ) from error


@register("Flatten", 1)
def Flatten(x, *, axis=1):
    """Flatten (opset 1): reshape to 2-D, (∏ dims before `axis`, ∏ dims from `axis` on)."""
    split = normalize_axis(axis, x.ndim, op_type="Flatten", allow_rank=True)
    return np.reshape(x, (math.prod(x.shape[:split]), math.prod(x.shape[split:])))


@register("Squeeze", 1)
def Squeeze_1(data, *, axes=None):
    """Squeeze (opset 1): remove the size-1 dimensions listed in `axes`, or all of them."""
    return _squeeze(data, axes)


@register("Squeeze", 13)
def Squeeze_13(data, axes=None):
    """Squeeze (opset 13): as opset 1, with `axes` an optional int64 input tensor."""
    return _squeeze(data, axes)


def _squeeze(data, axes):
    if axes is None:
        return np.squeeze(data)
    axes = normalize_axes(axes, data.ndim, op_type="Squeeze")
    wide = [axis for axis in axes if data.shape[axis] != 1]
    if wide:
        raise ModelFormatError(
            f"Squeeze `axes` {axes} include dimension {wide[0]} of size "
            f"{data.shape[wide[0]]} in an input of shape {data.shape}; expected size 1."
        )
    return np.squeeze(data, axis=axes)


@register("Unsqueeze", 1)
def Unsqueeze_1(data, *, axes):
    """Unsqueeze (opset 1): insert size-1 dimensions at `axes` (positions in the output)."""
    return _unsqueeze(data, axes)


@register("Unsqueeze", 13)
def Unsqueeze_13(data, axes):
    """Unsqueeze (opset 13): as opset 1, with `axes` an int64 input tensor."""
    return _unsqueeze(data, axes)


def _unsqueeze(data, axes):
    axes = int_values(axes)
    positions = normalize_axes(axes, data.ndim + len(axes), op_type="Unsqueeze")
    return np.expand_dims(data, positions)


@register("Concat", 4)
def Concat(*inputs, axis):
    """Concat (opset 4): join the inputs along `axis`; the other dimensions must agree."""
    rank = inputs[0].ndim
    return np.concatenate(inputs, axis=normalize_axis(axis, rank, op_type="Concat"))


@register("Slice", 1)
def Slice_1(data, *, starts, ends, axes=None):
    """Slice (opset 1): take [start, end) along each axis, bounds given as attributes."""
    return _slice(data, int_values(starts), int_values(ends), axes, None)


@register("Slice", 10)
def Slice_10(data, starts, ends, axes=None, steps=None):
    """Slice (opset 10): take start:end:step along each listed axis, bounds given as inputs.

    Bounds follow the spec: negative values count from the end of the dimension, then starts
    and ends are clamped to [0, dim] for positive steps and to [0, dim − 1] / [−1, dim − 1]
    for negative steps, so sentinels such as INT64_MAX and INT64_MIN mean "to the end".
    """
    return _slice(data, int_values(starts), int_values(ends), axes, steps)


def _slice(data, starts, ends, axes, steps):
    axes = tuple(range(len(starts))) if axes is None else int_values(axes)
    steps = (1,) * len(starts) if steps is None else int_values(steps)
    if not len(starts) == len(ends) == len(axes) == len(steps):
        raise ModelFormatError(
            f"Slice got {len(starts)} starts, {len(ends)} ends, {len(axes)} axes and "
            f"{len(steps)} steps; expected as many of each."
        )
    selection = [slice(None)] * data.ndim
    for axis, start, end, step in zip(
        normalize_axes(axes, data.ndim, op_type="Slice"), starts, ends, steps, strict=True
    ):
        if step == 0:
            raise ModelFormatError(f"Slice `steps` {steps} contain 0; expected nonzero steps.")
        extent = data.shape[axis]
        start = start + extent if start < 0 else start
        end = end + extent if end < 0 else end
        if step > 0:
            start, end = _clamp(start, 0, extent), _clamp(end, 0, extent)
        else:
            start, end = _clamp(start, 0, extent - 1), _clamp(end, -1, extent - 1)
        # An end of −1 with a negative step means "through index 0"; Python spells that None.
        selection[axis] = slice(start, None if end < 0 else end, step)
    return data[tuple(selection)]


def _clamp(value, lower, upper):
    return min(max(value, lower), upper)


@register("Gather", 1)
def Gather(data, indices, *, axis=0):
    """Gather (opset 1): pick entries of `data` along `axis`; negative indices count from the end.

    The output shape is ``data.shape[:axis] + indices.shape + data.shape[axis + 1:]``.
    """
    axis = normalize_axis(axis, data.ndim, op_type="Gather")
    extent = data.shape[axis]
    if indices.size and (indices.min() < -extent or indices.max() >= extent):
        raise ModelFormatError(
            f"Gather `indices` range over [{indices.min()}, {indices.max()}] on an axis of "
            f"size {extent}; expected values in [{-extent}, {extent - 1}]."
        )
    return np.take(data, indices, axis=axis)


@register("Expand", 8)
def Expand(x, shape):
    """Expand (opset 8): broadcast x with the `shape` tensor (both ways, as NumPy does).

    Returns a read-only broadcast view; a dimension of 1 in `shape` keeps x's dimension.
    """
    try:
        target = np.broadcast_shapes(x.shape, int_values(shape))
    except ValueError as error:
        raise ModelFormatError(
            f"Expand cannot broadcast an input of shape {x.shape} with the shape "
            f"{int_values(shape)}; expected compatible dimensions (equal, or one of them 1)."
        ) from error
    check_output_size(target, op_type="Expand")
    return np.broadcast_to(x, target)


@register("Shape", 1)
def Shape(data, *, start=0, end=None):
    """Shape (opset 1; `start`/`end` from 15): the input's dimensions as an int64 vector.

    `start` and `end` select dimensions like a Python slice: negative values count from the
    end and out-of-range values are clamped, exactly as the spec describes.
    """
    return np.array(data.shape[start:end], dtype=np.int64)


@register("Size", 1)
def Size(data):
    """Size (opset 1): the input's number of elements as a 0-d int64 tensor."""
    return np.array(data.size, dtype=np.int64)
