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

from stridecast.runtime.bundle import check_target
from stridecast.runtime.errors import BundleError, StateError
from stridecast.runtime.validation import check_stride

from .arguments import check_base_step, level_pairs, same_base_step
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
    check_target(target, overwrite=overwrite)  # before reading the level files
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
                    time_unit: str | None = None, name: str | None = None,
                    overwrite: bool = False, exporter: str = "auto", progress: bool = True,
                    **training: Any) -> tuple[Path, TrainedLevels]:
    """`stridecast train`: data file to trained levels to a verified bundle.

    Parameters
    ----------
    data_path : path
        Trajectories in any format `load_trajectories` reads.
    strides : sequence of int
        Strides in base steps.
    base_step : float, optional
        Required unless the data give it; if both are given they must agree within a relative
        1e-6 (`arguments.BASE_STEP_RELATIVE_TOLERANCE`, so a float32 copy of 0.01 agrees with
        0.01), and the value given here is kept.
    time_unit : str, optional
        Unit of `base_step`; default the data's, else "s". Must agree with the data's.
    training
        Further keywords of `train_levels` (hidden, activation, rollout, epochs, ...).
    """
    target = Path(out)
    check_target(target, overwrite=overwrite)  # before training, not after it
    data = load_trajectories(data_path)
    step = _reconcile(base_step, data.base_step, "base_step", data_path,
                      hint="pass --base-step (time between samples)")
    unit = _reconcile(time_unit, data.time_unit, "time_unit", data_path, hint=None) or "s"
    trained = train_levels(list(data.trajectories), base_step=step, strides=strides,
                           progress=progress, state_names=data.state_names,
                           state_units=data.units, **training)
    path = export_bundle(trained, target, name=name, overwrite=overwrite, exporter=exporter,
                         time_unit=unit, progress=progress)
    return path, trained


def _reconcile(given: Any, from_data: Any, key: str, data_path: Any, *,
               hint: str | None) -> Any:
    """The value of `key` from the caller or the data file; both must agree when both exist."""
    if given is None and from_data is None:
        if hint is None:
            return None
        raise StateError(f"{str(data_path)!r} holds no `{key}`; {hint}.")
    if given is None:
        return from_data
    if from_data is not None:
        agree = (same_base_step(check_base_step(given), from_data) if key == "base_step"
                 else given == from_data)
        if not agree:
            raise StateError(f"`{key}` is {given!r} but {str(data_path)!r} says {from_data!r}.")
    return check_base_step(given) if key == "base_step" else given


def training_summary(trained: TrainedLevels, *, time_unit: str = "") -> list[str]:
    """Lines `stridecast train` prints at the end: levels kept and why, the validated horizon
    at the tolerance, and hierarchy against finest-only at the horizon.

    Reads `trained.validation["summary"]` (written by `held_out.validate`).
    """
    unit = f" {time_unit}" if time_unit else ""
    trained_strides = ", ".join(map(str, sorted(trained.history)))
    summary = (trained.validation or {}).get("summary")
    kept = ", ".join(map(str, trained.strides))
    lines = [] if trained.reduction is None else [_reduction_line(trained.reduction)]
    if not summary:
        return [*lines, f"levels kept: {kept} (all trained; no held-out data, so no selection "
                "and no validated horizon)"]
    lines.append(f"levels kept: {kept} of {trained_strides}: {summary['why']}")
    horizon = summary["validated_horizon"]
    tolerance = f"normalised RMS error ≤ {summary['tolerance']:g}"
    lines.append("validated horizon: " + (f"none ({tolerance} fails at the first check)"
                                          if not horizon else f"{horizon:g}{unit} ({tolerance})"))
    at = summary.get("at_horizon")
    if at:
        lines.append(f"at {at['time']:g}{unit} (the horizon levels were chosen for): hierarchy "
                     f"error {_figure(at['hierarchical'])}, finest-only "
                     f"{_figure(at['finest_only'])}")
    return lines


def _reduction_line(reduction: Mapping[str, Any]) -> str:
    """The reduced model in one line: latent dimension, energy kept, reconstruction check."""
    kept = reduction["energy_kept"]
    return (f"reduced: {reduction['latent_dim']} latent coordinates for {reduction['state_dim']} "
            f"components (POD), energy kept {100 * kept:.6g} % (lost {1 - kept:.3g}); "
            "states whose reconstruction error exceeds "
            f"{reduction['reconstruction']['threshold']:.3g} (normalised RMS) are unlike the data")


def _figure(value: float | None) -> str:
    return "diverged" if value is None else f"{value:.3g}"
