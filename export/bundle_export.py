"""`export_bundle`: torch modules in, a verified bundle directory out.

Every level goes to in-memory ONNX bytes, the bundle is written by the runtime's `write_bundle`
into a private staging directory beside `out`, loaded back with `stridecast.runtime.load`,
compared with torch (and onnxruntime), and only then renamed into place.
"""

from __future__ import annotations

import copy
import json
import logging
import os
import shutil
import sys
import tempfile
from collections.abc import Iterable, Mapping
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import torch
from tqdm.auto import tqdm

import stridecast
from stridecast.runtime import (
    DECODER_FILE,
    ENCODER_FILE,
    SAMPLES_FILE,
    EnvelopeSamples,
    LevelEntry,
    Manifest,
    ModelFile,
    Reduction,
    ValidationCurve,
    encode_samples,
    load,
    write_bundle,
)
from stridecast.runtime.bundle import check_target, move_into_place, write_report
from stridecast.runtime.errors import BundleError

from . import plots, validity
from .arguments import (
    ExportSpec,
    build_spec,
    check_envelope_samples,
    check_exporter,
    check_radius,
    declared_state_dim,
    level_pairs,
)
from .envelope import data_envelope
from .onnx_export import (
    EXAMPLE_BATCH,
    ExportedLevel,
    PreparedLevel,
    export_level,
    infer_state_dim,
    prepare_level,
    quiet_torch,
    resolve_exporter,
)
from .trained import TrainedLevels
from .verify import (
    DEFAULT_SAMPLES,
    ReducedNetworks,
    Tolerance,
    normalised_example,
    sample_states,
    verify_levels,
)

logger = logging.getLogger(__name__)
_PLACEHOLDER_SHA = "0" * 64


