"""The bundle manifest (format `stridecast.bundle`, version 1): parse, validate, serialise.

All validation of `manifest.json` lives here; messages name the field, the value and what was
expected. The reader refuses fields it does not know where they could change meaning.
"""

from __future__ import annotations

import itertools
import json
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from .errors import BundleError
from .validation import check_stride

FORMAT_NAME = "stridecast.bundle"
FORMAT_VERSION = 1
UPDATE_FORMS = ("increment", "replace")
_SHA256 = re.compile(r"^[0-9a-f]{64}$")
_TOP_LEVEL = {
    "format", "format_version", "name", "description", "state", "time", "normalization",
    "update", "levels", "envelope", "validated_horizon", "validation", "producer", "reduction",
}
VALIDATION_METRICS = ("normalised_rms",)
SAMPLES_FILE = "envelope/samples.npy"
"""The conventional path of the envelope samples inside a bundle."""
ENCODER_FILE = "reduction/encoder.onnx"
RECONSTRUCTION_METRIC = "normalised_rms"
DECODER_FILE = "reduction/decoder.onnx"
"""The conventional paths of a reduced bundle's encoder and decoder."""
_REQUIRED = {"format", "format_version", "state", "time", "normalization", "update", "levels"}


@dataclass(frozen=True)
class LevelEntry:
    """One network level: its stride in base steps and the ONNX file that holds it."""

    stride: int
    file: str
    sha256: str
    input: str = "state"
    output: str = "next"


@dataclass(frozen=True)
class ValidationCurve:
    """The held-out error curve of the deployed hierarchy (manifest block `validation`).

    Attributes
    ----------
    metric : str
        How `errors` were measured; "normalised_rms": per-component error divided by
        `reference_std`, root-mean-square over components and held-out start states.
    tolerance : float
        The error the validated horizon was judged against.
    reference_std : tuple of float, length d
        Each component's standard deviation over the training data.
    times : tuple of float
        Horizons, ascending, ≥ 0, in time units.
    errors : tuple of float
        The error at each horizon; `math.inf` where the forecast diverged (null in JSON).
    """

    metric: str
    tolerance: float
    reference_std: tuple[float, ...]
    times: tuple[float, ...]
    errors: tuple[float, ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "metric": self.metric,
            "tolerance": self.tolerance,
            "reference_std": list(self.reference_std),
            "times": list(self.times),
            "errors": [error if math.isfinite(error) else None for error in self.errors],
        }


@dataclass(frozen=True)
class EnvelopeSamples:
    """Normalised training states kept in the bundle (manifest block `envelope.samples`).

    Attributes
    ----------
    file : str
        Path of the `.npy` file inside the bundle, shape (count, d), float32 or float64.
    sha256 : str
        Its checksum (`write_bundle` fills it in).
    count : int
        Rows of the file.
    radius : float
        A state is far from the data when its distance, in normalised units
        z = (x − mean) / scale, to the nearest sample exceeds this.
    """

    file: str
    sha256: str
    count: int
    radius: float

    def to_dict(self) -> dict[str, Any]:
        return {"file": self.file, "sha256": self.sha256, "count": self.count,
                "radius": self.radius}


@dataclass(frozen=True)
class ModelFile:
    """An ONNX file of the bundle other than a level (the encoder or the decoder)."""

    file: str
    sha256: str

    def to_dict(self) -> dict[str, Any]:
        return {"file": self.file, "sha256": self.sha256}


@dataclass(frozen=True)
class Reduction:
    """The manifest block `reduction`: the levels run in a latent space of `latent_dim`.

    The encoder maps the normalised full state z = (x − mean) / scale, shape (B, d), to the
    latent (B, r); the levels map latent to latent (without normalisation); the decoder maps
    the latent (B, r) back to z, shape (B, d), and x = z · scale + mean.

    `reconstruction_threshold` (optional, block `reconstruction`, metric "normalised_rms"):
    a full state whose reconstruction error, the RMS over components of
    z − decoder(encoder(z)), exceeds it is unlike the data the basis was fitted to.
    """

    latent_dim: int
    encoder: ModelFile
    decoder: ModelFile
    reconstruction_threshold: float | None = None

    def to_dict(self) -> dict[str, Any]:
        block = {"latent_dim": self.latent_dim, "encoder": self.encoder.to_dict(),
                 "decoder": self.decoder.to_dict()}
        if self.reconstruction_threshold is not None:
            block["reconstruction"] = {"metric": RECONSTRUCTION_METRIC,
                                       "threshold": self.reconstruction_threshold}
        return block


