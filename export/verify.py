"""Verification at export: torch, the stridecast runtime and onnxruntime must agree.

States are drawn in the envelope (or taken from the caller), pushed through every level three
ways, and compared in normalised units against a float32 tolerance (docs/export.md derives it).
"""

from __future__ import annotations

import importlib
from collections import Counter
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
import torch

from stridecast.runtime.errors import BundleError

from .arguments import ExportSpec
from .errors import VerificationError
from .onnx_export import INPUT_NAME, ExportedLevel, PreparedLevel

# float32 unit roundoff u = 2^-24 (IEEE 754 binary32, round to nearest).
FLOAT32_UNIT_ROUNDOFF = 2.0**-24
DEFAULT_SAMPLES = 512
# Without an envelope, states are drawn in mean ± this many scales (the normalised box
# [-3, 3]^d, where trained networks usually see their data).
DEFAULT_BOX_SCALES = 3.0


@dataclass(frozen=True)
class Tolerance:
    """Allowed difference per component, in normalised units.

    |a − b| ≤ relative · (1 + |z'|) + rounding_factor · u · (|x| + |x'| + |mean|) / scale,
    with z' the next normalised state, x and x' the physical states and u = 2^-24.
    """

    relative: float = 1e-4
    rounding_factor: float = 8.0

    def __post_init__(self) -> None:
        for where, value in (("relative", self.relative),
                             ("rounding_factor", self.rounding_factor)):
            if isinstance(value, bool) or not isinstance(value, int | float) \
                    or not np.isfinite(value) or value < 0:
                raise BundleError(
                    f"`Tolerance.{where}` is {value!r}; expected a finite number ≥ 0."
                )

    def bound(self, reference: np.ndarray, states: np.ndarray, next_states: np.ndarray,
              mean: np.ndarray, scale: np.ndarray) -> np.ndarray:
        physical = np.abs(states) + np.abs(next_states) + np.abs(mean)
        return (self.relative * (1.0 + np.abs(reference))
                + self.rounding_factor * FLOAT32_UNIT_ROUNDOFF * physical / scale)


@dataclass(frozen=True)
class ReducedNetworks:
    """The encoder and decoder of a reduced bundle: torch to call and exported ONNX bytes.

    Levels are then verified through the whole path z → encoder → level → decoder → z', in
    normalised full-state units, so the tolerance and the report read as for a full bundle.
    """

    encoder: PreparedLevel
    decoder: PreparedLevel
    encoder_bytes: bytes
    decoder_bytes: bytes


@dataclass(frozen=True)
class StateSample:
    """The physical float32 states used for verification, and where they came from."""

    states: np.ndarray
    source: str
    box_min: tuple[float, ...]
    box_max: tuple[float, ...]


def sample_states(spec: ExportSpec, *, samples: int = DEFAULT_SAMPLES, seed: int = 0,
                  states: Any = None) -> StateSample:
    """Draw `samples` states uniformly in the envelope box, or take them from `states`."""
    if isinstance(samples, bool) or not isinstance(samples, int) or samples < 2:
        raise BundleError(f"`verify_samples` is {samples!r}; expected an integer ≥ 2.")
    rng = np.random.default_rng(seed)
    if states is not None:
        array = np.asarray(states, dtype=np.float64)
        if array.ndim != 2 or array.shape[1] != spec.state_dim or array.shape[0] < 1:
            raise BundleError(
                f"`verify_states` has shape {array.shape}; expected (M, {spec.state_dim})."
            )
        if not np.isfinite(array).all():
            raise BundleError("`verify_states` contains NaN or infinity; expected finite states.")
        if array.shape[0] > samples:
            array = array[np.sort(rng.choice(array.shape[0], samples, replace=False))]
        return StateSample(array.astype(np.float32), "given states",
                           tuple(array.min(axis=0)), tuple(array.max(axis=0)))
    mean, scale = np.asarray(spec.mean), np.asarray(spec.scale)
    if spec.envelope_min is not None and spec.envelope_max is not None:
        lower, upper = np.asarray(spec.envelope_min), np.asarray(spec.envelope_max)
        source = "uniform in the envelope box"
    else:
        lower, upper = mean - DEFAULT_BOX_SCALES * scale, mean + DEFAULT_BOX_SCALES * scale
        source = f"uniform in mean ± {DEFAULT_BOX_SCALES:g}·scale (no envelope given)"
    drawn = rng.uniform(lower, upper, size=(samples, spec.state_dim))
    return StateSample(drawn.astype(np.float32), source, tuple(map(float, lower)),
                       tuple(map(float, upper)))


def normalised_example(spec: ExportSpec, sample: StateSample, batch: int) -> torch.Tensor:
    """The first `batch` verification states in normalised float32 units (export example)."""
    rows = sample.states[np.arange(batch) % sample.states.shape[0]]
    return torch.from_numpy(_normalise(rows, spec).astype(np.float32))


