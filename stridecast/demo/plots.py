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
RUNAWAY_METRES = 24.0  # m, about the cable's length: an error past it is no forecast at all


# Labels of the marks every figure carries; tests find the artists by them.
ENVELOPE_LABEL = "training envelope (range of the training data)"
HORIZON_LABEL = "validated horizon"
RUNAWAY_LABEL = "runaway"


def write_plots(directory: Path, evaluation: Evaluation,
                settings: DemoSettings) -> tuple[Path, Path]:
    """Write forecast.png and error.png into `directory` (created if needed); return paths."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib import pyplot

    directory.mkdir(parents=True, exist_ok=True)
    suffix = " — QUICK MODE (small data and networks)" if settings.quick else ""
    paths = (directory / FORECAST_PNG, directory / ERROR_PNG)
    for path, draw in zip(paths, (forecast_figure, error_figure), strict=True):
        figure = draw(pyplot, evaluation, suffix)
        try:
            # "tight" keeps the legends placed beside the axes inside the image.
            figure.savefig(path, dpi=100, bbox_inches="tight")
        finally:
            pyplot.close(figure)
    return paths


def forecast_figure(pyplot: Any, evaluation: Evaluation, suffix: str) -> Any:
    """Truth, hierarchical forecast and finest-level rollout of the example state; the
    training envelope shaded and the validated horizon marked. Returns the open figure."""
    grid, truth = evaluation.grid, evaluation.truth[:, 0]
    figure = pyplot.figure(figsize=(11, 7.5))
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
    _mark_envelope(swing, evaluation, 0)
    _mark_horizon(swing, evaluation)
    swing.set_xlabel("time [s]")
    swing.set_ylabel("x [m] (horizontal)")
    swing.set_title("The slow swing: horizontal position x over the whole horizon",
                    fontsize="medium")
    # Beside the axes, never over the curves.
    swing.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize="small",
                 borderaxespad=0.0)
    window = grid >= grid[-1] - DETAIL_SECONDS - BASE_STEP / 2
    for column, (component, name, title) in enumerate((
            (1, "z [m] (height)", f"The fast bob: height z, last {DETAIL_SECONDS:g} s"),
            (3, "vz [m/s] (vertical speed)",
             f"The fast bob: vertical speed vz, last {DETAIL_SECONDS:g} s"))):
        axis = figure.add_subplot(layout[1, column])
        for _, values, style in lines:
            axis.plot(grid[window], values[window, component], **style)
        _limit(axis, truth[window, component])
        _mark_envelope(axis, evaluation, component)
        axis.set_xlabel("time [s]")
        axis.set_ylabel(name)
        axis.set_title(title, fontsize="medium")
    figure.suptitle(f"Crane load from the example state ({EXAMPLE_LABEL}){suffix}")
    figure.tight_layout()
    return figure


def _limit(axis: Any, reference: np.ndarray) -> None:
    """Keep the axis on the truth (± 25 %), so a diverging rollout cannot flatten the plot."""
    low, high = float(reference.min()), float(reference.max())
    margin = 0.25 * max(high - low, 1e-9)
    axis.set_ylim(low - margin, high + margin)


def _mark_envelope(axis: Any, evaluation: Evaluation, component: int) -> None:
    """Shade outside the training data's range of `component`: forecasts there extrapolate."""
    if evaluation.envelope is None:
        return
    low, high = evaluation.envelope[0][component], evaluation.envelope[1][component]
    bottom, top = axis.get_ylim()
    axis.axhline(low, color="tab:gray", lw=0.8, ls=":", label=ENVELOPE_LABEL)
    axis.axhline(high, color="tab:gray", lw=0.8, ls=":")
    axis.axhspan(bottom, low, color="tab:gray", alpha=0.12, lw=0)
    axis.axhspan(high, top, color="tab:gray", alpha=0.12, lw=0)
    axis.set_ylim(bottom, top)


def _mark_horizon(axis: Any, evaluation: Evaluation) -> None:
    """A vertical line at the validated horizon: the bundle vouches for nothing beyond it."""
    if evaluation.validated_horizon is not None:
        axis.axvline(evaluation.validated_horizon, color="tab:red", lw=1.0, ls="-.",
                     label=f"{HORIZON_LABEL} ({evaluation.validated_horizon:g} s)")


def error_figure(pyplot: Any, evaluation: Evaluation, suffix: str) -> Any:
    """Error against horizon for the finest level alone, the hierarchy and the hybrid, the
    validated horizon marked and runaway rollouts explained. Returns the open figure."""
    curves = evaluation.curves
    times = np.asarray(curves["times"], dtype=float)
    figure, axis = pyplot.subplots(figsize=(10, 5))
    axis.semilogy(times, curves["finest"], color="tab:orange",
                  label=f"finest level only (one evaluation per {BASE_STEP:g} s)")
    # The hybrid shares the coarse levels and often lies on the hierarchy's curve: a thick
    # solid line under a thin dashed one with markers keeps both visible.
    axis.semilogy(times, curves["hierarchical"], color="tab:blue", lw=3.0, alpha=0.6,
                  label=f"hierarchical (strides {list(evaluation.strides)})")
    axis.semilogy(times, curves["hybrid"], color="tab:green", lw=1.2, ls="--", marker="o",
                  markersize=3.5, markevery=max(1, len(times) // 25),
                  label=f"hybrid (strides ≥ {HYBRID_BELOW}, then Runge–Kutta)")
    values = np.concatenate([curves["finest"], curves["hierarchical"]])
    finite = values[np.isfinite(values)]
    low = min(ERROR_FLOOR, 0.5 * float(finite.min())) if finite.size else ERROR_FLOOR
    axis.set_ylim(bottom=low)
    if min(curves["hybrid"]) < low:
        axis.annotate(f"hybrid below {low:.2g} m: Runge–Kutta alone, no network yet",
                      xy=(0.02, 0.03), xycoords="axes fraction", fontsize="small",
                      color="tab:green")
    _mark_horizon(axis, evaluation)
    _explain_runaway(axis, times, curves)
    axis.set_xlabel("horizon [s]")
    axis.set_ylabel("position error [m], RMS over held-out states")
    axis.set_title(f"Error against horizon, {len(evaluation.states)} held-out states"
                   + suffix, fontsize="medium")
    axis.grid(True, which="both", alpha=0.3)
    axis.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize="small",
                borderaxespad=0.0)
    figure.tight_layout()
    return figure


def _explain_runaway(axis: Any, times: np.ndarray, curves: dict[str, Any]) -> None:
    """Say on the plot where a rollout runs away: its error grows past the crane's size (the
    cable is about 24 m long) or stops being a number, and the curve leaves the plot."""
    for row, (key, color) in enumerate((("finest", "tab:orange"), ("hierarchical", "tab:blue"))):
        errors = np.asarray(curves[key], dtype=float)
        away = np.flatnonzero(~np.isfinite(errors) | (errors > RUNAWAY_METRES))
        if away.size == 0:
            continue
        at = float(times[away[0]])
        axis.axvline(at, color=color, lw=0.8, ls=":")
        axis.annotate(f"{RUNAWAY_LABEL}: {key.replace('finest', 'finest level')} rollout "
                      f"past {RUNAWAY_METRES:g} m from t = {at:g} s;\nsmall errors compound "
                      "over many steps until the state leaves the training data",
                      xy=(at, 0.55 - 0.2 * row), xycoords=("data", "axes fraction"),
                      xytext=(6, 0),
                      textcoords="offset points", fontsize="small", color=color)
