"""Trajectory data: load `.npy`/`.npz` files and check arrays before any training.

Files are read with `allow_pickle=False`: only plain numeric and string arrays are accepted.
"""

from __future__ import annotations

import logging
import os
import zipfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from stridecast.runtime.errors import StateError

logger = logging.getLogger(__name__)
TRAJECTORIES_KEY = "trajectories"
OPTIONAL_KEYS = ("base_step", "state_names", "units")


@dataclass(frozen=True)
class TrajectoryData:
    """Trajectories sampled every base step, with what the file said about them.

    Attributes
    ----------
    trajectories : ndarray, shape (N, T, d), float64
    base_step : float or None
    state_names, units : tuple of str or None
    """

    trajectories: np.ndarray
    base_step: float | None = None
    state_names: tuple[str, ...] | None = None
    units: tuple[str, ...] | None = None


def load_trajectories(path: str | os.PathLike[str]) -> TrajectoryData:
    """Read trajectories from `.npy` (array (N, T, d) or (T, d)) or `.npz`.

    An `.npz` holds `trajectories` and optionally `base_step` (scalar), `state_names` and
    `units` (d strings each). Other keys are ignored (and logged).

    Raises
    ------
    StateError
        Missing or unreadable file, unknown suffix, wrong shape, non-finite values.
    """
    source = Path(path)
    if not source.is_file():
        raise StateError(f"the data file {str(source)!r} does not exist or is not a file.")
    suffix = source.suffix.lower()
    if suffix == ".npy":
        return TrajectoryData(check_trajectories(_read_npy(source), where=str(source)))
    if suffix == ".npz":
        return _read_npz(source)
    raise StateError(
        f"the data file {str(source)!r} has suffix {source.suffix!r}; expected .npy or .npz."
    )


def check_trajectories(values: object, *, where: str = "trajectories") -> np.ndarray:
    """Return `values` as a finite float64 array (N, T, d); (T, d) becomes (1, T, d)."""
    try:
        array = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as error:
        raise StateError(f"`{where}` cannot be read as numbers: {error}.") from error
    if array.ndim == 2:
        array = array[None]
    if array.ndim != 3 or min(array.shape) == 0:
        raise StateError(
            f"`{where}` has shape {array.shape}; expected (N, T, d) trajectories or one (T, d)."
        )
    bad = np.argwhere(~np.isfinite(array))
    if bad.size:
        trajectory, step, component = (int(v) for v in bad[0])
        raise StateError(
            f"`{where}` holds NaN or infinity ({len(bad)} values), first at trajectory "
            f"{trajectory}, step {step}, component {component}."
        )
    return array


def check_length(steps: int, strides: Sequence[int], rollout: int, *, where: str) -> None:
    """Trajectories need `rollout` steps of the largest stride plus the starting state."""
    needed = rollout * max(strides) + 1
    if steps < needed:
        raise StateError(
            f"{where} have {steps} samples per trajectory; the largest stride {max(strides)} "
            f"with rollout {rollout} needs at least {needed}."
        )


def _read_npy(source: Path) -> np.ndarray:
    try:
        return np.load(source, allow_pickle=False)
    except (OSError, ValueError) as error:
        raise StateError(f"cannot read {str(source)!r} as a NumPy array: {error}.") from error


def _read_npz(source: Path) -> TrajectoryData:
    try:
        with np.load(source, allow_pickle=False) as archive:
            contents = {key: archive[key] for key in archive.files}
    except (OSError, ValueError, zipfile.BadZipFile) as error:
        raise StateError(f"cannot read {str(source)!r} as an .npz archive: {error}.") from error
    if TRAJECTORIES_KEY not in contents:
        raise StateError(
            f"{str(source)!r} has keys {sorted(contents)}; the key {TRAJECTORIES_KEY!r} "
            "(array (N, T, d)) is required."
        )
    ignored = sorted(set(contents) - {TRAJECTORIES_KEY, *OPTIONAL_KEYS})
    if ignored:
        logger.info("ignoring keys %s of %s", ignored, source)
    trajectories = check_trajectories(contents[TRAJECTORIES_KEY], where=f"{source}:trajectories")
    dim = trajectories.shape[2]
    base_step = None
    if "base_step" in contents:
        value = contents["base_step"]
        if value.shape not in ((), (1,)) or value.dtype.kind not in "iuf":
            raise StateError(
                f"`base_step` in {str(source)!r} must be one number; got {value!r}."
            )
        base_step = float(value.reshape(()))
    return TrajectoryData(
        trajectories=trajectories,
        base_step=base_step,
        state_names=_strings(contents.get("state_names"), "state_names", dim, source),
        units=_strings(contents.get("units"), "units", dim, source),
    )


def _strings(value: np.ndarray | None, key: str, dim: int, source: Path
             ) -> tuple[str, ...] | None:
    if value is None:
        return None
    if value.dtype.kind != "U" or value.shape != (dim,):
        raise StateError(
            f"`{key}` in {str(source)!r} must be {dim} strings; got {value.dtype} array of "
            f"shape {value.shape}."
        )
    return tuple(str(item) for item in value)