def verify_levels(stepper: Any, prepared: Mapping[int, PreparedLevel],
                  exported: Mapping[int, ExportedLevel], spec: ExportSpec, sample: StateSample,
                  tolerance: Tolerance, reduced: ReducedNetworks | None = None
                  ) -> dict[str, Any]:
    """Compare torch, the runtime `stepper` and onnxruntime on every level; raise on mismatch.

    With `reduced`, each level is compared through encoder, level and decoder, and the
    round trip decoder(encoder(z)) is compared as well (report entry "reduction").

    Returns
    -------
    dict
        The `verification` section of report.json (JSON-ready).

    Raises
    ------
    VerificationError
        If any pair of implementations differs beyond `tolerance`, or an output is non-finite.
    """
    onnxruntime = _optional_onnxruntime()
    levels = []
    for stride in spec.strides:
        outputs = _level_outputs(stepper, prepared[stride], exported[stride], spec, sample,
                                 onnxruntime, reduced)
        levels.append(_compare(stride, outputs, exported[stride], spec, sample, tolerance))
    report: dict[str, Any] = {}
    if reduced is not None:
        outputs = _round_trip_outputs(stepper, reduced, spec, sample, onnxruntime)
        round_trip = _compare(0, outputs, None, spec, sample, tolerance,
                              where="the encoder and decoder (round trip)")
        report["reduction"] = {"max_abs_difference": round_trip["max_abs_difference"],
                               "max_difference_over_tolerance":
                                   round_trip["max_difference_over_tolerance"]}
    return {
        "samples": int(sample.states.shape[0]),
        "states": sample.source,
        "box": {"min": list(sample.box_min), "max": list(sample.box_max)},
        "units": "normalised (z = (x - mean) / scale)",
        "tolerance": {**asdict(tolerance), "unit_roundoff": FLOAT32_UNIT_ROUNDOFF},
        "runtime_dtype": "float32",
        "onnxruntime": None if onnxruntime is None else onnxruntime.__version__,
        "levels": levels,
        **report,
        "passed": True,
    }


def _level_outputs(stepper: Any, prepared: PreparedLevel, exported: ExportedLevel,
                   spec: ExportSpec, sample: StateSample, onnxruntime: Any,
                   reduced: ReducedNetworks | None = None) -> dict[str, np.ndarray]:
    """Next normalised states (float64) of torch, the runtime and onnxruntime (if present)."""
    where = f"level stride {prepared.stride}"
    z_in = _normalise(sample.states, spec).astype(np.float32)
    if reduced is not None:
        return _reduced_level_outputs(stepper, prepared, exported, spec, sample, onnxruntime,
                                      reduced, z_in)
    with torch.no_grad():
        network = prepared.call(torch.from_numpy(z_in)).numpy().astype(np.float64)
    if not np.isfinite(network).all():
        row = int(np.argwhere(~np.isfinite(network))[0, 0])
        raise VerificationError(
            f"{where}: the torch module returns NaN or infinity for the state "
            f"{sample.states[row].tolist()}; the level is not usable inside the envelope."
        )
    outputs = {"torch": _apply_update(z_in, network, spec.update)}
    if onnxruntime is not None:
        result = _onnxruntime_run(onnxruntime, exported.onnx_bytes, z_in, where)
        outputs["onnxruntime"] = _apply_update(z_in, np.asarray(result, np.float64), spec.update)
    _runtime_outputs(stepper, prepared.stride, spec, sample, outputs)
    return outputs


def _runtime_outputs(stepper: Any, stride: int, spec: ExportSpec, sample: StateSample,
                     outputs: dict[str, np.ndarray]) -> None:
    """The runtime's step on the whole sample and on its first state alone, normalised."""
    stepped = np.asarray(stepper.step(sample.states, stride), dtype=np.float64)
    outputs["runtime"] = _normalise(stepped, spec)
    single = np.asarray(stepper.step(sample.states[0], stride), dtype=np.float64)
    outputs["runtime_single"] = _normalise(single[None, :], spec)


def _onnxruntime_run(onnxruntime: Any, model: bytes, inputs: np.ndarray, where: str
                     ) -> np.ndarray:
    try:
        options = onnxruntime.SessionOptions()
        options.log_severity_level = 3
        session = onnxruntime.InferenceSession(model, options,
                                               providers=["CPUExecutionProvider"])
        return session.run(None, {INPUT_NAME: np.ascontiguousarray(inputs, np.float32)})[0]
    # onnxruntime raises its own exception types (not exported by the package).
    except Exception as error:
        raise VerificationError(
            f"{where}: onnxruntime cannot run the exported model: {error}."
        ) from error