def export_bundle(
    levels: Mapping[int, Any] | Iterable[tuple[int, Any]] | TrainedLevels,
    out: str | os.PathLike[str],
    *,
    base_step: float | None = None,
    mean: Any = None,
    scale: Any = None,
    update: str = "increment",
    state_names: Any = None,
    units: Any = None,
    time_unit: str = "s",
    name: str | None = None,
    description: str | None = None,
    envelope: Any = None,
    validation: Mapping[str, Any] | None = None,
    envelope_samples: Any = None,
    envelope_radius: float | None = None,
    overwrite: bool = False,
    exporter: str = "auto",
    opset: int | None = None,
    verify_samples: int = DEFAULT_SAMPLES,
    verify_states: Any = None,
    tolerance: Tolerance | None = None,
    seed: int = 0,
    progress: bool = False,
    encoder: Any = None,
    decoder: Any = None,
) -> Path:
    """Export one torch network per stride into a verified stridecast bundle.

    Parameters
    ----------
    levels : mapping of int to module, or TrainedLevels
        Stride (positive int, in base steps) to a `torch.nn.Module` (TorchScript included)
        or `torch.export.ExportedProgram` mapping normalised states (B, d) → (B, d). A
        `TrainedLevels` brings its own normalisation, update form, base step, envelope and
        validation figures.
    out : path
        The bundle directory to create.
    base_step : float
        Time of one base step (required unless `levels` is a `TrainedLevels`).
    mean, scale : array_like, shape (d,), optional
        Normalisation z = (x − mean) / scale (default 0 and 1); scale > 0, all finite.
    update : {"increment", "replace"}
        z' = z + N(z) or z' = N(z).
    state_names, units : list of str, optional
        Default "x0", "x1", ... and empty units.
    time_unit, name, description : str
        Manifest text; `name` defaults to the directory name.
    envelope : (min, max) or {"min": ..., "max": ...}, optional
        The range the training data covered; verification states are drawn in it.
    validation : dict, optional
        Held-out figures for report.json; its "validated_horizon" goes into the manifest
        (with a `TrainedLevels`, the horizon comes from its held-out error curve instead).
    envelope_samples : array_like, shape (M, d), optional
        Physical states the data covered (e.g. the training states). They are normalised,
        thinned to at most 2,048 by farthest-point sampling, and written to
        `envelope/samples.npy`; the runtime warns about states far from all of them. Without
        `envelope`, their per-component range becomes the envelope box. A `TrainedLevels`
        brings its own.
    envelope_radius : float, optional
        "Far" in normalised units z = (x − mean) / scale; by default learned from the samples
        (docs/export.md, "Envelope").
    overwrite : bool
        Replace an existing bundle (moved aside first, restored on failure).
    exporter : {"auto", "dynamo", "legacy"}
        "auto" uses torch's dynamo exporter (torch.export based) and the legacy TorchScript
        exporter only for TorchScript modules, which torch.export cannot trace.
    opset : int, optional
        ONNX opset to target (default: the exporter's own default).
    verify_samples : int
        Number of verification states (default 512).
    verify_states : array_like, shape (M, d), optional
        Physical states to verify on instead of drawing in the envelope.
    tolerance : Tolerance, optional
        Float32 tolerance of the comparison (docs/export.md).
    seed : int
        Seed of the verification draw.
    progress : bool
        Show a progress bar over the levels on stderr.
    encoder, decoder : torch.nn.Module or torch.export.ExportedProgram, optional
        Give both for a reduced bundle (manifest block `reduction`): the encoder maps
        normalised full states z (B, d) to latent states (B, r), the decoder maps them back,
        and the levels map latent to latent (B, r) → (B, r) under `update`. Both are
        exported and verified like levels; each level is verified through encoder, level
        and decoder. `envelope` then only bounds the verification states (the manifest's
        envelope is latent); `envelope_samples` are physical full states, encoded for the
        latent envelope. A `TrainedLevels` from `train_levels(reduce=...)` brings its POD
        basis as encoder and decoder (then neither may be given), its latent envelope and
        its reconstruction-error threshold (manifest `reduction.reconstruction`).

    Returns
    -------
    Path
        `out`.

    Raises
    ------
    BundleError
        Bad arguments (stride, normalisation, shapes, names), an existing `out` without
        `overwrite`, or an exporter failure; nothing is written.
    VerificationError
        torch, the runtime and onnxruntime disagree; nothing is left under `out`.
    """
    trained = levels if isinstance(levels, TrainedLevels) else None
    reducing = _check_reduction_arguments(encoder, decoder, trained)
    if trained is not None:
        base_step, mean, scale, envelope, validation, state_names, units = _from_trained(
            trained, base_step=base_step, mean=mean, scale=scale, update=update,
            envelope=envelope, validation=validation, state_names=state_names, units=units)
        pairs = level_pairs(trained.levels)
        if trained.basis is not None:
            encoder, decoder = trained.basis.encoder_module(), trained.basis.decoder_module()
            if verify_states is None:
                verify_states = _decoded_samples(trained)
    else:
        pairs = level_pairs(levels)
    if base_step is None:
        raise BundleError("`base_step` is required: the time of one base step (> 0).")
    exporter = check_exporter(exporter)
    validation = _json_ready(validation, "validation")
    target = Path(out)
    check_target(target, overwrite=overwrite)

    state_dim = declared_state_dim(mean=mean, scale=scale, state_names=state_names, units=units,
                                   envelope=envelope)
    if state_dim is None:
        state_dim = _inferred_state_dim([(0, encoder)] if reducing else pairs)
    physical_samples = None
    if envelope_samples is not None:
        physical_samples = check_envelope_samples(envelope_samples, state_dim)
        if envelope is None:
            envelope = (physical_samples.min(axis=0), physical_samples.max(axis=0))
    curve = None if trained is None else trained.validation_curve
    horizon = _validated_horizon(curve, validation)
    spec = build_spec(
        strides=[stride for stride, _ in pairs], state_dim=state_dim, base_step=base_step,
        mean=mean, scale=scale, update=update, state_names=state_names, units=units,
        time_unit=time_unit, name=_default_name(target) if name is None else name,
        description="" if description is None else description, envelope=envelope,
        validated_horizon=horizon,
    )
    sample = sample_states(spec, samples=verify_samples, seed=seed, states=verify_states)
    example = normalised_example(spec, sample, EXAMPLE_BATCH)
    reduced = None
    level_example, level_dim = example, state_dim
    if reducing:
        reduced, level_example = _export_reduction(encoder, decoder, example, exporter=exporter,
                                                   opset=opset)
        level_dim = level_example.shape[1]
        # The manifest's box describes the latent states the levels step.
        box = _latent_box(spec, trained, physical_samples, reduced)
        spec = replace(spec, envelope_min=box and box[0], envelope_max=box and box[1])
    prepared = {stride: prepare_level(stride, level, level_dim, level_example)
                for stride, level in pairs}
    for level in prepared.values():
        resolve_exporter(level, exporter)  # refuse a mismatch before any slow export
    exported = _export_levels(prepared, exporter=exporter, example=level_example, opset=opset,
                              progress=progress)
    samples = _envelope(spec, trained, physical_samples, envelope_radius, reduced)
    manifest = _manifest(spec, exported, curve, samples)
    extra_files = {} if samples is None else {SAMPLES_FILE: encode_samples(samples[0])}
    if reduced is not None:
        manifest = replace(manifest, reduction=Reduction(
            latent_dim=level_dim, encoder=ModelFile(ENCODER_FILE, _PLACEHOLDER_SHA),
            decoder=ModelFile(DECODER_FILE, _PLACEHOLDER_SHA),
            reconstruction_threshold=None if trained is None
            else trained.reconstruction_threshold))
        extra_files |= {ENCODER_FILE: reduced.encoder_bytes, DECODER_FILE: reduced.decoder_bytes}

    target.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=f".{target.name}.export-", dir=target.parent))
    try:
        staged = write_bundle(
            staging / "bundle", manifest,
            {stride: level.onnx_bytes for stride, level in exported.items()},
            extra_files=extra_files)
        stepper = load(staged, dtype="float32", verify=True)
        verification = verify_levels(stepper, prepared, exported, spec, sample,
                                     tolerance or Tolerance(), reduced)
        report = _report(staged, spec, verification, validation, trained)
        if samples is not None:
            report["envelope"] = {"samples": len(samples[0]), "radius": samples[1],
                                  "file": SAMPLES_FILE, "units": "normalised"}
        write_report(staged, report)
        check_target(target, overwrite=overwrite)
        move_into_place(staged, target)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    logger.info("wrote bundle %s (strides %s)", target, list(spec.strides))
    return target


