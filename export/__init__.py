"""stridecast.export: train networks per stride and export them as verified bundles.

Needs torch and onnx (the `[export]` extra); onnxruntime, when installed, joins the check.
"""

from __future__ import annotations

from .bundle_export import export_bundle
from .data import TrajectoryData, load_trajectories
from .errors import TrainingError, VerificationError
from .networks import ACTIVATIONS, increment_mlp
from .trained import ForecastExample, TrainedLevels
from .training import train_levels
from .verify import Tolerance

__all__ = [
    "ACTIVATIONS",
    "ForecastExample",
    "Tolerance",
    "TrainedLevels",
    "TrainingError",
    "TrajectoryData",
    "VerificationError",
    "export_bundle",
    "increment_mlp",
    "load_trajectories",
    "train_levels",
]