def _reduced_level_outputs(stepper: Any, prepared: PreparedLevel, exported: ExportedLevel,
                           spec: ExportSpec, sample: StateSample, onnxruntime: Any,
                           reduced: ReducedNetworks, z_in: np.ndarray
                           ) -> dict[str, np.ndarray]:
    """z' = decoder(update(encoder(z))) of torch and onnxruntime, and the runtime's step."""
    where = f"level stride {prepared.stride}"
    with torch.no_grad():
        latent = reduced.encoder.call(torch.from_numpy(z_in))
        network = prepared.call(latent)
        stepped = latent + network if spec.update == "increment" else network
        result = reduced.decoder.call(stepped).numpy().astype(np.float64)
    if not np.isfinite(result).all():
        raise VerificationError(
            f"{where}: the torch encoder, level and decoder return NaN or infinity; the level "
            "is not usable inside the envelope."
        )
    outputs = {"torch": result}
    if onnxruntime is not None:
        latent = _onnxruntime_run(onnxruntime, reduced.encoder_bytes, z_in, "the encoder")
        network = _onnxruntime_run(onnxruntime, exported.onnx_bytes, latent, where)
        stepped = latent + network if spec.update == "increment" else network
        outputs["onnxruntime"] = np.asarray(
            _onnxruntime_run(onnxruntime, reduced.decoder_bytes, stepped, "the decoder"),
            np.float64)
    _runtime_outputs(stepper, prepared.stride, spec, sample, outputs)
    return outputs


def _round_trip_outputs(stepper: Any, reduced: ReducedNetworks, spec: ExportSpec,
                        sample: StateSample, onnxruntime: Any) -> dict[str, np.ndarray]:
    """decoder(encoder(z)) of torch, onnxruntime and the runtime (a forecast to t = 0)."""
    z_in = _normalise(sample.states, spec).astype(np.float32)
    with torch.no_grad():
        result = reduced.decoder.call(reduced.encoder.call(torch.from_numpy(z_in)))
    outputs = {"torch": result.numpy().astype(np.float64)}
    if onnxruntime is not None:
        latent = _onnxruntime_run(onnxruntime, reduced.encoder_bytes, z_in, "the encoder")
        outputs["onnxruntime"] = np.asarray(
            _onnxruntime_run(onnxruntime, reduced.decoder_bytes, latent, "the decoder"),
            np.float64)
    # At t = 0 the plan has no step: the answer is the encoded state, decoded.
    outputs["runtime"] = _normalise(stepper.forecast(sample.states, [0.0])[0], spec)
    single = stepper.forecast(sample.states[0], [0.0])[0]
    outputs["runtime_single"] = _normalise(np.asarray(single)[None, :], spec)
    return outputs


def _compare(stride: int, outputs: Mapping[str, np.ndarray], exported: ExportedLevel | None,
             spec: ExportSpec, sample: StateSample, tolerance: Tolerance,
             where: str | None = None) -> dict[str, Any]:
    mean, scale = np.asarray(spec.mean), np.asarray(spec.scale)
    reference = outputs["torch"]
    bound = tolerance.bound(reference, sample.states.astype(np.float64),
                            mean + scale * reference, mean, scale)
    pairs: list[tuple[str, str, np.ndarray, np.ndarray]] = [
        ("torch", "runtime", reference, outputs["runtime"]),
        ("runtime", "runtime_single", outputs["runtime"][:1], outputs["runtime_single"]),
    ]
    if "onnxruntime" in outputs:
        pairs += [("torch", "onnxruntime", reference, outputs["onnxruntime"]),
                  ("runtime", "onnxruntime", outputs["runtime"], outputs["onnxruntime"])]
    differences: dict[str, float | None] = {
        "torch_vs_runtime": None, "torch_vs_onnxruntime": None, "runtime_vs_onnxruntime": None}
    worst_ratio = 0.0
    label = f"level stride {stride}" if where is None else where
    for left, right, a, b in pairs:
        rows = a.shape[0]
        difference = np.abs(a - b)
        ratio = np.where(np.isfinite(difference), difference / bound[:rows], np.inf)
        worst = np.unravel_index(int(np.argmax(ratio)), ratio.shape)
        if not ratio[worst] <= 1.0:
            raise VerificationError(
                f"{label}: {left} and {right.replace('_single', ' (one state)')} "
                f"differ by {difference[worst]:.3g} (normalised units) in component "
                f"{spec.state_names[worst[1]]!r} at the state "
                f"{sample.states[worst[0]].tolist()}; the float32 tolerance there is "
                f"{bound[worst]:.3g}. The export was refused."
            )
        worst_ratio = max(worst_ratio, float(ratio[worst]))
        if right != "runtime_single":
            differences[f"{left}_vs_{right}"] = float(difference.max())
    if exported is None:
        return {"max_abs_difference": differences,
                "max_difference_over_tolerance": worst_ratio}
    return {
        "stride": stride,
        "exporter": exported.exporter,
        "opset": exported.opset,
        "operators": dict(sorted(Counter(exported.operators).items())),
        "max_abs_difference": differences,
        "max_difference_over_tolerance": worst_ratio,
    }


def _normalise(states: np.ndarray, spec: ExportSpec) -> np.ndarray:
    return (np.asarray(states, np.float64) - np.asarray(spec.mean)) / np.asarray(spec.scale)


def _apply_update(z_in: np.ndarray, network: np.ndarray, update: str) -> np.ndarray:
    return z_in.astype(np.float64) + network if update == "increment" else network


def _optional_onnxruntime() -> Any:
    try:
        return importlib.import_module("onnxruntime")
    except ImportError:
        return None

