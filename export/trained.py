"""`TrainedLevels`: what `train_levels` returns and `export_bundle` accepts directly.

Kept apart from the training loop so the exporter can recognise it without importing training.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

if TYPE_CHECKING:
    from .pod import PODBasis


@dataclass(frozen=True)
class ForecastExample:
    """One held-out trajectory with its forecasts, for the plots beside report.json.

    Arrays are physical units, shape (len(times), d); `times` in the bundle's time unit.
    """

    times: np.ndarray
    truth: np.ndarray
    hierarchical: np.ndarray
    finest_only: np.ndarray


@dataclass(frozen=True)
class TrainedLevels:
    """Networks trained per stride, with everything a bundle needs to describe them.

    Attributes
    ----------
    levels : mapping of int to torch.nn.Module
        Stride (base steps) to the network N, acting on normalised states (B, d) → (B, d),
        or on latent states (B, r) → (B, r) when `basis` is set.
    mean, scale : tuple of float, length d
        Normalisation from the training split: the networks see z = (x − mean) / scale.
    base_step : float
        Time of one base step (the sampling interval of the trajectories).
    update : str
        "increment": z' = z + N(z).
    history : mapping of int to dict
        Per stride: losses per epoch and final one-step errors (see `train_levels`).
    validation : dict or None
        Held-out figures (JSON-ready); None without held-out data.
    envelope_min, envelope_max : tuple of float or None
        Per-component range of the training split (of its latent states when `basis` is set).
    state_names, state_units : tuple of str or None
        From the data file, when it had them.
    settings : dict
        The training settings, JSON-ready, for the report.
    validation_curve : dict or None
        The manifest `validation` block: metric, tolerance, reference_std, and the deployed
        hierarchy's held-out error curve (`times`, `errors`; null errors: diverged).
    envelope_samples : ndarray, shape (count, d) or (count, r), float32, or None
        Normalised training states z = (x − mean) / scale that the data envelope keeps
        (latent states when `basis` is set).
    envelope_radius : float or None
        A state farther than this (Euclidean, normalised units) from every sample is far from
        the data.
    forecast_example : ForecastExample or None
        Data for the forecast plot (not written to JSON).
    basis : PODBasis or None
        A reduced model's basis (`train_levels(reduce=...)`): the encoder and decoder between
        normalised full states and the latent states the levels step.
    reduction : dict or None
        JSON-ready: the basis summary (energy kept, spectrum) and the reconstruction-error
        threshold, for report.json and the manifest.
    """

    levels: Mapping[int, torch.nn.Module]
    mean: tuple[float, ...]
    scale: tuple[float, ...]
    base_step: float
    update: str = "increment"
    history: Mapping[int, Mapping[str, Any]] = field(default_factory=dict)
    validation: Mapping[str, Any] | None = None
    envelope_min: tuple[float, ...] | None = None
    envelope_max: tuple[float, ...] | None = None
    state_names: tuple[str, ...] | None = None
    state_units: tuple[str, ...] | None = None
    settings: Mapping[str, Any] = field(default_factory=dict)
    validation_curve: Mapping[str, Any] | None = None
    envelope_samples: np.ndarray | None = field(default=None, repr=False, compare=False)
    envelope_radius: float | None = None
    forecast_example: ForecastExample | None = field(default=None, repr=False, compare=False)
    basis: PODBasis | None = field(default=None, repr=False, compare=False)
    reduction: Mapping[str, Any] | None = None

    @property
    def strides(self) -> tuple[int, ...]:
        """Strides in base steps, finest first."""
        return tuple(sorted(self.levels))

    @property
    def state_dim(self) -> int:
        return len(self.mean)

    @property
    def latent_dim(self) -> int | None:
        """r for a reduced model, else None."""
        return None if self.basis is None else self.basis.latent_dim

    @property
    def reconstruction_threshold(self) -> float | None:
        """Normalised RMS reconstruction error above which a full state is unlike the data."""
        if not self.reduction:
            return None
        return self.reduction["reconstruction"]["threshold"]

    @property
    def validated_horizon(self) -> float | None:
        """Longest horizon whose held-out error stays within the tolerance, in time units
        (the first crossing; None without validation)."""
        if not self.validation:
            return None
        return self.validation.get("validated_horizon")

    def history_json(self) -> dict[str, Any]:
        """`history` with string keys, ready for JSON."""
        return {str(stride): dict(entry) for stride, entry in sorted(self.history.items())}
