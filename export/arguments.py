"""Validation of everything `export_bundle` is given, in one place.

Each check names the argument, the value received and what was expected; the result is a frozen
`ExportSpec` the rest of the exporter trusts.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from stridecast.runtime.errors import BundleError
from stridecast.runtime.manifest import UPDATE_FORMS
from stridecast.runtime.validation import check_stride

EXPORTERS = ("auto", "dynamo", "legacy")
# Two base steps are the same when they differ by at most this fraction: far above float32
# rounding (2^-24 ≈ 6e-8 relative) and far below any deliberate change of sampling interval.
BASE_STEP_RELATIVE_TOLERANCE = 1e-6


@dataclass(frozen=True)
class ExportSpec:
    """The checked, bundle-level facts of one export (everything except the modules)."""

    strides: tuple[int, ...]
    state_dim: int
    base_step: float
    mean: tuple[float, ...]
    scale: tuple[float, ...]
    update: str
    state_names: tuple[str, ...]
    state_units: tuple[str, ...]
    time_unit: str
    name: str
    description: str
    envelope_min: tuple[float, ...] | None
    envelope_max: tuple[float, ...] | None
    validated_horizon: float | None


def level_pairs(levels: Mapping[Any, Any] | Iterable[tuple[Any, Any]]) -> list[tuple[int, Any]]:
    """Return `levels` as (stride, module) pairs, refusing bad or repeated strides.

    Accepts a mapping or an iterable of pairs (the latter so a repeated stride can be seen
    and refused rather than silently collapsed by a dict).
    """
    items = list(levels.items()) if isinstance(levels, Mapping) else list(levels)
    if not items:
        raise BundleError("`levels` is empty; expected at least one stride with its module.")
    pairs: list[tuple[int, Any]] = []
    seen: set[int] = set()
    for item in items:
        if not isinstance(item, tuple | list) or len(item) != 2:
            raise BundleError(
                f"`levels` must map strides to modules; got the entry {item!r}."
            )
        stride = check_stride(item[0])
        if stride in seen:
            raise BundleError(f"`levels` repeats stride {stride}; strides must be distinct.")
        seen.add(stride)
        pairs.append((stride, item[1]))
    return sorted(pairs, key=lambda pair: pair[0])


def positive_int(value: Any, where: str, *, error: type[Exception] = BundleError) -> int:
    """`value` as a positive int (bools refused), else `error` naming `where`."""
    try:
        number = None if isinstance(value, bool) else operator.index(value)
    except TypeError:
        number = None
    if number is None or number <= 0:
        raise error(f"`{where}` is {value!r}; expected a positive integer.")
    return number


def check_base_step(value: Any) -> float:
    """`base_step` as a float > 0; a float32 (or float16) value becomes the decimal it stands
    for (see `intended_value`), so 0.01 read from a float32 file stays 0.01."""
    if isinstance(value, np.ndarray) and value.shape in ((), (1,)):
        value = value.reshape(())[()]
    if isinstance(value, bool) or not isinstance(value, int | float | np.floating | np.integer):
        raise BundleError(f"`base_step` is {value!r}; expected a finite number > 0.")
    base_step = intended_value(value)
    if not math.isfinite(base_step) or base_step <= 0:
        raise BundleError(f"`base_step` is {value!r}; expected a finite number > 0.")
    return base_step


def intended_value(value: Any) -> float:
    """The decimal a narrow float stands for: float32 0.009999999776 → 0.01.

    NumPy prints a float32 as the shortest decimal that rounds back to it (the Dragon4 /
    shortest-round-trip rule), which is the value a person wrote before it was stored; a
    float64 is kept as it is. Without this, a time of 1.0 would be 100.0000002 base steps and
    every round time would be off the grid.
    """
    if isinstance(value, np.floating) and np.finfo(value.dtype).bits < 64:
        return float(str(value))
    return float(value)


def same_base_step(first: float, second: float) -> bool:
    """Whether two base steps agree within `BASE_STEP_RELATIVE_TOLERANCE` of the larger."""
    return abs(first - second) <= BASE_STEP_RELATIVE_TOLERANCE * max(abs(first), abs(second))


def finite_vector(values: Any, where: str, dim: int | None = None) -> tuple[float, ...]:
    """A 1-D sequence of finite floats of length `dim` (when given)."""
    try:
        array = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as error:
        raise BundleError(f"`{where}` is {values!r}; expected a list of numbers.") from error
    if array.ndim != 1 or array.size == 0:
        raise BundleError(f"`{where}` has shape {array.shape}; expected a non-empty 1-D list.")
    if dim is not None and array.size != dim:
        raise BundleError(f"`{where}` has {array.size} entries; the state has {dim}.")
    bad = np.flatnonzero(~np.isfinite(array))
    if bad.size:
        raise BundleError(
            f"`{where}` must be finite; entry {int(bad[0])} is {float(array[bad[0]])!r}."
        )
    return tuple(float(v) for v in array)


def check_scale(values: Any, dim: int) -> tuple[float, ...]:
    scale = finite_vector(values, "scale", dim)
    bad = [index for index, value in enumerate(scale) if value <= 0]
    if bad:
        raise BundleError(
            f"`scale` must be > 0 in every component; entry {bad[0]} is {scale[bad[0]]!r}."
        )
    return scale


def check_strings(values: Any, where: str, dim: int, *, distinct: bool) -> tuple[str, ...]:
    if isinstance(values, str) or not isinstance(values, Sequence):
        raise BundleError(f"`{where}` is {values!r}; expected a list of {dim} strings.")
    if len(values) != dim or not all(isinstance(value, str) for value in values):
        raise BundleError(f"`{where}` is {list(values)!r}; expected a list of {dim} strings.")
    if distinct and len(set(values)) != dim:
        raise BundleError(f"`{where}` must be distinct; got {list(values)!r}.")
    return tuple(values)


def check_envelope(envelope: Any, dim: int) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """An envelope given as (min, max) or {"min": ..., "max": ...}."""
    if isinstance(envelope, Mapping):
        if set(envelope) != {"min", "max"}:
            raise BundleError(
                f"`envelope` has keys {sorted(envelope)}; expected exactly ['max', 'min']."
            )
        lower, upper = envelope["min"], envelope["max"]
    elif isinstance(envelope, Sequence) and len(envelope) == 2:
        lower, upper = envelope
    else:
        raise BundleError(f"`envelope` is {envelope!r}; expected (min, max) or a min/max mapping.")
    lower = finite_vector(lower, "envelope min", dim)
    upper = finite_vector(upper, "envelope max", dim)
    crossed = [index for index in range(dim) if lower[index] > upper[index]]
    if crossed:
        raise BundleError(
            f"`envelope` min exceeds max in component {crossed[0]} "
            f"({lower[crossed[0]]!r} > {upper[crossed[0]]!r})."
        )
    return lower, upper


def check_update(update: Any) -> str:
    if update not in UPDATE_FORMS:
        raise BundleError(f"`update` is {update!r}; expected one of {list(UPDATE_FORMS)}.")
    return update


def check_exporter(exporter: Any) -> str:
    if exporter not in EXPORTERS:
        raise BundleError(f"`exporter` is {exporter!r}; expected one of {list(EXPORTERS)}.")
    return exporter


def declared_state_dim(*, mean: Any, scale: Any, state_names: Any, units: Any,
                       envelope: Any) -> int | None:
    """The state dimension implied by the first of these arguments that is given, if any."""
    for where, value in (("mean", mean), ("scale", scale)):
        if value is not None:
            return len(finite_vector(value, where))
    for value in (state_names, units):
        if value is not None and isinstance(value, Sequence) and not isinstance(value, str):
            return len(value)
    if isinstance(envelope, Mapping) and "min" in envelope:
        return len(finite_vector(envelope["min"], "envelope min"))
    if isinstance(envelope, Sequence) and len(envelope) == 2:
        return len(finite_vector(envelope[0], "envelope min"))
    return None


def build_spec(*, strides: Sequence[int], state_dim: int, base_step: Any, mean: Any, scale: Any,
               update: Any, state_names: Any, units: Any, time_unit: Any, name: Any,
               description: Any, envelope: Any, validated_horizon: Any) -> ExportSpec:
    """Check every bundle-level argument against `state_dim` and return an `ExportSpec`."""
    mean = (0.0,) * state_dim if mean is None else finite_vector(mean, "mean", state_dim)
    scale = (1.0,) * state_dim if scale is None else check_scale(scale, state_dim)
    names = (tuple(f"x{index}" for index in range(state_dim)) if state_names is None
             else check_strings(state_names, "state_names", state_dim, distinct=True))
    state_units = (("",) * state_dim if units is None
                   else check_strings(units, "units", state_dim, distinct=False))
    lower = upper = None
    if envelope is not None:
        lower, upper = check_envelope(envelope, state_dim)
    for where, value in (("time_unit", time_unit), ("name", name), ("description", description)):
        if not isinstance(value, str):
            raise BundleError(f"`{where}` is {value!r}; expected a string.")
    horizon = None
    if validated_horizon is not None:
        horizon = finite_vector([validated_horizon], "validated_horizon")[0]
        if horizon < 0:
            raise BundleError(f"`validated_horizon` is {horizon!r}; expected ≥ 0 or None.")
    return ExportSpec(
        strides=tuple(strides), state_dim=state_dim, base_step=check_base_step(base_step),
        mean=mean, scale=scale, update=check_update(update), state_names=names,
        state_units=state_units, time_unit=time_unit, name=name, description=description,
        envelope_min=lower, envelope_max=upper, validated_horizon=horizon,
    )


def check_envelope_samples(samples: Any, dim: int) -> np.ndarray:
    """Physical states (M, d) for the data envelope: finite real numbers, M ≥ 1."""
    try:
        array = np.asarray(samples, dtype=np.float64)
    except (TypeError, ValueError) as error:
        raise BundleError(
            f"`envelope_samples` could not be read as numbers: {error}; expected an array "
            f"(M, {dim})."
        ) from error
    if array.ndim != 2 or array.shape[0] == 0 or array.shape[1] != dim:
        raise BundleError(
            f"`envelope_samples` has shape {array.shape}; expected (M, {dim}) with M ≥ 1."
        )
    if not np.isfinite(array).all():
        raise BundleError("`envelope_samples` holds NaN or infinity; expected finite states.")
    return array


def check_radius(radius: Any) -> float:
    """A positive finite envelope radius (normalised units)."""
    value = float(radius) if isinstance(radius, int | float) else math.nan
    if isinstance(radius, bool) or not math.isfinite(value) or value <= 0:
        raise BundleError(f"`envelope_radius` is {radius!r}; expected a finite number > 0.")
    return value
