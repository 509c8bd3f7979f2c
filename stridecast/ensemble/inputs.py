"""Ensemble states from memory, a Dask array, or a .npy/zarr/NetCDF file, checked up front.

Every check here runs before any forecast: shape and dtype from metadata, then one pass over
the values for non-finite numbers (in memory, or on the cluster for lazy inputs).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

import dask
import dask.array as da
import numpy as np

from stridecast.runtime import StateError

FILE_KINDS = (".npy", ".zarr", ".nc", ".nc4", ".h5", ".netcdf")


@dataclass(frozen=True)
class StateSource:
    """Initial states as either an in-memory array or a lazy Dask array, shape (members, d)."""

    array: np.ndarray | da.Array

    @property
    def members(self) -> int:
        return int(self.array.shape[0])

    @property
    def lazy(self) -> bool:
        return isinstance(self.array, da.Array)

    def chunks(self, chunk_states: int) -> Iterator[tuple[int, object]]:
        """Yield ``(start, block)``: a NumPy slice, or a Dask delayed block for lazy inputs."""
        if not self.lazy:
            for start in range(0, self.members, chunk_states):
                yield start, self.array[start:start + chunk_states]
            return
        blocks = self.array.rechunk({0: chunk_states, 1: -1}).to_delayed()[:, 0]
        for index, block in enumerate(blocks):
            yield index * chunk_states, block


def open_states(states, names: tuple[str, ...]) -> StateSource:
    """Read `states` lazily where possible and check its shape against the bundle's state.

    Parameters
    ----------
    states : array_like, dask.array.Array, or path
        Shape (members, d). A path may be a ``.npy`` file (memory-mapped), a zarr array or
        dataset, or a NetCDF dataset; a dataset holds either one variable per component named
        as in the bundle (each over one dimension) or a single 2-D variable.
    names : tuple of str
        The bundle's state components, in order.
    """
    if isinstance(states, str | os.PathLike):
        array = _read_path(Path(states), names)
    elif isinstance(states, da.Array):
        array = states
    else:
        try:
            array = np.asarray(states)
        except (TypeError, ValueError) as error:
            raise StateError(f"`states` is not a numeric array: {error}.") from error
    return StateSource(_check_shape(array, names, "`states`"))


def _check_shape(array, names: tuple[str, ...], label: str):
    dim = len(names)
    kind = np.dtype(array.dtype).kind
    if kind not in "fiu":
        raise StateError(f"{label} has dtype {array.dtype}; expected real numbers.")
    if array.ndim != 2 or array.shape[1] != dim:
        raise StateError(f"{label} has shape {tuple(array.shape)}; this bundle's state has "
                         f"{dim} components {list(names)}, so expected (members, {dim}).")
    if array.shape[0] == 0:
        raise StateError(f"{label} holds no states; expected at least one member.")
    return array


def check_finite(source: StateSource, compute: Callable) -> None:
    """Refuse non-finite states, naming the first bad member; `compute` evaluates Dask values."""
    array = source.array
    if not source.lazy:
        finite = np.isfinite(array).all(axis=1)
        bad = None if finite.all() else int(np.argmin(finite))
    else:
        finite = da.isfinite(array).all(axis=1)
        first = da.argmin(finite)
        all_finite, first_bad = compute(finite.all(), first)
        bad = None if all_finite else int(first_bad)
    if bad is not None:
        raise StateError(f"`states` member {bad} holds a non-finite value; expected finite "
                         "numbers in every member (nothing was computed).")


def _read_path(path: Path, names: tuple[str, ...]) -> da.Array:
    if not path.exists():
        raise StateError(f"`states` file {str(path)!r} does not exist.")
    suffix = path.suffix.lower()
    if suffix not in FILE_KINDS:
        raise StateError(f"`states` file {str(path)!r} has suffix {suffix!r}; expected one of "
                         f"{list(FILE_KINDS)}.")
    try:
        if suffix == ".npy":
            return da.from_array(np.load(path, mmap_mode="r", allow_pickle=False),
                                 chunks=(65_536, -1))
        if suffix == ".zarr":
            return _from_zarr(path, names)
        import xarray as xr

        dataset = xr.open_dataset(path, engine="h5netcdf", chunks={})
        return _from_dataset(dataset, names, path)
    except StateError:
        raise
    except (OSError, ValueError, KeyError, TypeError) as error:
        raise StateError(f"`states` file {str(path)!r} could not be read: {error}.") from error


def _from_zarr(path: Path, names: tuple[str, ...]) -> da.Array:
    import zarr

    opened = zarr.open(str(path), mode="r")
    if isinstance(opened, zarr.Array):
        return da.from_zarr(opened)
    import xarray as xr

    return _from_dataset(xr.open_zarr(path), names, path)


def _from_dataset(dataset, names: tuple[str, ...], path: Path) -> da.Array:
    variables = dict(dataset.data_vars)
    if all(name in variables and variables[name].ndim == 1 for name in names):
        with dask.config.set({"array.slicing.split_large_chunks": False}):
            return da.stack([da.asarray(variables[name].data) for name in names], axis=1)
    two_d = [name for name, variable in variables.items() if variable.ndim == 2]
    if len(two_d) == 1:
        return da.asarray(variables[two_d[0]].data)
    raise StateError(f"`states` file {str(path)!r} holds variables {sorted(variables)}; "
                     f"expected one 1-D variable per component {list(names)} or a single "
                     "2-D variable (members, components).")
