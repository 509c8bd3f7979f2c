"""The demo's figures: forecast.png (truth against forecasts) and error.png (error by horizon).

matplotlib is imported inside `write_plots`, with a file backend, so the demo runs headless.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from .evaluation import Evaluation
from .settings import BASE_STEP, EXAMPLE_LABEL, HYBRID_BELOW, DemoSettings

FORECAST_PNG = "forecast.png"
ERROR_PNG = "error.png"
DETAIL_SECONDS = 5.0  # the detail panels: about 12 bobs and half a swing
ERROR_FLOOR = 1e-3  # m; the hybrid's first points (Runge–Kutta alone) lie far below it


def write_plots(directory: Path, evaluation: Evaluation,
                settings: DemoSettings) -> tuple[Path, Path]:
    """Write forecast.png and error.png into `directory` (created if needed); return paths."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib import pyplot

    directory.mkdir(parents=True, exist_ok=True)
    suffix = " — QUICK MODE (small data and networks)" if settings.quick else ""
    paths = (directory / FORECAST_PNG, directory / ERROR_PNG)
    for path, draw in zip(paths, (_forecast_figure, _error_figure), strict=True):
        figure = draw(pyplot, evaluation, suffix)
        try:
            figure.savefig(path, dpi=100)
        finally:
            pyplot.close(figure)
    return paths


def _forecast_figure(pyplot: Any, evaluation: Evaluation, suffix: str) -> Any:
    grid, truth = evaluation.grid, evaluation.truth[:, 0]
    figure = pyplot.figure(figsize=(10, 7.5))
    layout = figure.add_gridspec(2, 2)
    swing = figure.add_subplot(layout[0, :])
    lines = (
        ("SciPy truth", truth, {"color": "black", "lw": 1.8}),
        ("hierarchical forecast", evaluation.example_forecast,
         {"color": "tab:blue", "lw": 1.3, "ls": "--"}),
        ("finest level only", evaluation.finest[:, 0],
         {"color": "tab:orange", "lw": 0.9, "alpha": 0.8}),
    )
    for label, values, style in lines:
        swing.plot(grid, values[:, 0], label=label, **style)
    _limit(swing, truth[:, 0])
    swing.set_xlabel("time [s]")
    swing.set_ylabel("x [m] (horizontal)")
    swing.set_title("The swing: horizontal position of the load over the whole horizon",
                    fontsize="medium")
    swing.legend(loc="upper right", fontsize="small")
    window = grid >= grid[-1] - DETAIL_SECONDS - BASE_STEP / 2
    for column, (component, name) in enumerate(((1, "z [m] (height)"),
                                                (3, "vz [m/s] (vertical speed)"))):
        axis = figure.add_subplot(layout[1, column])
        for _, values, style in lines:
            axis.plot(grid[window], values[window, component], **style)
        _limit(axis, truth[window, component])
        axis.set_xlabel("time [s]")
        axis.set_ylabel(name)
        axis.set_title(f"Last {DETAIL_SECONDS:g} s: the fast bob riding on the slow swing",
                       fontsize="medium")
    figure.suptitle(f"Crane load from the example state ({EXAMPLE_LABEL}){suffix}")
    figure.tight_layout()
    return figure


def _limit(axis: Any, reference: np.ndarray) -> None:
    """Keep the axis on the truth (± 25 %), so a diverging rollout cannot flatten the plot."""
    low, high = float(reference.min()), float(reference.max())
    margin = 0.25 * max(high - low, 1e-9)
    axis.set_ylim(low - margin, high + margin)


def _error_figure(pyplot: Any, evaluation: Evaluation, suffix: str) -> Any:
    curves = evaluation.curves
    figure, axis = pyplot.subplots(figsize=(8, 5))
    axis.semilogy(curves["times"], curves["finest"], color="tab:orange",
                  label=f"finest level only (one evaluation per {BASE_STEP:g} s)")
    axis.semilogy(curves["times"], curves["hierarchical"], color="tab:blue",
                  label=f"hierarchical (strides {list(evaluation.strides)})")
    axis.semilogy(curves["times"], curves["hybrid"], color="tab:green", ls="--",
                  label=f"hybrid (strides ≥ {HYBRID_BELOW}, then Runge–Kutta)")
    values = np.concatenate([curves["finest"], curves["hierarchical"]])
    low = min(ERROR_FLOOR, 0.5 * float(values.min()))
    axis.set_ylim(bottom=low)
    if min(curves["hybrid"]) < low:
        axis.annotate(f"hybrid below {low:.2g} m: Runge–Kutta alone, no network yet",
                      xy=(0.02, 0.03), xycoords="axes fraction", fontsize="small",
                      color="tab:green")
    axis.set_xlabel("horizon [s]")
    axis.set_ylabel("position error [m], RMS over held-out states")
    axis.set_title(f"Error against horizon, {len(evaluation.states)} held-out states"
                   + suffix, fontsize="medium")
    axis.grid(True, which="both", alpha=0.3)
    axis.legend(fontsize="small", loc="upper left")
    figure.tight_layout()
    return figure