def _check_reduction_arguments(encoder: Any, decoder: Any,
                               trained: TrainedLevels | None) -> bool:
    """Whether the bundle is reduced; refuses half a pair and a pair that contradicts
    `TrainedLevels` (whose basis is the encoder and decoder, or whose levels step full states)."""
    trained_basis = trained is not None and trained.basis is not None
    if encoder is None and decoder is None:
        return trained_basis
    if encoder is None or decoder is None:
        given, missing = ("encoder", "decoder") if decoder is None else ("decoder", "encoder")
        raise BundleError(
            f"`{given}` was given without `{missing}`; a reduced bundle needs both (or "
            "neither)."
        )
    if trained_basis:
        raise BundleError("`encoder`/`decoder` cannot be given with TrainedLevels trained with "
                          "`reduce`: their POD basis is the encoder and decoder.")
    if trained is not None:
        raise BundleError("`encoder`/`decoder` cannot be given with TrainedLevels trained "
                          "without `reduce`: their levels step full states. Train with "
                          "`reduce`, or pass the latent levels as a mapping of stride to "
                          "module.")
    return True


def _decoded_samples(trained: TrainedLevels) -> np.ndarray | None:
    """A reduced model's latent envelope samples as physical full states: realistic
    verification states (a box in d dimensions is mostly far from the data's subspace)."""
    if trained.envelope_samples is None or trained.basis is None:
        return None
    z = trained.basis.decode(np.asarray(trained.envelope_samples, dtype=np.float64))
    return z * np.asarray(trained.scale) + np.asarray(trained.mean)


def _encoded(reduced: ReducedNetworks, physical: np.ndarray, spec: ExportSpec) -> np.ndarray:
    """Physical full states (M, d) through the encoder: latent states (M, r), float64."""
    normalised = (physical - np.asarray(spec.mean)) / np.asarray(spec.scale)
    with torch.no_grad():
        latent = reduced.encoder.call(torch.from_numpy(normalised.astype(np.float32)))
    return latent.detach().double().numpy()


def _latent_box(spec: ExportSpec, trained: TrainedLevels | None, physical: np.ndarray | None,
                reduced: ReducedNetworks) -> tuple[tuple[float, ...], tuple[float, ...]] | None:
    """A reduced bundle's envelope box (latent): the trained one, else that of the encoded
    envelope samples, else none (a full-space `envelope` only bounds verification states)."""
    if trained is not None and trained.basis is not None and trained.envelope_min is not None:
        return tuple(trained.envelope_min), tuple(trained.envelope_max)
    if physical is None:
        return None
    latent = _encoded(reduced, physical, spec)
    return tuple(map(float, latent.min(axis=0))), tuple(map(float, latent.max(axis=0)))


