"""Trajectory data: check arrays (regular or ragged) and read them from files.

NumPy files are read here (`.npy`, `.npz`, a folder of `.npy`), always with
`allow_pickle=False`; HDF5, NetCDF and zarr go through `data_formats` (optional packages).
"""

from __future__ import annotations

import json
import logging
import os
import re
import zipfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from stridecast.runtime.errors import BundleError, StateError

from .arguments import check_base_step
from .windows import Ragged

logger = logging.getLogger(__name__)
TRAJECTORIES_KEY = "trajectories"
METADATA_KEYS = ("base_step", "state_names", "units", "time_unit")
# Optional file beside the .npy files of a folder.
FOLDER_METADATA = "metadata.json"
SHAPES = "(N, T, d) trajectories, one (T, d) series, or a list of (T_i, d) arrays"


@dataclass(frozen=True)
class TrajectoryData:
    """Trajectories sampled every base step, with what the file said about them.

    Attributes
    ----------
    trajectories : tuple of ndarray, each shape (T_i, d), float64
        One array per trajectory; lengths may differ.
    base_step : float or None
    state_names, units : tuple of str or None
    time_unit : str or None
    """

    trajectories: tuple[np.ndarray, ...]
    base_step: float | None = None
    state_names: tuple[str, ...] | None = None
    units: tuple[str, ...] | None = None
    time_unit: str | None = None


def load_trajectories(path: str | os.PathLike[str]) -> TrajectoryData:
    """Read trajectories from a file or folder.

    - `.npy`: one array (N, T, d) or (T, d).
    - `.npz`: the key `trajectories` ((N, T, d) or (T, d)), or else every array is one
      trajectory (T_i, d); optional keys `base_step`, `state_names`, `units`, `time_unit`.
    - a folder (not ending in `.zarr`): every `*.npy` in it is one trajectory (T_i, d), in
      natural name order; optional `metadata.json` with the keys above.
    - `.h5`/`.hdf5` (h5py), `.nc` (xarray) and `.zarr` (xarray + zarr): see `data_formats`.

    Raises
    ------
    StateError
        Missing or unreadable file, unknown suffix, wrong shape, non-finite values, bad
        metadata, or a missing optional package (naming the extra to install).
    """
    source = Path(path)
    suffix = source.suffix.lower()
    if source.is_dir() and suffix != ".zarr":
        return _read_folder(source)
    if not source.exists():
        raise StateError(f"the data file {str(source)!r} does not exist.")
    if suffix == ".npy":
        return data_from_contents({TRAJECTORIES_KEY: _read_npy(source)}, where=str(source))
    if suffix == ".npz":
        return data_from_contents(_read_npz(source), where=str(source))
    from . import data_formats

    reader = data_formats.READERS.get(suffix)
    if reader is None:
        raise StateError(
            f"the data file {str(source)!r} has suffix {source.suffix!r}; expected .npy, .npz, "
            f"a folder of .npy files, or one of {sorted(data_formats.READERS)}."
        )
    return reader(source)


def data_from_contents(contents: Mapping[str, Any], *, where: str) -> TrajectoryData:
    """`TrajectoryData` from named arrays, as in an `.npz`.

    `trajectories` holds all of them; otherwise every key that is not metadata is one
    trajectory, in the mapping's order.
    """
    metadata = {key: contents[key] for key in METADATA_KEYS if key in contents}
    if TRAJECTORIES_KEY in contents:
        ignored = sorted(set(contents) - {TRAJECTORIES_KEY, *METADATA_KEYS})
        if ignored:
            logger.info("ignoring keys %s of %s", ignored, where)
        arrays: Any = contents[TRAJECTORIES_KEY]
        label = f"{where}:{TRAJECTORIES_KEY}"
    else:
        names = [key for key in contents if key not in METADATA_KEYS]
        if not names:
            raise StateError(
                f"{where!r} holds no trajectories (keys {sorted(contents)}); expected the key "
                f"{TRAJECTORIES_KEY!r} or one array (T_i, d) per trajectory."
            )
        arrays = [contents[name] for name in names]
        label = where
    return with_metadata(arrays, metadata, where=where, label=label)