@dataclass(frozen=True)
class Manifest:
    """The validated content of `manifest.json`."""

    state_names: tuple[str, ...]
    state_units: tuple[str, ...]
    base_step: float
    mean: tuple[float, ...]
    scale: tuple[float, ...]
    levels: tuple[LevelEntry, ...]
    update: str = "increment"
    time_unit: str = "s"
    name: str = ""
    description: str = ""
    envelope_min: tuple[float, ...] | None = None
    envelope_max: tuple[float, ...] | None = None
    validated_horizon: float | None = None
    producer: Mapping[str, Any] = field(default_factory=dict)
    validation: ValidationCurve | None = None
    envelope_samples: EnvelopeSamples | None = None
    reduction: Reduction | None = None

    @property
    def state_dim(self) -> int:
        return len(self.state_names)

    @property
    def level_dim(self) -> int:
        """The length of the states the levels map: the latent dimension of a reduced
        bundle, else the state dimension (also the length of the envelope)."""
        return self.state_dim if self.reduction is None else self.reduction.latent_dim

    @property
    def strides(self) -> tuple[int, ...]:
        """Strides in base steps, finest first."""
        return tuple(sorted(level.stride for level in self.levels))

    def level(self, stride: int) -> LevelEntry:
        for entry in self.levels:
            if entry.stride == stride:
                return entry
        raise KeyError(stride)

    def to_dict(self) -> dict[str, Any]:
        envelope = None
        if self.envelope_min is not None and self.envelope_max is not None:
            envelope = {"min": list(self.envelope_min), "max": list(self.envelope_max)}
            if self.envelope_samples is not None:
                envelope["samples"] = self.envelope_samples.to_dict()
        document = {
            "format": FORMAT_NAME,
            "format_version": FORMAT_VERSION,
            "name": self.name,
            "description": self.description,
            "state": {
                "dim": self.state_dim,
                "names": list(self.state_names),
                "units": list(self.state_units),
            },
            "time": {"base_step": self.base_step, "unit": self.time_unit},
            "normalization": {"mean": list(self.mean), "scale": list(self.scale)},
            "update": self.update,
            "levels": [
                {"stride": lv.stride, "file": lv.file, "sha256": lv.sha256,
                 "input": lv.input, "output": lv.output}
                for lv in sorted(self.levels, key=lambda lv: lv.stride)
            ],
            "envelope": envelope,
            "validated_horizon": self.validated_horizon,
            "producer": dict(self.producer),
        }
        if self.validation is not None:
            document["validation"] = self.validation.to_dict()
        if self.reduction is not None:
            document["reduction"] = self.reduction.to_dict()
        return document


def level_file_name(stride: int) -> str:
    """The conventional relative path of a level's ONNX file."""
    return f"levels/stride-{stride:05d}.onnx"


def parse_manifest_text(text: bytes | str, *, max_bytes: int = 1024 * 1024) -> Manifest:
    """Parse and validate the bytes of `manifest.json`."""
    if len(text) > max_bytes:
        raise BundleError(
            f"`manifest.json` is {len(text)} bytes; the limit is {max_bytes} bytes."
        )

    def refuse_constant(name: str) -> float:
        raise BundleError(f"`manifest.json` contains {name}; only finite numbers are allowed.")

    try:
        document = json.loads(text, parse_constant=refuse_constant)
    except RecursionError as error:
        raise BundleError("`manifest.json` is nested too deeply to be a manifest.") from error
    except (ValueError, UnicodeDecodeError) as error:
        if isinstance(error, BundleError):
            raise
        raise BundleError(f"`manifest.json` is not valid JSON: {error}.") from error
    return parse_manifest(document)


