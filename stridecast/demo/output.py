"""What `stridecast demo` prints and records: the tables, the query commands, report.json.

Text is returned as strings; the caller decides where it goes.
"""

from __future__ import annotations

import dataclasses
import json
import shlex
from pathlib import Path
from typing import Any

from stridecast.runtime.bundle import REPORT_NAME, model_name, write_report

from . import crane
from .evaluation import Evaluation
from .settings import (
    BASE_STEP,
    EXAMPLE_LABEL,
    GROUND_TRUTH_TOLERANCE,
    HORIZON,
    HYBRID_BELOW,
    SHIP_COMMAND,
    TABLE_HORIZONS,
    DemoSettings,
)

SERVICE_URL = "http://127.0.0.1:8000"  # `stridecast serve`'s default address


def introduction(settings: DemoSettings) -> str:
    parameters = crane.DEFAULT_PARAMETERS
    lines = ["stridecast demo — a harbour crane's load on a stretching steel cable (an invented "
             "scenario)"]
    if settings.quick:
        lines.append("QUICK MODE: smaller data and networks; the same steps at a lower accuracy.")
    lines.append(
        f"   Planar elastic pendulum: mass {parameters.mass:g} kg, rest length "
        f"{parameters.rest_length:g} m, stiffness {parameters.stiffness:g} N/m, g "
        f"{parameters.gravity:g} m/s². The load bobs every {parameters.bob_period:.2f} s and "
        f"swings every {parameters.swing_period:.1f} s (linearised periods), a ratio of "
        f"{parameters.swing_period / parameters.bob_period:.0f}.")
    return "\n".join(lines)


def _metres(value: float) -> str:
    return f"{value:.3g}"


def format_table(evaluation: Evaluation, settings: DemoSettings) -> str:
    """The horizon table: evaluations, errors and wall times, hierarchical against finest."""
    label = "  [QUICK MODE: lower accuracy]" if settings.quick else ""
    lines = [
        f"   Forecasts of {len(evaluation.states)} held-out initial states{label}",
        "   (position error: RMS distance to the SciPy truth; wall time: the whole batch; "
        f"DOP853 at rtol {GROUND_TRUTH_TOLERANCE:g})",
        f"   {'horizon':>8}  {'network evaluations':^21}  {'position error [m]':^21}  "
        f"{'wall time [ms]':^29}",
        f"   {'[s]':>8}  {'hierarchical':>12} {'finest':>8}  {'hierarchical':>12} "
        f"{'finest':>8}  {'runtime':>9} {'finest':>9} {'DOP853':>9}",
    ]
    for row in evaluation.table:
        lines.append(
            f"   {row['horizon']:>8.1f}  {row['evaluations']:>12d} "
            f"{row['finest_evaluations']:>8d}  {_metres(row['position_rmse']):>12} "
            f"{_metres(row['finest_position_rmse']):>8}  {row['runtime_ms']:>9.2f} "
            f"{row['finest_ms']:>9.1f} {row['reference_ms']:>9.1f}")
    horizon = evaluation.validated_horizon
    lines.append("   Validated horizon (held-out training trajectories): "
                 f"{'not recorded' if horizon is None else f'{horizon:g} s'}.")
    last = evaluation.table[-1]
    if last["position_rmse"] >= last["finest_position_rmse"]:
        lines.append("   Note: at the longest horizon the hierarchical forecast is NOT more "
                     "accurate than the finest-level rollout in this run.")
    return "\n".join(lines)


def format_hybrid(evaluation: Evaluation) -> str:
    """The hybrid table: coarse networks, then Runge–Kutta on the known vector field."""
    lines = [
        f"4. Hybrid: the same forecasts with the levels below stride {HYBRID_BELOW} "
        f"({HYBRID_BELOW * BASE_STEP:g} s) replaced by Runge–Kutta on the known physics:",
        "   stepper.advance(state, t, vector_field=crane.vector_field, "
        f"hybrid_below={HYBRID_BELOW})",
        f"   {'horizon':>8}  {'network':>8} {'field':>7}  {'position error [m]':^21}  "
        f"{'wall time':>9}",
        f"   {'[s]':>8}  {'evals':>8} {'evals':>7}  {'hybrid':>8} {'hierarchical':>12}  "
        f"{'[ms]':>9}",
    ]
    for mixed, plain in zip(evaluation.hybrid, evaluation.table, strict=True):
        lines.append(
            f"   {mixed['horizon']:>8.1f}  {mixed['evaluations']:>8d} "
            f"{mixed['vector_field_evaluations']:>7d}  {_metres(mixed['position_rmse']):>8} "
            f"{_metres(plain['position_rmse']):>12}  {mixed['runtime_ms']:>9.2f}")
    lines.append("   (field evals: vector-field calls on the whole batch, 6 per Dormand–Prince "
                 "step; the remainder below 1 s is integrated, the rest is networks)")
    return "\n".join(lines)


def format_commands(bundle: Path, evaluation: Evaluation) -> str:
    """The exact commands that query the new bundle from a shell and over HTTP."""
    state = [round(float(value), 4) for value in evaluation.states[0]]
    text = ",".join(f"{value:g}" for value in state)
    horizon = TABLE_HORIZONS[-2]
    where = shlex.quote(str(bundle))
    body = json.dumps({"state": state, "t": horizon})
    url = f"{SERVICE_URL}/v1/models/{model_name(bundle.resolve())}/advance"
    return "\n".join([
        f"6. Query it (the example state: {EXAMPLE_LABEL}):",
        f"   stridecast advance {where} --state={text} --time {horizon:g}",
        f"   stridecast forecast {where} --state={text} --until {HORIZON:g} --every 0.2",
        f"   stridecast serve {where}",
        f"   curl -s -X POST {url} -H 'Content-Type: application/json' -d {shlex.quote(body)}",
        "   The bundle shipped inside the package answers without torch: "
        f"stridecast advance --demo --state={text} --time {horizon:g}; stridecast serve --demo",
    ])


def demo_figures(evaluation: Evaluation, settings: DemoSettings) -> dict[str, Any]:
    """The demo's figures as recorded in report.json under "demo" (JSON-ready)."""
    return {
        "scenario": "harbour-crane load on an elastic cable (invented; planar elastic "
                    "pendulum, state x, z, vx, vz, cable top at the origin, z up)",
        "mode": settings.label,
        "settings": dataclasses.asdict(settings),
        "parameters": dataclasses.asdict(crane.DEFAULT_PARAMETERS),
        "initial_range": dataclasses.asdict(crane.InitialRange()),
        "hybrid_below": HYBRID_BELOW,
        "table": list(evaluation.table),
        "hybrid": list(evaluation.hybrid),
        "check": evaluation.check,
        "regenerate": SHIP_COMMAND,
    }


def add_to_report(bundle: Path, figures: dict[str, Any]) -> None:
    """Add `figures` under "demo" to the bundle's report.json, replacing the file atomically.

    report.json is informative metadata outside the manifest's checksums; the shipped-bundle
    test reads the "check" block from it.
    """
    path = bundle / REPORT_NAME
    report = json.loads(path.read_text(encoding="utf-8")) if path.is_file() else {}
    report["demo"] = figures
    write_report(bundle, report)
