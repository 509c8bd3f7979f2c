"""What the mooring scenario prints and records: introduction, results, commands, report.json.

Text is returned as strings; the caller decides where it goes.
"""

from __future__ import annotations

import dataclasses
import shlex
from pathlib import Path
from typing import Any

from . import mooring
from .field_evaluation import FieldEvaluation
from .field_settings import BASE_STEP, EXAMPLE_LABEL, LATENT_MODES, FieldSettings

QUICK_NOTE = "QUICK MODE: smaller data and networks; the same steps at a lower accuracy."


def _time_scales() -> tuple[float, float]:
    """The boat's sway period and the line's first string period (linear limit), s."""
    frequencies = mooring.linear_frequencies()
    return 2 * 3.141592653589793 / frequencies[0], 2 * 3.141592653589793 / frequencies[1]


def introduction(settings: FieldSettings) -> str:
    parameters = mooring.DEFAULT_PARAMETERS
    sway, string = _time_scales()
    lines = ["stridecast demo --scenario mooring — a taut mooring line to a swaying workboat "
             "(an invented scenario)"]
    if settings.quick:
        lines.append(QUICK_NOTE)
    lines.append(
        f"   Line {parameters.length:g} m, {parameters.line_mass:g} kg/m, pretension "
        f"{parameters.pretension / 1e3:g} kN, EA {parameters.axial_stiffness / 1e6:g} MN; boat "
        f"{parameters.boat_mass:g} kg; damping rate {parameters.damping_rate:g} /s. The line "
        f"vibrates every {string:.2f} s while the boat sways every {sway:.1f} s (linear "
        f"periods, a ratio of {sway / string:.0f}); every mode decays in "
        f"{1 / parameters.damping_rate:g} s. The state: {parameters.nodes} displacements and "
        f"{parameters.nodes} velocities ({parameters.state_dim} components).")
    return "\n".join(lines)


def format_training(trained: Any, settings: FieldSettings, seconds: float) -> str:
    kept = trained.basis.energy_kept if getattr(trained, "basis", None) is not None else None
    energy = "" if kept is None else f", keeping {100 * kept:.4f} % of the energy"
    return (f"2. POD basis of {LATENT_MODES} modes on the training split{energy}; trained "
            f"{len(trained.levels)} latent levels, strides {list(trained.strides)} base steps "
            f"({', '.join(f'{s * BASE_STEP:g}' for s in trained.strides)} s), hidden layers "
            f"{list(settings.hidden)}, in {seconds:.1f} s.")


def format_results(evaluation: FieldEvaluation, settings: FieldSettings) -> str:
    """Errors at the validated horizon and at the longer time, and the speed against SciPy."""
    figures = evaluation.figures()
    label = "  [QUICK MODE: lower accuracy]" if settings.quick else ""
    lines = [f"   Forecasts of {figures['states']} held-out line motions at every "
             f"{BASE_STEP:g} s up to {evaluation.grid[-1]:g} s{label}",
             "   (error: normalised RMS over the 256 components and the states, the bundle's "
             "metric; displacement error: RMS over nodes and states)"]
    horizon, tolerance = figures["validated_horizon"], figures["tolerance"]
    rows = [("validated horizon", figures["at_validated_horizon"]),
            ("longer time", figures["at_longer_time"])]
    if horizon is None:
        lines.append("   The bundle records no validated horizon (no held-out data).")
        rows = rows[1:]
    for name, row in rows:
        lines.append(f"   at the {name}, t = {row['t']:g} s: error {row['normalised_rms']:.3g}"
                     f"{'' if tolerance is None else f' (tolerance {tolerance:g})'}, "
                     f"displacement error {100 * row['displacement_rms_m']:.3g} cm")
    lines.append(
        f"   Speed: the runtime's forecast of all {len(evaluation.grid)} times took "
        f"{1e3 * figures['forecast_seconds']:.1f} ms ({figures['network_evaluations']} "
        f"latent network evaluations in {figures['network_calls']} batched calls); SciPy "
        f"integrating the full field took {figures['scipy_seconds']:.1f} s — "
        f"{figures['speedup']:.0f} times longer.")
    return "\n".join(lines)


def format_commands(bundle: Path, example: Path) -> str:
    """Commands that query the new bundle with the example state (a .npy file)."""
    where, state = shlex.quote(str(bundle)), shlex.quote(str(example))
    return "\n".join([
        f"5. Query it (the example state, {EXAMPLE_LABEL}, is in {example}):",
        f"   stridecast inspect {where}",
        f"   stridecast advance {where} --state-file {state} --time 10",
        f"   stridecast forecast {where} --state-file {state} --until 20 --every 1",
        f"   stridecast serve {where}     # field states travel as MessagePack too",
    ])


def bundle_description(settings: FieldSettings) -> str:
    parameters = mooring.DEFAULT_PARAMETERS
    sway, string = _time_scales()
    text = (
        "Taut mooring line from a quay bollard to a swaying workboat (an invented demo): "
        f"{parameters.nodes} nodes over {parameters.length:g} m, line {parameters.line_mass:g} "
        f"kg/m, pretension {parameters.pretension:g} N, EA {parameters.axial_stiffness:g} N "
        f"(tension grows with stretch), boat {parameters.boat_mass:g} kg, damping rate "
        f"{parameters.damping_rate:g} /s; sway period {sway:.2f} s, first string period "
        f"{string:.3f} s (linear). State: transverse displacements u001..u{parameters.nodes} "
        f"(m, node {parameters.nodes} is the boat) then velocities (m/s). Reduced by POD to "
        f"{LATENT_MODES} coordinates. Made by `stridecast demo --scenario mooring` "
        f"({settings.label} settings)."
    )
    return text + (" QUICK MODE: small data and networks, lower accuracy."
                   if settings.quick else "")


def demo_figures(evaluation: FieldEvaluation, settings: FieldSettings) -> dict[str, Any]:
    """The scenario's figures as recorded in report.json under "demo" (JSON-ready)."""
    return {
        "scenario": "mooring",
        "description": "taut mooring line to a swaying workboat (invented); field of "
                       f"{mooring.DEFAULT_PARAMETERS.state_dim} components",
        "mode": settings.label,
        "settings": dataclasses.asdict(settings),
        "parameters": dataclasses.asdict(mooring.DEFAULT_PARAMETERS),
        "initial_range": dataclasses.asdict(mooring.InitialRange()),
        "example": EXAMPLE_LABEL,
        "latent_modes": LATENT_MODES,
        "results": evaluation.figures(),
    }