def with_metadata(arrays: Any, metadata: Mapping[str, Any], *, where: str,
                  label: str) -> TrajectoryData:
    """Check trajectories and the metadata that came with them (see `METADATA_KEYS`)."""
    unknown = sorted(set(metadata) - set(METADATA_KEYS))
    if unknown:
        raise StateError(f"{where!r} has unknown metadata {unknown}; expected some of "
                         f"{list(METADATA_KEYS)}.")
    names = _strings(metadata.get("state_names"), "state_names", where)
    ragged = check_trajectories(arrays, where=label, state_names=names)
    dim = ragged.dim
    units = _strings(metadata.get("units"), "units", where)
    for key, values in (("state_names", names), ("units", units)):
        if values is not None and len(values) != dim:
            raise StateError(f"`{key}` in {where!r} has {len(values)} entries {list(values)}; "
                             f"the states have {dim} components.")
    base_step = None
    if metadata.get("base_step") is not None:
        try:
            base_step = check_base_step(_scalar(metadata["base_step"]))
        except BundleError as error:
            raise StateError(f"`base_step` in {where!r} must be one number > 0; got "
                             f"{metadata['base_step']!r}.") from error
    time_unit = None
    if metadata.get("time_unit") is not None:
        unit = _scalar(metadata["time_unit"])
        unit = unit.decode() if isinstance(unit, bytes) else unit
        if not isinstance(unit, str):
            raise StateError(f"`time_unit` in {where!r} must be a string; got {unit!r}.")
        time_unit = str(unit)
    return TrajectoryData(trajectories=tuple(ragged.to_list()), base_step=base_step,
                          state_names=names, units=units, time_unit=time_unit)


def check_trajectories(values: Any, *, where: str = "trajectories",
                       state_names: Sequence[str] | None = None) -> Ragged:
    """Check trajectories and return them as a float64 `Ragged`.

    Parameters
    ----------
    values : array_like (N, T, d) or (T, d), or a list/tuple of arrays (T_i, d)
        Lengths T_i may differ; d may not.
    where : str
        Names the argument or file in errors.
    state_names : sequence of str, optional
        Only used to recognise data given as (d, T): names matching the other axis.

    Raises
    ------
    StateError
        Not numbers, wrong number of axes, different d, swapped axes, NaN or infinity.
    """
    arrays = _as_arrays(values, where)
    dims = {array.shape[1] for array in arrays}
    if state_names is not None:
        _refuse_swapped_names(arrays, len(state_names), where)
    if len(dims) > 1:
        first = arrays[0].shape[1]
        index = next(i for i, array in enumerate(arrays) if array.shape[1] != first)
        raise StateError(
            f"`{where}` mixes state sizes: trajectory 0 has {first} components, trajectory "
            f"{index} has {arrays[index].shape[1]}; every trajectory must be (T_i, d) with one d."
        )
    for index, array in enumerate(arrays):
        bad = np.argwhere(~np.isfinite(array))
        if bad.size:
            step, component = (int(v) for v in bad[0])
            raise StateError(
                f"`{where}` holds NaN or infinity ({len(bad)} values), first at trajectory "
                f"{index}, step {step}, component {component}."
            )
    return Ragged.from_arrays(arrays)


def check_length(lengths: np.ndarray, dim: int, strides: Sequence[int], rollout: int, *,
                 where: str) -> None:
    """Some trajectory needs `rollout` steps of the largest stride plus the starting state.

    Shorter trajectories still train the strides they fit (they give no window otherwise).
    """
    needed = rollout * max(strides) + 1
    longest = int(np.max(lengths))
    if longest < needed:
        hint = ""
        if dim > longest:
            hint = (f" The states have {dim} components but only {longest} samples: the data "
                    "look like (d, T); transpose them (x.T for one series, "
                    "x.transpose(0, 2, 1) for (N, d, T)).")
        raise StateError(
            f"{where} have at most {longest} samples per trajectory; the largest stride "
            f"{max(strides)} with rollout {rollout} needs at least {needed}.{hint}"
        )
    short = int(np.sum(lengths < needed))
    if short:
        logger.info("%d of %d trajectories are shorter than %d samples: they train only the "
                    "strides they fit", short, len(lengths), needed)