def parse_manifest(document: Any) -> Manifest:
    """Validate a decoded manifest document and return a `Manifest`."""
    if not isinstance(document, dict):
        raise BundleError(
            f"the manifest must be a JSON object; got {type(document).__name__}."
        )
    unknown = sorted(k for k in document if k not in _TOP_LEVEL and not str(k).startswith("x-"))
    if unknown:
        raise BundleError(
            f"the manifest has unknown fields {unknown}; known fields are {sorted(_TOP_LEVEL)} "
            "(extensions must start with 'x-')."
        )
    missing = sorted(_REQUIRED - document.keys())
    if missing:
        raise BundleError(f"the manifest lacks the required fields {missing}.")
    if document["format"] != FORMAT_NAME:
        raise BundleError(
            f"`format` is {document['format']!r}; expected {FORMAT_NAME!r}."
        )
    version = document["format_version"]
    if version != FORMAT_VERSION or isinstance(version, bool):
        raise BundleError(
            f"`format_version` is {version!r}; this reader knows version {FORMAT_VERSION} only."
        )

    state = _object(document["state"], "state", required={"dim", "names"}, optional={"units"})
    dim = _positive_int(state["dim"], "state.dim")
    names = _strings(state["names"], "state.names", dim)
    if len(set(names)) != dim:
        raise BundleError(f"`state.names` must be distinct; got {list(names)}.")
    units = _strings(state.get("units", [""] * dim), "state.units", dim)

    time = _object(document["time"], "time", required={"base_step"}, optional={"unit"})
    base_step = _finite(time["base_step"], "time.base_step")
    if base_step <= 0:
        raise BundleError(f"`time.base_step` must be > 0; got {base_step!r}.")
    time_unit = _string(time.get("unit", "s"), "time.unit")

    normalization = _object(document["normalization"], "normalization", required={"mean", "scale"})
    mean = _floats(normalization["mean"], "normalization.mean", dim)
    scale = _floats(normalization["scale"], "normalization.scale", dim)
    bad_scale = [s for s in scale if s <= 0]
    if bad_scale:
        raise BundleError(f"`normalization.scale` must be > 0 everywhere; got {list(scale)}.")

    update = document["update"]
    if update not in UPDATE_FORMS:
        raise BundleError(f"`update` is {update!r}; expected one of {list(UPDATE_FORMS)}.")

    levels = _levels(document["levels"])
    reduction = document.get("reduction")
    if reduction is not None:
        reduction = _reduction(reduction, levels)
    # The envelope describes the states the levels visit: latent in a reduced bundle.
    space = dim if reduction is None else reduction.latent_dim

    envelope_min = envelope_max = samples = None
    envelope = document.get("envelope")
    if envelope is not None:
        envelope = _object(envelope, "envelope", required={"min", "max"}, optional={"samples"})
        envelope_min = _floats(envelope["min"], "envelope.min", space)
        envelope_max = _floats(envelope["max"], "envelope.max", space)
        if any(lo > hi for lo, hi in zip(envelope_min, envelope_max, strict=True)):
            raise BundleError("`envelope.min` must not exceed `envelope.max` in any component.")
        if envelope.get("samples") is not None:
            samples = _envelope_samples(envelope["samples"])
    if samples is not None and samples.file in _model_files(levels, reduction):
        owner = "a level" if samples.file in {lv.file for lv in levels} else "the reduction"
        raise BundleError(
            f"`envelope.samples.file` is {samples.file!r}, the file of {owner}; expected a "
            f"file of its own such as {SAMPLES_FILE!r}."
        )
    validation = document.get("validation")
    if validation is not None:
        validation = _validation(validation, dim)

    horizon = document.get("validated_horizon")
    if horizon is not None:
        horizon = _finite(horizon, "validated_horizon")
        if horizon < 0:
            raise BundleError(f"`validated_horizon` must be ≥ 0 or null; got {horizon!r}.")

    producer = document.get("producer", {})
    if not isinstance(producer, dict):
        raise BundleError(f"`producer` must be an object; got {type(producer).__name__}.")

    return Manifest(
        name=_string(document.get("name", ""), "name"),
        description=_string(document.get("description", ""), "description"),
        state_names=names,
        state_units=units,
        base_step=base_step,
        time_unit=time_unit,
        mean=mean,
        scale=scale,
        update=update,
        levels=levels,
        envelope_min=envelope_min,
        envelope_max=envelope_max,
        validated_horizon=horizon,
        producer=producer,
        validation=validation,
        envelope_samples=samples,
        reduction=reduction,
    )