def _export_reduction(encoder: Any, decoder: Any, example: torch.Tensor, *, exporter: str,
                      opset: int | None) -> tuple[ReducedNetworks, torch.Tensor]:
    """Prepare, check and export the encoder and decoder; return them with the latent
    example batch (the encoder applied to `example`) the levels are exported on."""
    dim = example.shape[1]
    # The latent width is what the encoder makes of the example; checked on the way.
    latent_dim = _latent_width(encoder, example)
    prepared_encoder = prepare_level(0, encoder, dim, example, where="the encoder",
                                     output_dim=latent_dim)
    with torch.no_grad():
        latent_example = prepared_encoder.call(example).detach().float().contiguous()
    prepared_decoder = prepare_level(0, decoder, latent_dim, latent_example,
                                     where="the decoder", output_dim=dim)
    encoded = export_level(prepared_encoder, state_dim=dim, exporter=exporter, example=example,
                           opset=opset, where="the encoder", output_dim=latent_dim)
    decoded = export_level(prepared_decoder, state_dim=latent_dim, exporter=exporter,
                           example=latent_example, opset=opset, where="the decoder",
                           output_dim=dim)
    return ReducedNetworks(encoder=prepared_encoder, decoder=prepared_decoder,
                           encoder_bytes=encoded.onnx_bytes,
                           decoder_bytes=decoded.onnx_bytes), latent_example


def _latent_width(encoder: Any, example: torch.Tensor) -> int:
    if isinstance(encoder, torch.export.ExportedProgram):
        call = encoder.module()
    elif isinstance(encoder, torch.nn.Module):
        # A float32 eval copy, as `prepare_level` makes: the caller's module stays as it is.
        with quiet_torch():
            call = copy.deepcopy(encoder).float().eval()
    else:
        call = None
    if call is None:
        raise BundleError(f"`encoder` is a {type(encoder).__name__}; expected a "
                          "torch.nn.Module or a torch.export.ExportedProgram.")
    try:
        with torch.no_grad():
            result = call(example)
    # User code may raise anything; name the encoder and keep the original as the cause.
    except Exception as error:
        raise BundleError(f"the encoder cannot run on a float32 batch of shape "
                          f"{tuple(example.shape)}: {error}.") from error
    if not isinstance(result, torch.Tensor) or result.ndim != 2 or result.shape[1] < 1:
        raise BundleError(
            f"the encoder returns {getattr(result, 'shape', type(result).__name__)}; expected "
            "a tensor of shape (batch, r)."
        )
    return int(result.shape[1])


def _export_levels(prepared: Mapping[int, PreparedLevel], *, exporter: str,
                   example: torch.Tensor, opset: int | None, progress: bool
                   ) -> dict[int, ExportedLevel]:
    exported = {}
    for stride in tqdm(sorted(prepared), desc="export", unit="level", file=sys.stderr,
                       disable=not progress, leave=False):
        level = export_level(prepared[stride], state_dim=example.shape[1], exporter=exporter,
                             example=example, opset=opset)
        logger.info("exported stride %d with the %s exporter (opset %d, %d nodes)", stride,
                    level.exporter, level.opset, len(level.operators))
        exported[stride] = level
    return exported


def _validated_horizon(curve: Mapping[str, Any] | None,
                       validation: Mapping[str, Any] | None) -> float | None:
    """From the error curve by the first-crossing rule, else the figures' own field."""
    if curve is not None:
        return validity.validated_horizon(curve["times"], curve["errors"], curve["tolerance"])
    return None if validation is None else validation.get("validated_horizon")


def _envelope(spec: ExportSpec, trained: TrainedLevels | None, physical: np.ndarray | None,
              radius: float | None, reduced: ReducedNetworks | None
              ) -> tuple[np.ndarray, float] | None:
    """The normalised (latent, for a reduced bundle) envelope samples and radius to write,
    or None."""
    if physical is not None:
        normalised = ((physical - np.asarray(spec.mean)) / np.asarray(spec.scale)
                      if reduced is None else _encoded(reduced, physical, spec))
        samples, learned = data_envelope([normalised])
        return samples, learned if radius is None else check_radius(radius)
    if trained is not None and trained.envelope_samples is not None:
        learned = trained.envelope_radius
        return (np.asarray(trained.envelope_samples, dtype=np.float32),
                check_radius(learned if radius is None else radius))
    if radius is not None:
        raise BundleError("`envelope_radius` was given without `envelope_samples`; pass the "
                          "states the radius refers to.")
    return None


