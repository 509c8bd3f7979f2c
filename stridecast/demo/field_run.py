"""`stridecast demo --scenario mooring`: the field scenario end to end.

SciPy ground truth of the mooring line (`mooring`), levels trained on its POD coordinates
(`train_levels(..., reduce=...)`), a verified reduced bundle (encoder, latent levels, decoder),
reloaded with the NumPy-only runtime and compared with the truth at the validated horizon and
at a longer time; space–time figures. torch, SciPy and matplotlib are imported inside.
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
from stridecast.runtime import load

from . import field_output, mooring
from .common import check_dependencies, check_out, export_threads, printer, timed
from .field_evaluation import evaluate
from .field_plots import write_plots
from .field_settings import (
    BASE_STEP,
    FULL,
    GROUND_TRUTH_TOLERANCE,
    LATENT_MODES,
    QUICK,
    SEED,
    STRIDES,
    FieldSettings,
)
from .output import add_to_report

EXAMPLE_STATE_FILE = "example-state.npy"


def main(arguments: argparse.Namespace) -> int:
    """The mooring scenario's runner (see `scenarios.SCENARIOS`)."""
    run_field_demo(arguments.out, quick=arguments.quick, overwrite=arguments.overwrite,
                   progress=not arguments.no_progress, plots_dir=arguments.plots_dir)
    return 0


def run_field_demo(out: Path, *, quick: bool = False, overwrite: bool = False,
                   progress: bool = True, stream: TextIO | None = None,
                   plots_dir: Path | None = None) -> dict[str, Any]:
    """Train, export, reload and evaluate the mooring scenario, printing the story to `stream`.

    Parameters are those of `stridecast.demo.run.run_demo`.

    Returns
    -------
    dict
        JSON-ready: "bundle", "plots" (paths), "settings", "figures" (as added to the
        bundle's report.json under "demo") and "seconds" (wall time per stage).
    """
    out = Path(out)
    settings = QUICK if quick else FULL
    check_out(out, overwrite)
    check_dependencies()
    say = printer(sys.stdout if stream is None else stream)
    seconds: dict[str, float] = {}
    started = time.perf_counter()
    say(field_output.introduction(settings))

    with timed(seconds, "data"):
        trajectories = make_trajectories(settings, progress=progress)
    say(f"1. Ground truth: {len(trajectories)} trajectories of {settings.duration:g} s "
        f"({trajectories.shape[1]} samples every {BASE_STEP:g} s) of the {trajectories.shape[2]}"
        f"-component field, SciPy DOP853 at rtol {GROUND_TRUTH_TOLERANCE['rtol']:g}, in "
        f"{seconds['data']:.1f} s.")
    # train_levels holds torch and BLAS at one thread itself (threads=1).
    with timed(seconds, "training"):
        trained = train(trajectories, settings, progress=progress)
    say(field_output.format_training(trained, settings, seconds["training"]))
    with timed(seconds, "export"), export_threads():
        bundle = export(trained, out, settings, overwrite=overwrite)
    say(f"   Exported and verified {bundle} (encoder, {len(trained.levels)} latent levels, "
        f"decoder) in {seconds['export']:.1f} s.")

    with timed(seconds, "evaluation"):
        # The evaluation measures errors on purpose, also where states graze the envelope.
        stepper = load(bundle, on_extrapolation="ignore")
        evaluation = evaluate(stepper, settings)
    say(f"3. Reloaded with the NumPy-only runtime: {stepper!r}")
    say(field_output.format_results(evaluation, settings))
    with timed(seconds, "plots"):
        plots = write_plots(Path(plots_dir) if plots_dir else bundle, evaluation, settings)
    say("4. Plots: " + "\n          ".join(str(path) for path in plots))
    figures = field_output.demo_figures(evaluation, settings)
    add_to_report(bundle, figures)
    example = write_example_state(plots[0].parent, evaluation.states[0])
    say(field_output.format_commands(bundle, example))
    say(CAUTION)
    seconds["total"] = time.perf_counter() - started
    say(f"(the demo took {seconds['total']:.0f} s)")
    return {"bundle": str(bundle), "plots": [str(path) for path in plots],
            "settings": dataclasses.asdict(settings), "figures": figures, "seconds": seconds}


def write_example_state(directory: Path, state: np.ndarray) -> Path:
    """Save the example state as example-state.npy (written under a temporary name first)."""
    path = directory / EXAMPLE_STATE_FILE
    temporary = directory / f".{EXAMPLE_STATE_FILE}.partial"
    with open(temporary, "wb") as handle:
        np.save(handle, np.asarray(state, dtype=np.float64), allow_pickle=False)
    temporary.replace(path)
    return path


def make_trajectories(settings: FieldSettings, *, progress: bool = False) -> np.ndarray:
    """Training trajectories (N, T, 2N) sampled every base step, from varied line motions.

    All trajectories are integrated as one system: SciPy's cost here is per step (the line's
    shortest discrete mode bounds it), nearly independent of the batch.
    """
    from tqdm.auto import tqdm

    rng = np.random.default_rng(SEED)
    initial = mooring.sample_initial_states(settings.trajectories, rng)
    times = np.arange(round(settings.duration / BASE_STEP) + 1) * BASE_STEP
    with tqdm(total=1, desc="ground truth (one batch)", file=sys.stderr,
              disable=not progress, leave=False) as bar:
        solution = mooring.simulate(initial, times, **GROUND_TRUTH_TOLERANCE)
        bar.update(1)
    return np.ascontiguousarray(solution.transpose(1, 0, 2))


def train(trajectories: np.ndarray, settings: FieldSettings, *, progress: bool = False) -> Any:
    """`train_levels(..., reduce=LATENT_MODES)` with the scenario's settings."""
    from stridecast.export import train_levels

    trained = train_levels(
        trajectories, base_step=BASE_STEP, strides=STRIDES, hidden=settings.hidden,
        activation="tanh", rollout=settings.rollout, epochs=settings.epochs,
        batch_size=settings.batch_size, learning_rate=settings.learning_rate,
        max_windows_per_epoch=settings.windows_per_epoch, validation_fraction=0.15, seed=SEED,
        progress=progress, state_names=mooring.state_names(), state_units=mooring.state_units(),
        reduce=LATENT_MODES,
    )
    # The demo draws its own field figures against the SciPy truth.
    return dataclasses.replace(trained, forecast_example=None)


def export(trained: Any, out: Path, settings: FieldSettings, *, overwrite: bool) -> Path:
    """Write the verified reduced bundle with `stridecast.export.export_bundle`."""
    from stridecast.export import export_bundle

    description = field_output.bundle_description(settings)
    return Path(export_bundle(trained, out, time_unit="s", description=description,
                              overwrite=overwrite, exporter=settings.exporter, seed=SEED))