def _model_files(levels: tuple[LevelEntry, ...], reduction: Reduction | None) -> set[str]:
    files = {level.file for level in levels}
    if reduction is not None:
        files |= {reduction.encoder.file, reduction.decoder.file}
    return files


def _reduction(value: Any, levels: tuple[LevelEntry, ...]) -> Reduction:
    block = _object(value, "reduction", required={"latent_dim", "encoder", "decoder"},
                    optional={"reconstruction"})
    latent_dim = _positive_int(block["latent_dim"], "reduction.latent_dim")
    files = []
    for part in ("encoder", "decoder"):
        where = f"reduction.{part}"
        entry = _object(block[part], where, required={"file", "sha256"})
        file = _string(entry["file"], f"{where}.file")
        digest = _string(entry["sha256"], f"{where}.sha256")
        if not _SHA256.match(digest):
            raise BundleError(
                f"`{where}.sha256` must be 64 lowercase hexadecimal digits; got {digest!r}."
            )
        if file in {level.file for level in levels}:
            raise BundleError(
                f"`{where}.file` is {file!r}, the file of a level; expected a file of its own "
                f"such as {(ENCODER_FILE if part == 'encoder' else DECODER_FILE)!r}."
            )
        files.append(ModelFile(file=file, sha256=digest))
    if files[0].file == files[1].file:
        raise BundleError(
            f"`reduction.encoder.file` and `reduction.decoder.file` are both {files[0].file!r}; "
            "expected two files."
        )
    threshold = None
    if block.get("reconstruction") is not None:
        threshold = _reconstruction(block["reconstruction"])
    return Reduction(latent_dim=latent_dim, encoder=files[0], decoder=files[1],
                     reconstruction_threshold=threshold)


def _reconstruction(value: Any) -> float:
    block = _object(value, "reduction.reconstruction", required={"metric", "threshold"})
    if block["metric"] != RECONSTRUCTION_METRIC:
        raise BundleError(f"`reduction.reconstruction.metric` is {block['metric']!r}; expected "
                          f"{RECONSTRUCTION_METRIC!r}.")
    threshold = _finite(block["threshold"], "reduction.reconstruction.threshold")
    if threshold <= 0:
        raise BundleError(
            f"`reduction.reconstruction.threshold` must be > 0; got {threshold!r}.")
    return threshold


def _validation(value: Any, dim: int) -> ValidationCurve:
    block = _object(value, "validation",
                    required={"metric", "tolerance", "reference_std", "times", "errors"})
    metric = _string(block["metric"], "validation.metric")
    if metric not in VALIDATION_METRICS:
        raise BundleError(
            f"`validation.metric` is {metric!r}; expected one of {list(VALIDATION_METRICS)}."
        )
    tolerance = _finite(block["tolerance"], "validation.tolerance")
    if tolerance <= 0:
        raise BundleError(f"`validation.tolerance` must be > 0; got {tolerance!r}.")
    reference_std = _floats(block["reference_std"], "validation.reference_std", dim)
    if any(std <= 0 for std in reference_std):
        raise BundleError(
            f"`validation.reference_std` must be > 0 everywhere; got {list(reference_std)}."
        )
    times, errors = block["times"], block["errors"]
    if not isinstance(times, list) or not times:
        raise BundleError(f"`validation.times` must be a non-empty list of times; got {times!r}.")
    if not isinstance(errors, list) or len(errors) != len(times):
        raise BundleError(
            f"`validation.errors` must be a list of {len(times)} numbers or nulls (one per "
            f"entry of `validation.times`); got {errors!r}."
        )
    times = tuple(_finite(t, f"validation.times[{i}]") for i, t in enumerate(times))
    if times[0] < 0 or any(b <= a for a, b in itertools.pairwise(times)):
        raise BundleError(
            f"`validation.times` must be ≥ 0 and strictly ascending; got {list(times)}."
        )
    curve = []
    for index, error in enumerate(errors):
        if error is None:  # the forecast diverged at that horizon
            curve.append(math.inf)
            continue
        error = _finite(error, f"validation.errors[{index}]")
        if error < 0:
            raise BundleError(
                f"`validation.errors[{index}]` must be ≥ 0 or null; got {error!r}."
            )
        curve.append(error)
    return ValidationCurve(metric=metric, tolerance=tolerance, reference_std=reference_std,
                           times=times, errors=tuple(curve))


