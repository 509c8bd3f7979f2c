"""`stridecast demo`: the crane scenario end to end — data, training, export, forecasts, plots.

Trains one network per stride on SciPy ground truth of `stridecast.crane`, exports a verified
bundle, reloads it with the NumPy-only runtime and compares hierarchical, finest-only and hybrid
forecasts with the truth. torch, SciPy and matplotlib are imported inside the functions.

Regenerate the bundle shipped in the package with ``python -m stridecast.demo --ship``.
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import time
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from stridecast.caution import CAUTION
from stridecast.runtime import StridecastError, load

from . import crane, scenarios
from . import output as demo_output
from .common import check_dependencies, check_out, export_threads, printer, timed
from .evaluation import evaluate
from .options import add_arguments
from .plots import write_plots
from .settings import (
    BASE_STEP,
    DEFAULT_OUT,
    FULL,
    GROUND_TRUTH_TOLERANCE,
    QUICK,
    SEED,
    SHIPPED_BUNDLE,
    STRIDES,
    DemoSettings,
)


# ------------------------------------------------------------------------------ entry points
def main(arguments: argparse.Namespace) -> int:
    """Run `stridecast demo` with parsed `arguments` (the scenario they name); exit status."""
    return scenarios.main(arguments)


def crane_main(arguments: argparse.Namespace) -> int:
    """The crane scenario's runner (see `scenarios.SCENARIOS`)."""
    run_demo(arguments.out or DEFAULT_OUT, quick=arguments.quick, overwrite=arguments.overwrite,
             progress=not arguments.no_progress, plots_dir=arguments.plots_dir)
    return 0


def run_demo(out: Path, *, quick: bool = False, overwrite: bool = False, progress: bool = True,
             stream: TextIO | None = None, plots_dir: Path | None = None) -> dict[str, Any]:
    """Train, export, reload and evaluate the crane demo, printing the story to `stream`.

    Parameters
    ----------
    out : path
        Bundle folder to create.
    quick : bool
        The small settings (`QUICK`: about 30 s, lower accuracy) instead of `FULL`.
    overwrite : bool
        Replace an existing folder at `out`.
    progress : bool
        Show progress bars (on stderr).
    stream : text file, optional
        Where the tables and instructions go (default: `sys.stdout` at call time).
    plots_dir : path, optional
        Folder for forecast.png and error.png (default: the bundle folder).

    Returns
    -------
    dict
        JSON-ready: "bundle", "plots" (paths), "settings", "figures" (as added to the bundle's
        report.json under "demo": tables, check), "curves", "validated_horizon" and
        "seconds" (wall time per stage).

    Raises
    ------
    BundleError
        `out` exists and `overwrite` is false (checked before any work).
    StridecastError
        A dependency of the demo is missing.
    """
    out = Path(out)
    settings = QUICK if quick else FULL
    check_out(out, overwrite)
    check_dependencies()
    say = printer(sys.stdout if stream is None else stream)
    seconds: dict[str, float] = {}
    started = time.perf_counter()
    say(demo_output.introduction(settings))

    with timed(seconds, "data"):
        trajectories = make_trajectories(settings, progress=progress)
    say(f"1. Ground truth: {len(trajectories)} trajectories of {settings.duration:g} s "
        f"({trajectories.shape[1]} samples every {BASE_STEP:g} s) from varied swings and "
        f"stretches, SciPy DOP853 at rtol {GROUND_TRUTH_TOLERANCE:g}, in {seconds['data']:.1f} s.")
    # train_levels holds torch and BLAS at one thread itself (threads=1).
    with timed(seconds, "training"):
        trained = train(trajectories, settings, progress=progress)
    say(f"2. Trained {len(trained.levels)} levels, strides {list(trained.strides)} base steps "
        f"({', '.join(f'{s * BASE_STEP:g}' for s in trained.strides)} s), hidden layers "
        f"{list(settings.hidden)}, in {seconds['training']:.1f} s.")
    with timed(seconds, "export"), export_threads():
        bundle = export(trained, out, settings, overwrite=overwrite)
    say(f"   Exported and verified {bundle} in {seconds['export']:.1f} s.")

    with timed(seconds, "evaluation"):
        # The evaluation measures errors on purpose, also where states graze the envelope.
        stepper = load(bundle, on_extrapolation="ignore")
        evaluation = evaluate(stepper, settings)
    say(f"3. Reloaded with the NumPy-only runtime: {stepper!r}")
    say(demo_output.format_table(evaluation, settings))
    say(demo_output.format_hybrid(evaluation))
    with timed(seconds, "plots"):
        plots = write_plots(Path(plots_dir) if plots_dir else bundle, evaluation, settings)
    say(f"5. Plots: {plots[0]}\n          {plots[1]}")
    figures = demo_output.demo_figures(evaluation, settings)
    demo_output.add_to_report(bundle, figures)
    say(demo_output.format_commands(bundle, evaluation))
    say(CAUTION)
    seconds["total"] = time.perf_counter() - started
    say(f"(the demo took {seconds['total']:.0f} s)")
    return {
        "bundle": str(bundle), "plots": [str(path) for path in plots],
        "settings": dataclasses.asdict(settings), "figures": figures,
        "curves": evaluation.curves, "validated_horizon": evaluation.validated_horizon,
        "seconds": seconds,
    }


