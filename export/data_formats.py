"""Trajectories from HDF5 (h5py), NetCDF and zarr (xarray): the formats scientific data come in.

The packages are optional (the `[data]` extra); a missing one is named in the error. Both
layouts end in `data.with_metadata`, so the checks are those of `.npz` files.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np

from stridecast.runtime.errors import StateError

from .arguments import BASE_STEP_RELATIVE_TOLERANCE, same_base_step
from .data import METADATA_KEYS, TRAJECTORIES_KEY, TrajectoryData, natural_order, with_metadata

EXTRA = "data"
# Names a time variable goes by when it carries no CF `axis`/`standard_name` attribute.
TIME_NAMES = ("time", "t")
# CF conventions, section 9.3.3 (contiguous ragged arrays): the count variable names the
# sample dimension it partitions in this attribute.
SAMPLE_DIMENSION = "sample_dimension"


def _require(module: str, suffix: str) -> Any:
    try:
        return __import__(module)
    except ModuleNotFoundError as error:
        raise StateError(
            f"reading {suffix} files needs the package {error.name!r}; install it with "
            f'pip install "stridecast[{EXTRA}]".'
        ) from error


def read_hdf5(source: Path) -> TrajectoryData:
    """HDF5: a dataset `trajectories` ((N, T, d) or (T, d)), or a group `trajectories` with
    one dataset (T_i, d) per trajectory, or else every root dataset is one trajectory.
    Metadata (`base_step`, `state_names`, `units`, `time_unit`) are root attributes or root
    datasets of those names. Datasets are taken in natural name order."""
    h5py = _require("h5py", ".h5")
    try:
        with h5py.File(source, "r") as handle:
            metadata = {key: handle.attrs[key] for key in METADATA_KEYS if key in handle.attrs}
            metadata.update({key: handle[key][()] for key in METADATA_KEYS
                             if isinstance(handle.get(key), h5py.Dataset)})
            node = handle.get(TRAJECTORIES_KEY)
            if isinstance(node, h5py.Dataset):
                arrays: Any = node[()]
            else:
                group = node if isinstance(node, h5py.Group) else handle
                names = natural_order([name for name, item in group.items()
                                       if isinstance(item, h5py.Dataset)
                                       and name not in METADATA_KEYS])
                if not names:
                    raise StateError(f"{str(source)!r} holds no datasets; expected "
                                     f"{TRAJECTORIES_KEY!r} or one (T_i, d) per trajectory.")
                arrays = [group[name][()] for name in names]
    except OSError as error:
        raise StateError(f"cannot read {str(source)!r} as HDF5: {error}.") from error
    return with_metadata(arrays, metadata, where=str(source), label=str(source))


def read_netcdf(source: Path) -> TrajectoryData:
    """NetCDF through xarray (NetCDF-4 via h5netcdf, classic NetCDF-3 via SciPy)."""
    xarray = _require("xarray", ".nc")
    return _read_dataset(source, lambda: xarray.open_dataset(source, decode_times=False),
                         "NetCDF")


def read_zarr(source: Path) -> TrajectoryData:
    """A zarr store through xarray."""
    xarray = _require("xarray", ".zarr")
    _require("zarr", ".zarr")
    return _read_dataset(source, lambda: xarray.open_zarr(source, decode_times=False), "zarr")


READERS: dict[str, Callable[[Path], TrajectoryData]] = {
    ".h5": read_hdf5, ".hdf5": read_hdf5, ".nc": read_netcdf, ".zarr": read_zarr,
}


@contextlib.contextmanager
def _opened(source: Path, opener: Callable[[], Any], kind: str) -> Iterator[Any]:
    try:
        dataset = opener()
    except (OSError, ValueError, KeyError, TypeError) as error:
        raise StateError(f"cannot read {str(source)!r} as {kind}: {error}.") from error
    with dataset:
        yield dataset


def _read_dataset(source: Path, opener: Callable[[], Any], kind: str) -> TrajectoryData:
    """An xarray Dataset in one of three layouts (see docs/export.md):

    - a variable `trajectories` with dims (..., time, state);
    - one variable per state component on dims (time,) or (trajectory, time);
    - CF contiguous ragged arrays: components on one sample dimension, cut by a count
      variable whose `sample_dimension` attribute names it.
    """
    where = str(source)
    with _opened(source, opener, kind) as dataset:
        metadata = {key: dataset.attrs[key] for key in METADATA_KEYS if key in dataset.attrs}
        if TRAJECTORIES_KEY in dataset.data_vars:
            variable = dataset[TRAJECTORIES_KEY]
            arrays: Any = variable.values
            state_dim = variable.dims[-1]
            if state_dim in dataset.coords and dataset[state_dim].dtype.kind in "USO":
                metadata.setdefault("state_names", dataset[state_dim].values)
            times = _time_values(dataset, variable.dims[-2], counts=None)
        else:
            arrays, names, units, times = _components(dataset, where)
            metadata.setdefault("state_names", names)
            if any(units):
                metadata.setdefault("units", units)
        if "base_step" not in metadata and times is not None:
            metadata["base_step"] = base_step_from_times(times, where)
        if "time_unit" not in metadata and times is not None:
            metadata["time_unit"] = times.unit
        return with_metadata(arrays, metadata, where=where, label=where)


class _Times(list):
    """Time values per trajectory, with their unit (or None)."""

    unit: str | None = None


def _is_time(variable: Any, name: str) -> bool:
    return (name in TIME_NAMES or variable.attrs.get("standard_name") == "time"
            or variable.attrs.get("axis") == "T")


def _components(dataset: Any, where: str) -> tuple[list[np.ndarray], list[str], list[str],
                                                   _Times | None]:
    counts_name = next((name for name, variable in dataset.data_vars.items()
                        if SAMPLE_DIMENSION in variable.attrs), None)
    skip = {counts_name, *METADATA_KEYS}
    names = [str(name) for name, variable in dataset.data_vars.items()
             if name not in skip and variable.dtype.kind in "iuf"
             and not _is_time(variable, str(name))]
    if not names:
        raise StateError(f"{where!r} has no numeric data variables; expected "
                         f"{TRAJECTORIES_KEY!r} or one variable per state component.")
    dims = {dataset[name].dims for name in names}
    if len(dims) > 1:
        raise StateError(f"the state variables of {where!r} have different dimensions "
                         f"{sorted(map(list, dims))}; expected one shared (trajectory, time) "
                         "or (time,).")
    shared = next(iter(dims))
    stacked = np.stack([dataset[name].values for name in names], axis=-1)
    units = [str(dataset[name].attrs.get("units", "")) for name in names]
    if counts_name is not None:
        counts = dataset[counts_name].values.astype(np.int64)
        if shared != (dataset[counts_name].attrs[SAMPLE_DIMENSION],) or \
                counts.sum() != len(stacked) or (counts < 0).any():
            raise StateError(f"the ragged count variable {counts_name!r} of {where!r} does not "
                             f"partition the dimension of the state variables {list(shared)}.")
        cuts = np.cumsum(counts)[:-1]
        arrays = [part for part in np.split(stacked, cuts) if len(part)]
        return arrays, names, units, _time_values(dataset, shared[0], counts=counts)
    if len(shared) not in (1, 2):
        raise StateError(f"the state variables of {where!r} have dimensions {list(shared)}; "
                         "expected (time,) or (trajectory, time).")
    time_dim = shared[-1]
    if len(shared) == 2 and any(_is_time(dataset[dim], str(dim)) for dim in shared[:1]
                                if dim in dataset.variables):
        stacked, time_dim = np.swapaxes(stacked, 0, 1), shared[0]  # (time, trajectory) files
    arrays = [stacked] if stacked.ndim == 2 else list(stacked)
    return arrays, names, units, _time_values(dataset, time_dim, counts=None)


def _time_values(dataset: Any, time_dim: Any, counts: np.ndarray | None) -> _Times | None:
    """Times per trajectory from a time coordinate or variable, when the file has one."""
    candidates = [name for name, variable in dataset.variables.items()
                  if variable.dims == (time_dim,) and variable.dtype.kind in "iuf"
                  and _is_time(variable, str(name))]
    if not candidates:
        return None
    variable = dataset[candidates[0]]
    values = variable.values
    times = _Times(np.split(values, np.cumsum(counts)[:-1]) if counts is not None else [values])
    unit = variable.attrs.get("units")
    # CF time units read "seconds since 2000-01-01": the unit is the word before "since".
    times.unit = str(unit).split(" since ")[0].strip() if unit else None
    return times


def base_step_from_times(times: list[np.ndarray], where: str) -> float:
    """The sampling interval of evenly spaced time values, as the decimal it stands for.

    Every series must be evenly spaced: each time within 1e-6 of a step (plus the rounding of
    its own dtype, e.g. float32 times near 100 are only good to ~1e-5) of the fitted grid, and
    all series must share one step. The step is reported as the shortest decimal within
    `BASE_STEP_RELATIVE_TOLERANCE` (float32 times 0, 0.0099999998, ... give 0.01).
    """
    steps = []
    for index, values in enumerate(times):
        if len(values) < 2:
            continue
        resolution = np.finfo(values.dtype).eps if values.dtype.kind == "f" else 0.0
        series = values.astype(np.float64)
        step = (series[-1] - series[0]) / (len(series) - 1)
        grid = series[0] + step * np.arange(len(series))
        allowed = BASE_STEP_RELATIVE_TOLERANCE * abs(step) + \
            4 * resolution * float(np.max(np.abs(series)))
        deviation = float(np.max(np.abs(series - grid)))
        if step <= 0 or deviation > allowed:
            raise StateError(
                f"the times of trajectory {index} in {where!r} are not evenly spaced increasing "
                f"samples (step {step!r}, largest deviation {deviation:.3g}); pass --base-step "
                "or resample the data."
            )
        steps.append(step)
    if not steps:
        raise StateError(f"the time values in {where!r} are too short to give a base step.")
    if not all(same_base_step(step, steps[0]) for step in steps):
        raise StateError(f"the trajectories in {where!r} have different time steps "
                         f"({min(steps)!r} to {max(steps)!r}); stridecast needs one base step.")
    return shortest_decimal(float(np.mean(steps)))


def shortest_decimal(value: float) -> float:
    """The decimal with fewest significant digits within the base-step tolerance of `value`."""
    for digits in range(1, 18):
        candidate = float(f"{value:.{digits}g}")
        if same_base_step(candidate, value):
            return candidate
    return value