def _envelope_samples(value: Any) -> EnvelopeSamples:
    block = _object(value, "envelope.samples", required={"file", "sha256", "count", "radius"})
    file = _string(block["file"], "envelope.samples.file")
    digest = _string(block["sha256"], "envelope.samples.sha256")
    if not _SHA256.match(digest):
        raise BundleError(
            "`envelope.samples.sha256` must be 64 lowercase hexadecimal digits; "
            f"got {digest!r}."
        )
    count = _positive_int(block["count"], "envelope.samples.count")
    radius = _finite(block["radius"], "envelope.samples.radius")
    if radius <= 0:
        raise BundleError(f"`envelope.samples.radius` must be > 0; got {radius!r}.")
    return EnvelopeSamples(file=file, sha256=digest, count=count, radius=radius)


def _levels(value: Any) -> tuple[LevelEntry, ...]:
    if not isinstance(value, list) or not value:
        raise BundleError("`levels` must be a non-empty list of level objects.")
    entries = []
    for index, item in enumerate(value):
        where = f"levels[{index}]"
        item = _object(item, where, required={"stride", "file", "sha256"},
                       optional={"input", "output"})
        stride = check_stride(item["stride"], where=f"{where}.stride")
        file = _string(item["file"], f"{where}.file")
        digest = _string(item["sha256"], f"{where}.sha256")
        if not _SHA256.match(digest):
            raise BundleError(
                f"`{where}.sha256` must be 64 lowercase hexadecimal digits; got {digest!r}."
            )
        entries.append(LevelEntry(
            stride=stride, file=file, sha256=digest,
            input=_string(item.get("input", "state"), f"{where}.input"),
            output=_string(item.get("output", "next"), f"{where}.output"),
        ))
    strides = [entry.stride for entry in entries]
    if len(set(strides)) != len(strides):
        raise BundleError(f"`levels` strides must be distinct; got {strides}.")
    files = [entry.file for entry in entries]
    if len(set(files)) != len(files):
        raise BundleError(f"`levels` files must be distinct; got {files}.")
    return tuple(sorted(entries, key=lambda entry: entry.stride))


def _object(value: Any, where: str, *, required: set[str], optional: set[str] = frozenset()
            ) -> dict[str, Any]:
    if not isinstance(value, dict):
        raise BundleError(f"`{where}` must be an object; got {type(value).__name__}.")
    unknown = sorted(set(value) - required - optional)
    if unknown:
        raise BundleError(
            f"`{where}` has unknown fields {unknown}; expected {sorted(required | optional)}."
        )
    missing = sorted(required - set(value))
    if missing:
        raise BundleError(f"`{where}` lacks the fields {missing}.")
    return value


def _string(value: Any, where: str) -> str:
    if not isinstance(value, str):
        raise BundleError(f"`{where}` must be a string; got {value!r}.")
    return value


def _strings(value: Any, where: str, dim: int) -> tuple[str, ...]:
    if not isinstance(value, list) or len(value) != dim:
        raise BundleError(f"`{where}` must be a list of {dim} strings; got {value!r}.")
    return tuple(_string(item, f"{where}[{i}]") for i, item in enumerate(value))


def _finite(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise BundleError(f"`{where}` must be a finite number; got {value!r}.")
    return float(value)


def _floats(value: Any, where: str, dim: int) -> tuple[float, ...]:
    if not isinstance(value, list) or len(value) != dim:
        raise BundleError(f"`{where}` must be a list of {dim} finite numbers; got {value!r}.")
    return tuple(_finite(item, f"{where}[{i}]") for i, item in enumerate(value))


def _positive_int(value: Any, where: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value <= 0:
        raise BundleError(f"`{where}` must be a positive integer; got {value!r}.")
    return value

