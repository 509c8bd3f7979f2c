"""PNG figures beside report.json: forecast against held-out truth, and error against horizon.

matplotlib is optional; without it no figure is written and the report says so.
"""

from __future__ import annotations

import importlib
import logging
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from .trained import ForecastExample

logger = logging.getLogger(__name__)
FORECAST_PNG = "forecast.png"
ERROR_PNG = "error-vs-horizon.png"
# The forecast figure shows at most this many components (evenly spaced, first and last
# included): a field of hundreds of points would otherwise get hundreds of panels.
FORECAST_COMPONENTS = 6


def write_plots(directory: Path, example: ForecastExample, validation: Mapping[str, Any] | None,
                state_names: Sequence[str], *, state_units: Sequence[str] = (),
                time_unit: str = "s") -> list[str]:
    """Write the figures into `directory` and return their file names ([] without matplotlib)."""
    figure_class = _figure_class()
    if figure_class is None:
        logger.info("matplotlib is not installed; no plots were written")
        return []
    labels = [f"{name} [{unit}]" if unit else name
              for name, unit in zip(state_names, list(state_units) or [""] * len(state_names),
                                    strict=True)]
    written = [_forecast_figure(figure_class, directory, example, labels, time_unit)]
    horizons = (validation or {}).get("horizons") or []
    if horizons:
        written.append(_error_figure(figure_class, directory, horizons, time_unit,
                                     validation))
    return written


def _figure_class() -> Any:
    """matplotlib's `Figure`, used without pyplot so no global backend is touched."""
    try:
        return importlib.import_module("matplotlib.figure").Figure
    except ImportError:
        return None


def _forecast_figure(figure_class: Any, directory: Path, example: ForecastExample,
                     labels: Sequence[str], time_unit: str) -> str:
    total = example.truth.shape[1]
    shown = np.unique(np.linspace(0, total - 1, min(total, FORECAST_COMPONENTS))
                      .round().astype(np.int64))
    dim = len(shown)
    figure = figure_class(figsize=(8, 2.2 * dim + 0.6))
    axes = figure.subplots(dim, 1, sharex=True, squeeze=False)
    for component, axis in zip(shown.tolist(), axes[:, 0], strict=True):
        axis.plot(example.times, example.truth[:, component], color="black", lw=1.6,
                  label="held-out truth")
        axis.plot(example.times, example.hierarchical[:, component], color="tab:blue",
                  lw=1.1, ls="--", label="hierarchical forecast")
        axis.plot(example.times, example.finest_only[:, component], color="tab:orange",
                  lw=1.0, ls=":", label="finest level only")
        axis.set_ylabel(labels[component])
    axes[0, 0].legend(loc="upper right", fontsize="small")
    axes[-1, 0].set_xlabel(f"time [{time_unit}]")
    figure.suptitle("Forecast from the first held-out state")
    figure.tight_layout()
    figure.savefig(directory / FORECAST_PNG, dpi=110)
    return FORECAST_PNG


def _error_figure(figure_class: Any, directory: Path, horizons: Sequence[Mapping[str, Any]],
                  time_unit: str, validation: Mapping[str, Any]) -> str:
    times = np.array([row["time"] for row in horizons], dtype=float)
    figure = figure_class(figsize=(6.5, 4.2))
    axis = figure.subplots()
    for key, label, style in (("hierarchical_rmse", "hierarchical", "o-"),
                              ("finest_only_rmse", "finest level only", "s--")):
        values = np.array([row[key] for row in horizons], dtype=float)
        axis.plot(times, values, style, label=label)
    curve = validation.get("curve")
    if curve:  # the deployed hierarchy on the dense grid, its tolerance and validated horizon
        values = np.array([np.nan if e is None else e for e in curve["errors"]], dtype=float)
        axis.plot(curve["times"], values, "-", color="tab:blue", lw=0.8, alpha=0.6)
        axis.axhline(validation["tolerance"], color="gray", ls=":", label="tolerance")
        if validation.get("validated_horizon"):
            axis.axvline(validation["validated_horizon"], color="gray", ls="--",
                         label="validated horizon")
    axis.set_xscale("log")
    axis.set_yscale("log")
    axis.set_xlabel(f"horizon [{time_unit}]")
    axis.set_ylabel("normalised RMS error")
    axis.set_title("Held-out error against horizon")
    axis.grid(True, which="both", alpha=0.3)
    axis.legend()
    figure.tight_layout()
    figure.savefig(directory / ERROR_PNG, dpi=110)
    return ERROR_PNG