def _as_arrays(values: Any, where: str) -> list[np.ndarray]:
    if isinstance(values, list | tuple) and values and all(
            np.ndim(item) == 2 for item in values):
        arrays = [_numbers(item, f"{where}[{index}]") for index, item in enumerate(values)]
    else:
        array = _numbers(values, where)
        if array.ndim == 1:
            raise StateError(f"`{where}` has shape {array.shape}; expected {SHAPES} (a scalar "
                             "series x of shape (T,) is x[:, None]).")
        if array.ndim not in (2, 3):
            raise StateError(f"`{where}` has shape {array.shape}; expected {SHAPES}.")
        arrays = [array] if array.ndim == 2 else list(array)
    if not arrays or any(min(array.shape) == 0 for array in arrays):
        shapes = [array.shape for array in arrays]
        raise StateError(f"`{where}` is empty (shapes {shapes[:3]}); expected {SHAPES}.")
    return arrays


def _numbers(values: Any, where: str) -> np.ndarray:
    try:
        return np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as error:
        raise StateError(f"`{where}` cannot be read as numbers ({SHAPES}): {error}.") from error


def _refuse_swapped_names(arrays: list[np.ndarray], names: int, where: str) -> None:
    steps, dim = arrays[0].shape
    if names != dim and names == steps:
        raise StateError(
            f"`{where}` has shape {arrays[0].shape} per trajectory but {names} state names, "
            f"matching its first axis: the data look like (d, T); transpose them (x.T for one "
            "series, x.transpose(0, 2, 1) for (N, d, T))."
        )


def _scalar(value: Any) -> Any:
    array = np.asarray(value)
    if array.shape not in ((), (1,)):
        return value  # the checks refuse it, naming the value
    return array.reshape(())[()]


def _strings(value: Any, key: str, where: str) -> tuple[str, ...] | None:
    if value is None:
        return None
    array = np.asarray(value)
    if array.ndim != 1 or array.dtype.kind not in "USO":
        raise StateError(f"`{key}` in {where!r} must be a list of strings; got {array.dtype} "
                         f"array of shape {array.shape}.")
    items = [item.decode() if isinstance(item, bytes) else item for item in array.tolist()]
    if not all(isinstance(item, str) for item in items):
        raise StateError(f"`{key}` in {where!r} must be a list of strings; got {items!r}.")
    return tuple(items)


def _read_npy(source: Path) -> np.ndarray:
    try:
        return np.load(source, allow_pickle=False)
    except (OSError, ValueError) as error:
        raise StateError(f"cannot read {str(source)!r} as a NumPy array: {error}.") from error


def _read_npz(source: Path) -> dict[str, np.ndarray]:
    try:
        with np.load(source, allow_pickle=False) as archive:
            return {key: archive[key] for key in archive.files}
    except (OSError, ValueError, zipfile.BadZipFile) as error:
        raise StateError(f"cannot read {str(source)!r} as an .npz archive: {error}.") from error


def natural_order(names: Sequence[str]) -> list[str]:
    """`names` sorted with digit runs compared as numbers: run2 before run10."""
    def key(name: str) -> list[Any]:
        return [(0, int(part)) if part.isdigit() else (1, part)
                for part in re.split(r"(\d+)", name) if part]

    return sorted(names, key=key)


def _read_folder(source: Path) -> TrajectoryData:
    files = natural_order([path.name for path in source.glob("*.npy") if path.is_file()])
    if not files:
        raise StateError(f"the folder {str(source)!r} holds no .npy files; expected one "
                         "(T_i, d) array per trajectory.")
    metadata: dict[str, Any] = {}
    meta_path = source / FOLDER_METADATA
    if meta_path.is_file():
        try:
            metadata = json.loads(meta_path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as error:
            raise StateError(f"cannot read {str(meta_path)!r} as JSON: {error}.") from error
        if not isinstance(metadata, dict):
            raise StateError(f"{str(meta_path)!r} must hold a JSON object with some of "
                             f"{list(METADATA_KEYS)}.")
    arrays = [_read_npy(source / name) for name in files]
    for name, array in zip(files, arrays, strict=True):
        if array.ndim != 2:
            raise StateError(f"{str(source / name)!r} has shape {array.shape}; each file of a "
                             "folder is one trajectory (T_i, d).")
    return with_metadata(arrays, metadata, where=str(source), label=str(source))
