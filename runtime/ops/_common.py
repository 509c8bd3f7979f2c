"""Checks and conversions the operator modules share: axes, integer lists, typed scalars.

Every model-side mistake an operator detects (an axis out of range, a bad shape) is reported
here, as a `ModelFormatError` naming the operator, the parameter and the value received.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

import numpy as np

from ..errors import ModelFormatError
from ..limits import DEFAULT_LIMITS


def int_values(values: Iterable[int] | np.ndarray) -> tuple[int, ...]:
    """An attribute tuple or a 0-/1-D integer tensor as a tuple of Python ints."""
    return tuple(int(value) for value in np.asarray(values).reshape(-1))


def normalize_axis(axis: int, rank: int, *, op_type: str, name: str = "axis",
                   allow_rank: bool = False) -> int:
    """Map a possibly negative `axis` of an input of `rank` dimensions into ``[0, rank)``.

    With `allow_rank` the axis may also equal `rank` (e.g. Flatten's axis, in ``[-r, r]``).
    """
    axis = int(axis)
    upper = rank if allow_rank else rank - 1
    if not -rank <= axis <= upper:
        raise ModelFormatError(
            f"{op_type} `{name}` {axis} is out of range for an input of rank {rank}; "
            f"expected an integer in [{-rank}, {upper}]."
        )
    return axis + rank if axis < 0 else axis


def normalize_axes(axes: Iterable[int] | np.ndarray, rank: int, *, op_type: str,
                   name: str = "axes") -> tuple[int, ...]:
    """Normalise each axis like `normalize_axis` and refuse repeated axes."""
    normalized = tuple(
        normalize_axis(axis, rank, op_type=op_type, name=name) for axis in int_values(axes)
    )
    if len(set(normalized)) != len(normalized):
        raise ModelFormatError(
            f"{op_type} `{name}` {int_values(axes)} names an axis more than once; "
            "expected distinct axes."
        )
    return normalized


def float32_value(value: float) -> float:
    """The float32 nearest to `value`, as a Python float.

    ONNX stores float attributes as float32, so a spec default such as LeakyRelu's 0.01 means
    float32(0.01) = 0.009999999776…; float64 models must see that value, as onnxruntime does.
    """
    return float(np.float32(value))


def like(value: float | int, array: np.ndarray) -> np.ndarray:
    """An attribute scalar as a 0-d array of `array`'s dtype.

    NumPy promotes float32 arrays to float64 when combined with float64 scalars (NEP 50), so
    attribute values are cast to the input's dtype before any arithmetic.
    """
    return np.asarray(value, dtype=array.dtype)


def check_output_size(shape: tuple[int, ...], *, op_type: str) -> None:
    """Refuse an output whose shape comes from tensor values and would exceed the element limit.

    Shapes computed from data (ConstantOfShape, Expand, Range) are bounded before allocation so
    that a malformed model cannot exhaust memory.
    """
    if any(extent < 0 for extent in shape):
        raise ModelFormatError(
            f"{op_type} output shape {shape} has a negative dimension; expected sizes ≥ 0."
        )
    elements = math.prod(shape)
    if elements > DEFAULT_LIMITS.max_tensor_elements:
        raise ModelFormatError(
            f"{op_type} output shape {shape} has {elements} elements; expected at most "
            f"{DEFAULT_LIMITS.max_tensor_elements}."
        )