# ------------------------------------------------------------------------------------ stages
def make_trajectories(settings: DemoSettings, *, progress: bool = False) -> np.ndarray:
    """Training trajectories (N, T, 4) sampled every base step, from varied swings and bobs."""
    from tqdm.auto import tqdm

    rng = np.random.default_rng(SEED)
    initial = crane.sample_initial_states(settings.trajectories, rng)
    times = np.arange(round(settings.duration / BASE_STEP) + 1) * BASE_STEP
    chunk = 16  # trajectories integrated together: one vectorised SciPy call per chunk
    pieces = []
    with tqdm(total=len(initial), desc="ground truth", unit="trajectory", file=sys.stderr,
              disable=not progress, leave=False) as bar:
        for first in range(0, len(initial), chunk):
            block = initial[first:first + chunk]
            solution = crane.simulate(block, times, rtol=GROUND_TRUTH_TOLERANCE,
                                      atol=GROUND_TRUTH_TOLERANCE)
            pieces.append(solution.transpose(1, 0, 2))
            bar.update(len(block))
    return np.concatenate(pieces)


def train(trajectories: np.ndarray, settings: DemoSettings, *, progress: bool = False) -> Any:
    """`stridecast.export.train_levels` with the demo's settings; returns `TrainedLevels`."""
    from stridecast.export import train_levels

    trained = train_levels(
        trajectories, base_step=BASE_STEP, strides=STRIDES, hidden=settings.hidden,
        activation="tanh", rollout=settings.rollout, epochs=settings.epochs,
        batch_size=settings.batch_size, learning_rate=settings.learning_rate,
        max_windows_per_epoch=settings.windows_per_epoch, validation_fraction=0.1, seed=SEED,
        progress=progress, state_names=crane.STATE_NAMES, state_units=crane.STATE_UNITS,
    )
    # The demo draws its own figures against the SciPy truth; without the exporter's figures
    # the bundle stays small enough to ship inside the package.
    return dataclasses.replace(trained, forecast_example=None)


def export(trained: Any, out: Path, settings: DemoSettings, *, overwrite: bool) -> Path:
    """Write the verified bundle with `stridecast.export.export_bundle`."""
    from stridecast.export import export_bundle

    parameters = crane.DEFAULT_PARAMETERS
    description = (
        "Harbour-crane load on an elastic cable (an invented demo): planar elastic pendulum, "
        f"mass {parameters.mass:g} kg, rest length {parameters.rest_length:g} m, stiffness "
        f"{parameters.stiffness:g} N/m, g {parameters.gravity:g} m/s²; bob period "
        f"{parameters.bob_period:.3f} s, swing period {parameters.swing_period:.2f} s "
        "(linearised). State x, z, vx, vz with the cable's top at the origin and z up. Made by "
        f"`stridecast demo` ({settings.label} settings)."
    )
    if settings.quick:
        description += " QUICK MODE: small data and networks, lower accuracy."
    return Path(export_bundle(trained, out, state_names=list(crane.STATE_NAMES),
                              units=list(crane.STATE_UNITS), time_unit="s",
                              description=description, overwrite=overwrite,
                              exporter=settings.exporter, seed=SEED))


def module_main(argv: list[str] | None = None) -> int:
    """`python -m stridecast.demo [--ship]`: the demo, or regenerate the shipped bundle."""
    parser = argparse.ArgumentParser(prog="python -m stridecast.demo",
                                     description=__doc__.split("\n\n")[0])
    add_arguments(parser)
    parser.add_argument("--ship", action="store_true",
                        help=f"regenerate the bundle shipped in the package ({SHIPPED_BUNDLE}) "
                        "with the full settings; plots go to ./crane-demo-plots unless "
                        "--plots-dir is given")
    arguments = parser.parse_args(argv)
    if arguments.ship:
        if arguments.quick:
            parser.error("--ship uses the full settings; drop --quick.")
        if not scenarios.get_scenario(arguments.scenario).ships:
            shipped = ", ".join(s.name for s in scenarios.SCENARIOS if s.ships)
            parser.error(f"--ship regenerates the bundle shipped in the package, which only "
                         f"the {shipped} scenario has; drop --ship.")
        arguments.out, arguments.overwrite = SHIPPED_BUNDLE, True
        arguments.plots_dir = arguments.plots_dir or Path("crane-demo-plots")
    try:
        return main(arguments)
    except StridecastError as error:
        print(f"stridecast demo: error: {error}", file=sys.stderr)
        return 1
