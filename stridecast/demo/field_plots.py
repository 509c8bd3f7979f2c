"""Figures of a field forecast: space–time images and the error against time.

spacetime.png shows the example motion's displacement u(x, t) — SciPy truth, the runtime's
forecast and their difference side by side, the validated horizon marked, and below them the
middle of the line over the first and last seconds; field-error.png the
held-out error against time with the bundle's tolerance. matplotlib is imported inside
`write_plots`, with a file backend, so the demo runs headless.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from . import mooring
from .field_evaluation import FieldEvaluation
from .field_settings import EXAMPLE_LABEL, FieldSettings

SPACETIME_PNG = "spacetime.png"
FIELD_ERROR_PNG = "field-error.png"
DETAIL_SECONDS = 4.0  # the line plots: about 7 string periods, a fifth of a sway


def write_plots(directory: Path, evaluation: FieldEvaluation,
                settings: FieldSettings) -> tuple[Path, Path]:
    """Write spacetime.png and field-error.png into `directory` (created); return the paths."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib import pyplot

    directory.mkdir(parents=True, exist_ok=True)
    suffix = " — QUICK MODE (small data and networks)" if settings.quick else ""
    paths = (directory / SPACETIME_PNG, directory / FIELD_ERROR_PNG)
    for path, draw in zip(paths, (_spacetime_figure, _error_figure), strict=True):
        figure = draw(pyplot, evaluation, suffix)
        try:
            figure.savefig(path, dpi=100)
        finally:
            pyplot.close(figure)
    return paths


def _mark_horizon(axis: Any, evaluation: FieldEvaluation, *, vertical: bool) -> None:
    horizon = evaluation.validated_horizon
    if horizon is None:
        return
    line = axis.axvline if vertical else axis.axhline
    line(horizon, color="tab:red", lw=1.2, ls="--",
         label=f"validated horizon {horizon:g} s")


def _spacetime_figure(pyplot: Any, evaluation: FieldEvaluation, suffix: str) -> Any:
    nodes = evaluation.states.shape[1] // 2
    truth = evaluation.truth[:, 0, :nodes]
    forecast = evaluation.forecast[:, 0, :nodes]
    error = forecast - truth
    # x from the bollard (0) to the boat; t downwards, as a seismogram is read.
    positions = mooring.DEFAULT_PARAMETERS.positions
    extent = (0.0, positions[-1], evaluation.grid[-1], evaluation.grid[0])
    limit = float(np.abs(truth).max()) or 1.0
    figure = pyplot.figure(figsize=(13, 9))
    layout = figure.add_gridspec(2, 3, height_ratios=(2.2, 1))
    images = [figure.add_subplot(layout[0, column]) for column in range(3)]
    panels = ((truth, "SciPy truth", limit),
              (forecast, "stridecast forecast (NumPy runtime)", limit),
              (error, "forecast − truth (own colour scale)", float(np.abs(error).max()) or 1.0))
    for axis, (values, title, scale) in zip(images, panels, strict=True):
        image = axis.imshow(values, aspect="auto", extent=extent, cmap="RdBu_r",
                            vmin=-scale, vmax=scale, interpolation="nearest")
        figure.colorbar(image, ax=axis, label="displacement u [m]", fraction=0.05)
        _mark_horizon(axis, evaluation, vertical=False)
        axis.set_xlabel("position along the line x [m] (boat at the right)")
        axis.set_title(title, fontsize="medium")
    images[0].set_ylabel("time [s]")
    if evaluation.validated_horizon is not None:
        images[0].legend(loc="lower left", fontsize="small")
    # The fast vibration riding on the slow sway, at the middle of the line.
    middle = nodes // 2 - 1
    for column, (title, window) in enumerate((
            ("first", evaluation.grid <= DETAIL_SECONDS),
            ("last", evaluation.grid >= evaluation.grid[-1] - DETAIL_SECONDS))):
        axis = figure.add_subplot(layout[1, column])
        axis.plot(evaluation.grid[window], truth[window, middle], color="black", lw=1.6,
                  label="SciPy truth")
        axis.plot(evaluation.grid[window], forecast[window, middle], color="tab:blue",
                  lw=1.1, ls="--", label="forecast")
        if column == 0:
            _mark_horizon(axis, evaluation, vertical=True)
        axis.set_xlabel("time [s]")
        axis.set_ylabel(f"u at x = {positions[middle]:g} m [m]")
        axis.set_title(f"{title.capitalize()} {DETAIL_SECONDS:g} s at mid-line: vibration on "
                       "the sway", fontsize="medium")
        axis.legend(fontsize="small", loc="upper right")
    figure.suptitle(f"Mooring line from the example state ({EXAMPLE_LABEL}){suffix}",
                    fontsize="medium")
    figure.tight_layout()
    return figure


def _error_figure(pyplot: Any, evaluation: FieldEvaluation, suffix: str) -> Any:
    figure, axis = pyplot.subplots(figsize=(8, 5))
    times, errors = evaluation.grid[1:], evaluation.errors[1:]
    axis.semilogy(times, errors, color="tab:blue",
                  label=f"runtime forecast, {len(evaluation.states)} held-out states")
    if evaluation.tolerance is not None:
        axis.axhline(evaluation.tolerance, color="black", lw=1, ls=":",
                     label=f"tolerance the bundle records ({evaluation.tolerance:g})")
    _mark_horizon(axis, evaluation, vertical=True)
    axis.set_xlabel("horizon [s]")
    axis.set_ylabel("normalised RMS error (the bundle's metric)")
    axis.set_title("Error against horizon" + suffix, fontsize="medium")
    axis.grid(True, which="both", alpha=0.3)
    axis.legend(fontsize="small", loc="lower right")
    figure.tight_layout()
    return figure
