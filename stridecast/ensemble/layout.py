"""The ensemble dataset's layout: variables, dimensions, units and the bundle's identity.

One place decides names and attributes, so the in-memory, zarr and NetCDF results agree.
"""

from __future__ import annotations

import json

import dask.array as da
import numpy as np
import xarray as xr

import stridecast
from stridecast.runtime import StateError, Stepper

from . import trust

MEMBER, TIME = "member", "time"
FLAG_ATTRS = {"flag_values": [0, 1], "flag_meanings": "no yes"}
_DESCRIPTIONS = {
    "outside_box": "the forecast state lies outside the training envelope's min/max box",
    "far_from_data": "the forecast state lies farther from the training states than the "
                     "bundle's radius",
    "beyond_horizon": "the time lies beyond the bundle's validated horizon",
}


def identity(stepper: Stepper) -> dict[str, str]:
    """The bundle's identity as dataset attributes (JSON text where the value is structured)."""
    manifest = stepper.manifest
    return {
        "bundle_name": manifest.name,
        "bundle_description": manifest.description,
        "bundle_checksums": json.dumps({str(entry.stride): entry.sha256
                                        for entry in manifest.levels}),
        "bundle_producer": json.dumps(dict(manifest.producer), default=str),
        "bundle_base_step": manifest.base_step,
        "bundle_strides": json.dumps(list(manifest.strides)),
        "bundle_validated_horizon": ("none" if manifest.validated_horizon is None
                                     else manifest.validated_horizon),
        "stridecast_version": stridecast.__version__,
    }


def component_names(stepper: Stepper) -> tuple[str, ...]:
    """The state components' variable names, refused when they clash with the layout's own."""
    reserved = {MEMBER, TIME, "expected_error", *trust.STATE_KINDS, *trust.TIME_KINDS,
                *(f"initial_{kind}" for kind in trust.STATE_KINDS)}
    clashing = sorted(set(stepper.state_names) & reserved)
    if clashing:
        raise StateError(f"the bundle's state components {clashing} clash with the ensemble "
                         f"dataset's own names {sorted(reserved)}; rename them in the bundle.")
    return stepper.state_names


def skeleton(stepper: Stepper, members: int, times: np.ndarray, chunk_states: int,
             probe: np.ndarray) -> xr.Dataset:
    """The dataset with lazy zeros for the per-member variables and the per-time ones filled.

    Parameters
    ----------
    members : int
        Ensemble size.
    times : ndarray, shape (T,)
        Requested times in the bundle's unit.
    chunk_states : int
        Members per chunk (the storage chunk along ``member``).
    probe : ndarray, shape (1, d)
        One initial state, used to ask the runtime about the times.
    """
    unit = stepper.manifest.time_unit
    chunks = (chunk_states, max(len(times), 1))

    def lazy(dtype, dims=(MEMBER, TIME)):
        shape = (members, len(times)) if len(dims) == 2 else (members,)
        return dims, da.zeros(shape, dtype=dtype, chunks=chunks[:len(dims)])

    variables = {}
    for name, units in zip(component_names(stepper), stepper.state_units, strict=True):
        dims, data = lazy(stepper.dtype)
        variables[name] = xr.Variable(dims, data, attrs={"units": units, "long_name": name})
    attrs = identity(stepper)
    if trust.available(stepper):
        variables["expected_error"] = xr.Variable(
            (TIME,), trust.expected_errors(stepper, times),
            attrs={"long_name": "held-out error expected at this time (the bundle's "
                   "validation curve; nan where unknown, inf past its end)"})
        time_flags, general = trust.time_findings(stepper, probe, times)
        for kind, flag in time_flags.items():
            variables[kind] = xr.Variable((TIME,), flag, attrs={
                "long_name": _DESCRIPTIONS.get(kind, kind), **FLAG_ATTRS})
        for kind in trust.STATE_KINDS:
            description = _DESCRIPTIONS.get(kind, kind)
            dims, data = lazy(np.int8)
            variables[kind] = xr.Variable(dims, data, attrs={"long_name": description,
                                                             **FLAG_ATTRS})
            dims, data = lazy(np.int8, (MEMBER,))
            variables[f"initial_{kind}"] = xr.Variable(dims, data, attrs={
                "long_name": f"initial state: {description.removeprefix('the forecast state ')}",
                **FLAG_ATTRS})
        attrs["findings"] = json.dumps(general)
    else:
        attrs["findings"] = json.dumps(["not recorded: this runtime has no Stepper.check"])
    coords = {
        MEMBER: xr.Variable((MEMBER,), da.arange(members, chunks=chunk_states, dtype=np.int64),
                            attrs={"long_name": "ensemble member (row of the initial states)"}),
        TIME: xr.Variable((TIME,), np.asarray(times, dtype=np.float64),
                          attrs={"units": unit, "long_name": "time since the initial state"}),
    }
    return xr.Dataset(variables, coords=coords, attrs=attrs)


def chunk_arrays(names: tuple[str, ...], result) -> dict[str, np.ndarray]:
    """The per-member arrays of one chunk, keyed by variable name."""
    arrays = {name: result.values[:, :, index] for index, name in enumerate(names)}
    arrays.update(result.flags)
    arrays[MEMBER] = np.arange(result.start, result.stop, dtype=np.int64)
    return arrays
