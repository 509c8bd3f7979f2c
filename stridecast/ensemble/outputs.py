"""Where ensemble results go: memory, a zarr store or a NetCDF file, chunk by chunk.

File outputs are written under a temporary name beside the target and renamed into place at
the end, so an interrupted run never leaves a half-written result under the final name.
Only the client writes, once per finished chunk: a chunk recomputed after a worker died is
still written exactly once.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from pathlib import Path

import numpy as np
import xarray as xr

from stridecast.runtime import StridecastError
from stridecast.runtime.bundle import move_into_place

from .layout import MEMBER

SUFFIXES = {".zarr": "zarr", ".nc": "netcdf", ".nc4": "netcdf"}


class OutputError(StridecastError, ValueError):
    """The ensemble's output path is unusable (wrong suffix, exists, not writable)."""


def open_writer(out, template: xr.Dataset, *, chunk_states: int, overwrite: bool = False):
    """A writer for `template`'s layout: in memory when `out` is None, else a file.

    Every check of `out` happens here, before any forecast runs.
    """
    if out is None:
        return MemoryWriter(template)
    target = Path(out)
    kind = SUFFIXES.get(target.suffix.lower())
    if kind is None:
        raise OutputError(f"`out` is {str(target)!r}; expected a path ending in "
                          f"{' or '.join(SUFFIXES)}.")
    if target.exists() and not overwrite:
        raise OutputError(f"`out` {str(target)!r} already exists; remove it or pass "
                          "overwrite=True (--overwrite).")
    parent = target.parent if str(target.parent) else Path(".")
    if not parent.is_dir():
        raise OutputError(f"`out` {str(target)!r}: the folder {str(parent)!r} does not exist.")
    try:
        staging = Path(tempfile.mkdtemp(prefix=f".{target.name}.partial-", dir=parent))
    except OSError as error:
        raise OutputError(f"`out` {str(target)!r} cannot be written: {error}.") from error
    writer = (ZarrWriter if kind == "zarr" else NetCDFWriter)(template, target, staging,
                                                              chunk_states)
    try:
        writer.create()
    except BaseException:
        writer.abort()
        raise
    return writer


def _member_variables(dataset: xr.Dataset) -> list[str]:
    return [name for name, variable in dataset.variables.items() if MEMBER in variable.dims]


class MemoryWriter:
    """Collects the whole ensemble in NumPy arrays (client memory grows with the ensemble)."""

    def __init__(self, template: xr.Dataset):
        self._template = template
        self._arrays = {name: np.empty(template[name].shape, dtype=template[name].dtype)
                        for name in _member_variables(template)}

    def write(self, start: int, arrays: dict[str, np.ndarray]) -> None:
        for name, values in arrays.items():
            self._arrays[name][start:start + len(values)] = values

    def finish(self) -> xr.Dataset:
        dataset = self._template.copy()
        for name, values in self._arrays.items():
            dataset[name] = dataset[name].copy(data=values)
        return dataset

    def abort(self) -> None:
        self._arrays.clear()


class _FileWriter:
    def __init__(self, template: xr.Dataset, target: Path, staging: Path, chunk_states: int):
        self._template = template
        self._target = target
        self._staging = staging
        self._chunk_states = chunk_states

    def abort(self) -> None:
        shutil.rmtree(self._staging, ignore_errors=True)


class ZarrWriter(_FileWriter):
    """Writes a zarr store with xarray's layout; each chunk goes straight into its region."""

    def create(self) -> None:
        import zarr

        self._path = self._staging / self._target.name
        # compute=False writes metadata and the per-time variables, none of the lazy zeros.
        self._template.to_zarr(self._path, compute=False, consolidated=False)
        self._group = zarr.open_group(str(self._path), mode="r+")

    def write(self, start: int, arrays: dict[str, np.ndarray]) -> None:
        for name, values in arrays.items():
            self._group[name][start:start + len(values)] = values

    def finish(self) -> xr.Dataset:
        move_into_place(self._path, self._target)
        shutil.rmtree(self._staging, ignore_errors=True)
        return xr.open_zarr(self._target, consolidated=False, decode_timedelta=False)


class NetCDFWriter(_FileWriter):
    """Writes a NetCDF-4 file with h5netcdf, one hyperslab per chunk."""

    def create(self) -> None:
        import h5netcdf

        self._path = self._staging / self._target.name
        self._file = h5netcdf.File(self._path, "w")
        template = self._template
        self._file.dimensions = dict(template.sizes)
        for name, variable in template.variables.items():
            chunks = None
            if MEMBER in variable.dims:
                chunks = tuple(min(self._chunk_states, size) if dim == MEMBER else size
                               for dim, size in zip(variable.dims, variable.shape, strict=True))
            created = self._file.create_variable(name, variable.dims, variable.dtype,
                                                 chunks=chunks)
            created.attrs.update(variable.attrs)
            if MEMBER not in variable.dims:
                created[...] = variable.values
        self._file.attrs.update(template.attrs)

    def write(self, start: int, arrays: dict[str, np.ndarray]) -> None:
        for name, values in arrays.items():
            self._file.variables[name][start:start + len(values)] = values

    def finish(self) -> xr.Dataset:
        self._file.close()
        os.replace(self._path, self._target)
        shutil.rmtree(self._staging, ignore_errors=True)
        return xr.open_dataset(self._target, engine="h5netcdf", chunks={},
                               decode_timedelta=False)

    def abort(self) -> None:
        with contextlib.suppress(Exception):
            self._file.close()
        super().abort()
