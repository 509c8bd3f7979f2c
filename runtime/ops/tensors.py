"""Operators that create or retype tensors: Constant, ConstantOfShape, Range, Cast, CastLike.

Compute precision: the interpreter holds every floating tensor in one precision, the one the
bundle is loaded with (float32 or float64). It binds Cast and CastLike to a floating type, and
floating Constant values, to that precision, so a float16 cast in a model (as mixed-precision
exports insert) does not round there; integer and bool types are kept exactly. Called directly,
these functions convert to exactly the type asked for.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import ModelFormatError
from ..onnx_model import DTYPE_NAMES, NUMPY_DTYPES
from ._common import check_output_size, int_values
from .registry import register


@register("Cast", 6)
def Cast(x, *, to, saturate=1, round_mode="up"):
    """Cast (opset 6; `saturate` from 19, `round_mode` from 24): convert to the dtype code `to`.

    NumPy's conversions match the spec for the types the runtime holds: floats to integers
    truncate toward zero, anything to bool is "nonzero", out-of-range floats become ±inf.
    `saturate` and `round_mode` only concern 8-bit and smaller float types, which the runtime
    does not hold. In a loaded graph, a cast to any floating type yields the compute precision
    (see the module docstring).

    Parameters
    ----------
    x : ndarray
    to : int
        A TensorProto data type code, e.g. 1 (float32), 7 (int64), 11 (float64).
    """
    target = NUMPY_DTYPES.get(to)
    if target is None:
        raise ModelFormatError(
            f"Cast `to` {to} ({DTYPE_NAMES.get(to, 'unknown')}) is not supported; expected one "
            f"of {_supported_types()}."
        )
    # Casts whose result the spec leaves undefined (NaN to int) or defines as ±inf (float64
    # overflow to float32) make NumPy warn; the spec's results are what we want, silently.
    with np.errstate(invalid="ignore", over="ignore"):
        return x.astype(target, copy=False)


@register("CastLike", 15)
def CastLike(x, target_type, *, saturate=1, round_mode="up"):
    """CastLike (opset 15; `saturate` from 19, `round_mode` from 24): cast to target_type's dtype.

    Only the dtype of `target_type` is used, never its values. Conversions are Cast's. In a
    loaded graph every floating tensor is in the compute precision, so a floating
    `target_type` carries that precision (see the module docstring).

    Parameters
    ----------
    x : ndarray
    target_type : ndarray
        Any shape; its dtype is the result's.
    """
    target = np.asarray(target_type).dtype
    if target not in NUMPY_DTYPES.values():
        raise ModelFormatError(
            f"CastLike `target_type` has dtype {target}; expected one of {_supported_types()}."
        )
    with np.errstate(invalid="ignore", over="ignore"):
        return x.astype(target, copy=False)


@register("Constant", 1)
def Constant(*, value=None, value_float=None, value_floats=None, value_int=None,
             value_ints=None, value_string=None, value_strings=None, sparse_value=None):
    """Constant (opset 1; the value_* attributes from 12): the tensor held by the one set attribute.

    ``value`` is a tensor (ndarray); ``value_float``/``value_int`` give 0-d float32/int64
    tensors, ``value_floats``/``value_ints`` 1-D ones. String and sparse values are refused.
    In a loaded graph, floating values are bound in the compute precision (see the module
    docstring): a float16 constant is widened, a float64 one rounded to float32 at load.
    """
    numeric = {
        "value": None if value is None else np.asarray(value),
        "value_float": None if value_float is None else np.array(value_float, np.float32),
        "value_floats": None if value_floats is None else np.array(value_floats, np.float32),
        "value_int": None if value_int is None else np.array(value_int, np.int64),
        "value_ints": None if value_ints is None else np.array(value_ints, np.int64),
    }
    unsupported = {"value_string": value_string, "value_strings": value_strings,
                   "sparse_value": sparse_value}
    given = [name for name, held in (numeric | unsupported).items() if held is not None]
    if len(given) != 1:
        raise ModelFormatError(
            f"Constant has {len(given)} value attributes {given}; expected exactly one of "
            f"{sorted(numeric | unsupported)}."
        )
    if given[0] in unsupported:
        raise ModelFormatError(
            f"Constant `{given[0]}` is not supported; the runtime holds numeric tensors only "
            f"(expected one of {sorted(numeric)})."
        )
    return numeric[given[0]]


@register("ConstantOfShape", 9)
def ConstantOfShape(shape, *, value=None):
    """ConstantOfShape (opset 9): a tensor of the shape held in the input, filled with `value`.

    `value` is a one-element tensor giving the fill value and the dtype; by default float32 0.
    An empty shape tensor gives a 0-d tensor.
    """
    shape = int_values(shape)
    check_output_size(shape, op_type="ConstantOfShape")
    fill = np.zeros(1, np.float32) if value is None else np.asarray(value)
    if fill.size != 1:
        raise ModelFormatError(
            f"ConstantOfShape `value` has {fill.size} elements; expected exactly one."
        )
    return np.full(shape, fill.reshape(-1)[0], dtype=fill.dtype)


@register("Range", 11)
def Range(start, limit, delta, *, stash_type=1):
    """Range (opset 11; `stash_type` from 27): start + i·delta while short of `limit`.

    There are max(⌈(limit − start)/delta⌉, 0) elements. Each is computed from its index, as
    the spec's pseudocode does, not by repeated addition. float16 arithmetic is done in
    float32 (``stash_type=1``, the opset-27 default).
    """
    dtype = np.asarray(start).dtype
    work = np.float32 if dtype == np.float16 and stash_type == 1 else dtype
    first, stop, step = (np.asarray(value).astype(work).reshape(()) for value in
                         (start, limit, delta))
    if step == 0 or not all(np.isfinite(value) for value in (first, stop, step)):
        raise ModelFormatError(
            f"Range got start {first}, limit {stop}, delta {step}; expected finite values and "
            "a nonzero delta."
        )
    if dtype.kind in "iu":
        span, increment = int(stop) - int(first), int(step)
        count = max(-(-span // increment), 0)
    else:
        # The difference in the input's precision, the division in float64, as onnxruntime does.
        count = max(math.ceil(float(stop - first) / float(step)), 0)
    check_output_size((count,), op_type="Range")
    return (first + np.arange(count, dtype=work) * step).astype(dtype, copy=False)


def _supported_types() -> str:
    return ", ".join(f"{code} ({DTYPE_NAMES[code]})" for code in sorted(NUMPY_DTYPES))
