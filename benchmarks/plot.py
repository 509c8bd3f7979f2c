"""`bench-horizon.png`: cost of reaching a horizon, log-log, for each method."""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any


def horizon_series(bench: Mapping[str, Any], solvers: Mapping[str, Any] | None
                   ) -> dict[str, tuple[list[float], list[float]]]:
    """(base steps, p50 seconds) per method, from the latency and solver results.

    Solver horizons are converted through time to the bench bundle's base steps.
    """
    base_step = bench["bundle"]["base_step"]
    series: dict[str, tuple[list[float], list[float]]] = {}

    def add(name: str, base_steps: float, seconds: float) -> None:
        xs, ys = series.setdefault(name, ([], []))
        xs.append(base_steps)
        ys.append(seconds)

    for row in bench["latency"]:
        for name, label in (("stridecast", "stridecast hierarchical"),
                            ("onnxruntime", "onnxruntime loop, same plan"),
                            ("naive", "naive finest-level rollout")):
            if name in row["times"]:
                add(label, row["base_steps"], row["times"][name]["p50"])
    if solvers is not None:
        tolerance = solvers["dop853_tolerance"]
        for row in solvers["rows"]:
            steps = row["t"] / base_step
            if solvers["trained_on_crane"]:
                add(f"stridecast, crane bundle {solvers['stepper']}", steps,
                    row["times"]["stridecast"]["p50"])
            add("solve_ivp RK45 (default tol.)", steps, row["times"]["rk45"]["p50"])
            add(f"solve_ivp DOP853 (rtol {tolerance['rtol']:g})", steps,
                row["times"]["dop853"]["p50"])
    return series


def plot_horizon(bench: Mapping[str, Any], solvers: Mapping[str, Any] | None,
                 out: os.PathLike[str] | str) -> Path:
    """Draw advance cost against horizon and save it as a PNG at `out`."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    base_step = bench["bundle"]["base_step"]
    unit = bench["bundle"]["time_unit"]
    figure, axes = plt.subplots(figsize=(7.5, 5.0), dpi=120)
    markers = iter("os^vDxP*")
    for label, (xs, ys) in horizon_series(bench, solvers).items():
        order = sorted(range(len(xs)), key=xs.__getitem__)
        axes.loglog([xs[i] for i in order], [ys[i] for i in order], marker=next(markers),
                    label=label)
    axes.set_xlabel(f"horizon (base steps of {base_step:g} {unit})")
    axes.set_ylabel("time per single-state call, p50 (s)")
    axes.set_title("Cost of reaching a horizon (one state, one call)")
    axes.grid(True, which="both", alpha=0.3)
    top = axes.secondary_xaxis("top", functions=(lambda n: n * base_step,
                                                 lambda t: t / base_step))
    top.set_xlabel(f"time ({unit})")
    axes.legend(fontsize=8)
    figure.tight_layout()
    path = Path(out)
    figure.savefig(path)
    plt.close(figure)
    return path