def _manifest(spec: ExportSpec, exported: Mapping[int, ExportedLevel],
              curve: Mapping[str, Any] | None = None,
              samples: tuple[np.ndarray, float] | None = None) -> Manifest:
    """The manifest to write; `write_bundle` fills in files and checksums."""
    return Manifest(
        state_names=spec.state_names, state_units=spec.state_units, base_step=spec.base_step,
        mean=spec.mean, scale=spec.scale, update=spec.update, time_unit=spec.time_unit,
        name=spec.name, description=spec.description, envelope_min=spec.envelope_min,
        envelope_max=spec.envelope_max, validated_horizon=spec.validated_horizon,
        levels=tuple(LevelEntry(stride=stride, file="", sha256=_PLACEHOLDER_SHA)
                     for stride in spec.strides),
        producer=_producer(exported.values()),
        validation=None if curve is None else ValidationCurve(
            metric=curve["metric"], tolerance=float(curve["tolerance"]),
            reference_std=tuple(map(float, curve["reference_std"])),
            times=tuple(map(float, curve["times"])),
            errors=tuple(float("inf") if e is None else float(e) for e in curve["errors"])),
        envelope_samples=None if samples is None else EnvelopeSamples(
            file=SAMPLES_FILE, sha256=_PLACEHOLDER_SHA, count=len(samples[0]),
            radius=samples[1]),
    )


def _report(staged: Path, spec: ExportSpec, verification: dict[str, Any],
            validation: dict[str, Any] | None, trained: TrainedLevels | None
            ) -> dict[str, Any]:
    """The content of report.json; plots are drawn into `staged` on the way."""
    report: dict[str, Any] = {"verification": verification, "validation": validation,
                              "plots": []}
    if trained is not None:
        report["training"] = {"settings": dict(trained.settings),
                              "history": trained.history_json()}
        if trained.reduction is not None:
            report["reduction"] = dict(trained.reduction)
        if trained.forecast_example is not None:
            report["plots"] = plots.write_plots(staged, trained.forecast_example, validation,
                                                spec.state_names, state_units=spec.state_units,
                                                time_unit=spec.time_unit)
    return report


def _from_trained(trained: TrainedLevels, *, base_step, mean, scale, update, envelope,
                  validation, state_names, units) -> tuple:
    """Take the trained normalisation; refuse arguments that would contradict it."""
    for where, given in (("mean", mean), ("scale", scale)):
        if given is not None:
            raise BundleError(
                f"`{where}` cannot be given with TrainedLevels: the networks were trained with "
                "the normalisation they carry."
            )
    if base_step is not None and float(base_step) != trained.base_step:
        raise BundleError(
            f"`base_step` is {base_step!r} but the levels were trained at base step "
            f"{trained.base_step!r}."
        )
    if update != trained.update:
        raise BundleError(
            f"`update` is {update!r} but the levels were trained with {trained.update!r}."
        )
    # A reduced model's box is latent: it becomes the manifest's box later, not the
    # full-space box verification states are drawn in.
    if envelope is None and trained.envelope_min is not None and trained.basis is None:
        envelope = (trained.envelope_min, trained.envelope_max)
    return (trained.base_step, trained.mean, trained.scale, envelope,
            trained.validation if validation is None else validation,
            trained.state_names if state_names is None else state_names,
            trained.state_units if units is None else units)


def _inferred_state_dim(pairs: list[tuple[int, Any]]) -> int:
    for _, level in pairs:
        dim = infer_state_dim(level)
        if dim is not None:
            return dim
    raise BundleError(
        "the state dimension cannot be inferred from the modules; pass `mean`/`scale` or "
        "`state_names`."
    )


def _default_name(target: Path) -> str:
    return target.name.removesuffix(".bundle") or target.name


def _json_ready(value: Mapping[str, Any] | None, where: str) -> dict[str, Any] | None:
    if value is None:
        return None
    if not isinstance(value, Mapping):
        raise BundleError(f"`{where}` is a {type(value).__name__}; expected a mapping.")
    try:
        return json.loads(json.dumps(value, allow_nan=False))
    except (TypeError, ValueError) as error:
        raise BundleError(f"`{where}` must be JSON-serialisable with finite numbers: "
                          f"{error}.") from error


def _producer(exported: Iterable[Any]) -> dict[str, Any]:
    exported = list(exported)
    return {
        "stridecast": stridecast.__version__,
        "torch": torch.__version__,
        "onnx": onnx.__version__,
        "opset": max(level.opset for level in exported),
        "exporter": {str(level.stride): level.exporter for level in exported},
    }
