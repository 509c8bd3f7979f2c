"""What `stridecast export` and `stridecast train` call: files in, a bundle out.

Level files must need no Python class definitions: `torch.export` programs (`.pt2`) and
TorchScript archives. Nothing is ever unpickled as an arbitrary object.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import torch

from stridecast.runtime.errors import BundleError, StateError

from .arguments import check_stride, level_pairs
from .bundle_export import export_bundle
from .data import load_trajectories
from .onnx_export import quiet_torch
from .trained import TrainedLevels
from .training import train_levels

PROGRAM_SUFFIX = ".pt2"
NORMALIZATION_KEYS = {"mean", "scale", "state_names", "units", "envelope"}


def parse_level_option(text: str) -> tuple[int, Path]:
    """Parse one `--level STRIDE=FILE` value."""
    stride_text, separator, file_text = text.partition("=")
    if not separator or not file_text:
        raise BundleError(f"`--level` is {text!r}; expected STRIDE=FILE, e.g. 4=level4.pt2.")
    try:
        stride = int(stride_text.strip())
    except ValueError as error:
        raise BundleError(
            f"`--level` is {text!r}; the stride {stride_text!r} is not an integer."
        ) from error
    return check_stride(stride), Path(file_text)


def parse_strides(text: str) -> tuple[int, ...]:
    """Parse `--strides 1,4,16,64`."""
    parts = [part.strip() for part in text.split(",") if part.strip()]
    try:
        values = [int(part) for part in parts]
    except ValueError as error:
        raise BundleError(
            f"`--strides` is {text!r}; expected comma-separated integers like 1,4,16."
        ) from error
    if not values:
        raise BundleError(f"`--strides` is {text!r}; expected comma-separated integers.")
    return tuple(check_stride(value) for value in values)


def load_level_file(path: str | os.PathLike[str], stride: int) -> Any:
    """Load a `.pt2` program (torch.export.load) or a TorchScript archive (torch.jit.load)."""
    source = Path(path)
    where = f"level stride {stride} ({str(source)!r})"
    if not source.is_file():
        raise BundleError(f"{where}: the file does not exist or is not a file.")
    is_program = source.suffix.lower() == PROGRAM_SUFFIX
    kind = "torch.export program" if is_program else "TorchScript archive"
    try:
        with quiet_torch():
            if is_program:
                return torch.export.load(str(source))
            return torch.jit.load(str(source), map_location="cpu")
    except (RuntimeError, ValueError, OSError) as error:
        raise BundleError(
            f"{where}: cannot be read as a {kind} ({type(error).__name__}); only .pt2 "
            "programs saved by torch.export.save and TorchScript archives saved by "
            "torch.jit.save are accepted (pickled modules are refused)."
        ) from error


def read_normalization(path: str | os.PathLike[str]) -> dict[str, Any]:
    """Read `--normalization stats.json`: `mean`, `scale` and optionally `state_names`,
    `units` and `envelope` ({"min": [...], "max": [...]})."""
    source = Path(path)
    try:
        document = json.loads(source.read_text(encoding="utf-8"))
    except OSError as error:
        raise BundleError(f"cannot read the normalisation file {str(source)!r}: {error}.") \
            from error
    except ValueError as error:
        raise BundleError(f"the normalisation file {str(source)!r} is not valid JSON: "
                          f"{error}.") from error
    if not isinstance(document, dict):
        raise BundleError(f"the normalisation file {str(source)!r} must hold a JSON object.")
    unknown = sorted(set(document) - NORMALIZATION_KEYS)
    missing = sorted({"mean", "scale"} - set(document))
    if unknown or missing:
        raise BundleError(
            f"the normalisation file {str(source)!r} has unknown keys {unknown} and lacks "
            f"{missing}; expected mean, scale and optionally state_names, units, envelope."
        )
    return document


def export_from_files(levels: Mapping[int, str | os.PathLike[str]]
                      | Iterable[tuple[int, str | os.PathLike[str]]],
                      out: str | os.PathLike[str], *, base_step: float,
                      normalization_json: str | os.PathLike[str] | None = None,
                      update: str = "increment", name: str | None = None,
                      overwrite: bool = False, exporter: str = "auto",
                      description: str | None = None, time_unit: str = "s",
                      progress: bool = True) -> Path:
    """`stridecast export`: one file per stride to a verified bundle.

    Parameters
    ----------
    levels : mapping of int to path, or iterable of (stride, path)
        Stride to a `.pt2` (torch.export) or TorchScript file. Pass the parsed `--level`
        options as a list of pairs so a repeated stride is refused rather than overwritten.
    normalization_json : path, optional
        JSON with `mean`, `scale` (and optionally `state_names`, `units`, `envelope`).
    Other parameters are those of `export_bundle`.
    """
    pairs = level_pairs(levels)
    target = Path(out)
    if target.exists() and not overwrite:
        raise BundleError(
            f"{str(target)!r} already exists; pass overwrite=True (or --overwrite) to replace it."
        )
    extra = read_normalization(normalization_json) if normalization_json is not None else {}
    loaded = [(stride, load_level_file(path, stride)) for stride, path in pairs]
    return export_bundle(
        loaded, out, base_step=base_step, mean=extra.get("mean"), scale=extra.get("scale"),
        state_names=extra.get("state_names"), units=extra.get("units"),
        envelope=extra.get("envelope"), update=update, name=name, description=description,
        time_unit=time_unit, overwrite=overwrite, exporter=exporter, progress=progress,
    )


def train_from_file(data_path: str | os.PathLike[str], out: str | os.PathLike[str], *,
                    strides: Sequence[int], base_step: float | None = None,
                    name: str | None = None, overwrite: bool = False,
                    exporter: str = "auto", progress: bool = True,
                    **training: Any) -> tuple[Path, TrainedLevels]:
    """`stridecast train`: data file to trained levels to a verified bundle.

    Parameters
    ----------
    data_path : path
        `.npy` or `.npz` trajectories (see `load_trajectories`).
    strides : sequence of int
        Strides in base steps.
    base_step : float, optional
        Required unless the `.npz` holds `base_step`; if both are given they must agree.
    training
        Further keywords of `train_levels` (hidden, activation, rollout, epochs, ...).
    """
    target = Path(out)
    if target.exists() and not overwrite:
        # Refuse before training, not after it.
        raise BundleError(
            f"{str(target)!r} already exists; pass overwrite=True (or --overwrite) to replace it."
        )
    data = load_trajectories(data_path)
    if base_step is None and data.base_step is None:
        raise StateError(
            f"{str(data_path)!r} holds no `base_step`; pass --base-step (time between samples)."
        )
    if base_step is not None and data.base_step is not None and \
            float(base_step) != data.base_step:
        raise StateError(
            f"`base_step` is {base_step!r} but {str(data_path)!r} says {data.base_step!r}."
        )
    step = float(base_step if base_step is not None else data.base_step)
    trained = train_levels(data.trajectories, base_step=step, strides=strides,
                           progress=progress, state_names=data.state_names,
                           state_units=data.units, **training)
    path = export_bundle(trained, target, name=name, overwrite=overwrite, exporter=exporter,
                         progress=progress)
    return path, trained
