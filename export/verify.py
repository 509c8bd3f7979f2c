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
                  tolerance: Tolerance) -> dict[str, Any]:
    """Compare torch, the runtime `stepper` and onnxruntime on every level; raise on mismatch.

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
                                 onnxruntime)
        levels.append(_compare(stride, outputs, exported[stride], spec, sample, tolerance))
    return {
        "samples": int(sample.states.shape[0]),
        "states": sample.source,
        "box": {"min": list(sample.box_min), "max": list(sample.box_max)},
        "units": "normalised (z = (x - mean) / scale)",
        "tolerance": {**asdict(tolerance), "unit_roundoff": FLOAT32_UNIT_ROUNDOFF},
        "runtime_dtype": "float32",
        "onnxruntime": None if onnxruntime is None else onnxruntime.__version__,
        "levels": levels,
        "passed": True,
    }


def _level_outputs(stepper: Any, prepared: PreparedLevel, exported: ExportedLevel,
                   spec: ExportSpec, sample: StateSample, onnxruntime: Any
                   ) -> dict[str, np.ndarray]:
    """Next normalised states (float64) of torch, the runtime and onnxruntime (if present)."""
    where = f"level stride {prepared.stride}"
    z_in = _normalise(sample.states, spec).astype(np.float32)
    with torch.no_grad():
        network = prepared.call(torch.from_numpy(z_in)).numpy().astype(np.float64)
    if not np.isfinite(network).all():
        row = int(np.argwhere(~np.isfinite(network))[0, 0])
        raise VerificationError(
            f"{where}: the torch module returns NaN or infinity for the state "
            f"{sample.states[row].tolist()}; the level is not usable inside the envelope."
        )
    outputs = {"torch": _apply_update(z_in, network, spec.update)}
    stepped = np.asarray(stepper.step(sample.states, prepared.stride), dtype=np.float64)
    outputs["runtime"] = _normalise(stepped, spec)
    single = np.asarray(stepper.step(sample.states[0], prepared.stride), dtype=np.float64)
    outputs["runtime_single"] = _normalise(single[None, :], spec)
    if onnxruntime is not None:
        try:
            options = onnxruntime.SessionOptions()
            options.log_severity_level = 3
            session = onnxruntime.InferenceSession(exported.onnx_bytes, options,
                                                   providers=["CPUExecutionProvider"])
            result = session.run(None, {INPUT_NAME: z_in})[0]
        # onnxruntime raises its own exception types (not exported by the package).
        except Exception as error:
            raise VerificationError(
                f"{where}: onnxruntime cannot run the exported model: {error}."
            ) from error
        outputs["onnxruntime"] = _apply_update(z_in, np.asarray(result, np.float64), spec.update)
    return outputs


def _compare(stride: int, outputs: Mapping[str, np.ndarray], exported: ExportedLevel,
             spec: ExportSpec, sample: StateSample, tolerance: Tolerance) -> dict[str, Any]:
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
    for left, right, a, b in pairs:
        rows = a.shape[0]
        difference = np.abs(a - b)
        ratio = np.where(np.isfinite(difference), difference / bound[:rows], np.inf)
        worst = np.unravel_index(int(np.argmax(ratio)), ratio.shape)
        if not ratio[worst] <= 1.0:
            raise VerificationError(
                f"level stride {stride}: {left} and {right.replace('_single', ' (one state)')} "
                f"differ by {difference[worst]:.3g} (normalised units) in component "
                f"{spec.state_names[worst[1]]!r} at the state "
                f"{sample.states[worst[0]].tolist()}; the float32 tolerance there is "
                f"{bound[worst]:.3g}. The export was refused."
            )
        worst_ratio = max(worst_ratio, float(ratio[worst]))
        if right != "runtime_single":
            differences[f"{left}_vs_{right}"] = float(difference.max())
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

