"""Speed of one bundle: stridecast against onnxruntime, torch eager and the naive rollout.

`run(bundle)` is what `stridecast bench BUNDLE` calls; `to_markdown(result)` renders its tables.
Every comparison runs the same plan of network steps on the same states in the same process,
and the answers are compared too (`agreement`), so the timings are of equal work.
"""

from __future__ import annotations

import logging
import os
import tempfile
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from stridecast.runtime import Stepper, load
from stridecast.runtime.describe import describe_stepper

from . import environment
from .competitors import OnnxRuntimeLoop, TorchEagerLoop, plan_steps
from .reference import finest_only_bundle, torch_twins
from .timing import Budget, interleaved, summary

logger = logging.getLogger("benchmarks")

HORIZONS = (10, 30, 100, 300, 1_000, 3_000, 10_000)
BATCHES = (1, 64, 4_096)
BATCH_BASE_STEPS = 1_000
DENSE_POINTS = 10_000
NAIVE_TARGET_STEPS = 3_000


def _budgets(quick: bool) -> dict[str, Budget]:
    if quick:
        return {"latency": Budget(seconds=0.25, min_rounds=20, max_rounds=500),
                "naive": Budget(seconds=0.3, min_rounds=2, warmup=1),
                "batch": Budget(seconds=0.4, min_rounds=3, warmup=1),
                "dense": Budget(seconds=0.5, min_rounds=3, warmup=1)}
    return {"latency": Budget(seconds=1.0, min_rounds=50, max_rounds=2000),
            "naive": Budget(seconds=1.0, min_rounds=3, warmup=1),
            "batch": Budget(seconds=1.5, min_rounds=5, warmup=2),
            "dense": Budget(seconds=2.0, min_rounds=5, warmup=2)}


def example_states(stepper: Stepper, batch: int, seed: int = 0) -> np.ndarray:
    """States near the normalisation centre: mean + 0.3·scale·N(0, 1), float32, (batch, d)."""
    rng = np.random.default_rng(seed)
    mean = np.asarray(stepper.manifest.mean, dtype=np.float64)
    scale = np.asarray(stepper.manifest.scale, dtype=np.float64)
    draws = rng.standard_normal((batch, stepper.state_dim))
    return (mean + 0.3 * scale * draws).astype(np.float32)


def on_grid(stepper: Stepper, base_steps: int) -> int:
    """`base_steps` rounded up to a multiple of the finest stride (so every method reaches it)."""
    finest = stepper.strides[0]
    return max(finest, -(-base_steps // finest) * finest)


def run(bundle_path: os.PathLike[str] | str, *, quick: bool = False,
        torch_modules: Mapping[int, Any] | None = None, horizons: Sequence[int] = HORIZONS,
        batches: Sequence[int] = BATCHES, batch_base_steps: int = BATCH_BASE_STEPS,
        dense_points: int = DENSE_POINTS, naive: bool = True, peers: bool = True,
        naive_target_steps: int = NAIVE_TARGET_STEPS,
        budgets: Mapping[str, Budget] | None = None,
        work_dir: os.PathLike[str] | str | None = None) -> dict[str, Any]:
    """Benchmark one bundle and return a JSON-ready record.

    Parameters
    ----------
    bundle_path : path
        The bundle to measure.
    quick : bool
        Shorter time budgets (about a quarter of the default).
    torch_modules : mapping of stride to torch.nn.Module, optional
        The original networks (normalised units); by default torch twins are rebuilt from the
        ONNX weights when every level is a plain affine/activation chain.
    horizons : sequence of int
        Single-state `advance` targets, in base steps.
    batches : sequence of int
        Batch sizes of the per-call latency and throughput comparison.
    batch_base_steps : int
        `advance` target of the batch comparison, in base steps.
    dense_points : int
        Output points of the dense forecast (every base step from 1 on).
    naive : bool
        Also time the finest-level-only rollout.
    peers : bool
        Also time onnxruntime and torch (when importable).
    naive_target_steps : int
        Horizon of the naive-rollout target, added to `horizons`.
    budgets : mapping, optional
        `Budget` per section ("latency", "naive", "batch", "dense"), overriding `quick`.
    work_dir : path, optional
        Where to write the finest-only bundle (default: a temporary directory).

    Returns
    -------
    dict
        Sections `bundle`, `environment`, `latency`, `batch`, `dense` and `agreement`.
    """
    budgets = {**_budgets(quick), **(budgets or {})}
    stepper = load(bundle_path)
    runners = _peers(stepper, bundle_path, torch_modules) if peers else {}
    logger.info("bundle %s: strides %s; peers %s", bundle_path, stepper.strides, list(runners))
    with tempfile.TemporaryDirectory(dir=work_dir) as scratch:
        naive_stepper = (load(finest_only_bundle(Path(bundle_path),
                                                 Path(scratch) / "finest.bundle"))
                         if naive else None)
        horizons = sorted({on_grid(stepper, n) for n in (*horizons, naive_target_steps)})
        # Quick runs stop the naive rollout at its target: 10,000 finest steps take seconds.
        naive_limit = on_grid(stepper, naive_target_steps) if quick else max(horizons)
        latency = _latency(stepper, runners, naive_stepper, horizons, budgets, naive_limit)
    batch = [_batch(stepper, runners, size, on_grid(stepper, batch_base_steps), budgets)
             for size in batches]
    dense = _dense(stepper, runners, dense_points, budgets)
    return {
        "bundle": _describe_bundle(stepper, bundle_path),
        "environment": environment.describe(),
        "settings": {"quick": quick, "batch_base_steps": on_grid(stepper, batch_base_steps),
                     "dense_points": dense_points, "peers": sorted(runners),
                     "naive_target_steps": on_grid(stepper, naive_target_steps)},
        "latency": latency,
        "batch": batch,
        "dense": dense,
        "agreement": _agreement(latency, batch),
    }


def _describe_bundle(stepper: Stepper, path: os.PathLike[str] | str) -> dict[str, Any]:
    """The report's `bundle` entry, from the runtime's description of the stepper."""
    described = describe_stepper(stepper)
    return {"path": str(path), "name": described["name"], "strides": described["strides"],
            "state_dim": described["state"]["dim"], "base_step": described["time"]["base_step"],
            "time_unit": described["time"]["unit"], "dtype": described["dtype"],
            "kernel_paths": described["kernel_paths"]}


def _peers(stepper: Stepper, bundle_path, torch_modules) -> dict[str, Any]:
    runners: dict[str, Any] = {}
    try:
        runners["onnxruntime"] = OnnxRuntimeLoop(stepper, bundle_path)
    except ImportError:
        logger.info("onnxruntime is not installed; left out")
    try:
        modules = torch_modules if torch_modules is not None else torch_twins(Path(bundle_path))
    except ImportError:
        logger.info("torch is not installed; left out")
        modules = None
    if modules is not None:
        runners["torch"] = TorchEagerLoop(stepper, modules)
    return runners


def _latency(stepper: Stepper, runners, naive_stepper, horizons, budgets,
             naive_limit: int) -> list[dict]:
    state = example_states(stepper, 1, seed=1)
    rows = []
    for base_steps in horizons:
        t = base_steps * stepper.base_step
        steps = plan_steps(stepper, base_steps)
        calls = {"stridecast": lambda t=t: stepper.advance(state[0], t)}
        for name, runner in runners.items():
            calls[name] = lambda runner=runner, steps=steps: runner.advance(state, steps)
        samples = interleaved(calls, budgets["latency"])
        row = {"base_steps": base_steps, "t": t, "steps": [list(s) for s in steps],
               "evaluations": sum(count for _, count in steps),
               "times": {name: summary(values) for name, values in samples.items()},
               "answers": {name: np.asarray(call(), dtype=np.float64).reshape(-1).tolist()
                           for name, call in calls.items()}}
        if naive_stepper is not None and base_steps <= naive_limit:
            naive_samples = interleaved(
                {"naive": lambda t=t: naive_stepper.advance(state[0], t)}, budgets["naive"])
            row["times"]["naive"] = summary(naive_samples["naive"])
            row["naive_evaluations"] = naive_stepper.plan(t).evaluations
        logger.info("advance to %d base steps: %s", base_steps,
                    {name: f"{value['p50'] * 1e6:.1f} µs" for name, value in row["times"].items()})
        rows.append(row)
    return rows


def _batch(stepper: Stepper, runners, size: int, base_steps: int, budgets) -> dict[str, Any]:
    states = example_states(stepper, size, seed=2)
    t = base_steps * stepper.base_step
    steps = plan_steps(stepper, base_steps)
    calls = {"stridecast": lambda: stepper.advance(states, t)}
    for name, runner in runners.items():
        calls[name] = lambda runner=runner: runner.advance(states, steps)
    samples = interleaved(calls, budgets["batch"])
    times = {}
    for name, values in samples.items():
        record = summary(values)
        record["throughput"] = size * base_steps / record["p50"]  # states·base steps per second
        times[name] = record
    reference = calls["stridecast"]()
    logger.info("batch %d: %s", size,
                {name: f"{value['p50'] * 1e3:.2f} ms" for name, value in times.items()})
    return {"batch": size, "base_steps": base_steps,
            "evaluations": sum(count for _, count in steps), "times": times,
            "max_abs_difference": {
                name: float(np.max(np.abs(np.asarray(call(), np.float64) - reference)))
                for name, call in calls.items() if name != "stridecast"}}


def _dense(stepper: Stepper, runners, points: int, budgets) -> dict[str, Any]:
    state = example_states(stepper, 1, seed=3)[0]
    finest = stepper.strides[0]
    times = np.arange(1, points + 1, dtype=np.float64) * finest * stepper.base_step
    wide = example_states(stepper, points, seed=4)
    calls = {"forecast": lambda: stepper.forecast(state, times),
             "single_call": lambda: stepper.step(wide, finest)}
    if "onnxruntime" in runners:
        runner = runners["onnxruntime"]
        calls["onnxruntime_single_call"] = lambda: runner.advance(wide, ((finest, 1),))
    samples = interleaved(calls, budgets["dense"])
    _, info = stepper.forecast_with_info(state, times)
    forecast = summary(samples["forecast"])
    single = summary(samples["single_call"])
    record = {
        "points": points, "evaluations": info.evaluations, "network_calls": info.network_calls,
        "depth": info.depth, "forecast": forecast, "single_call": single,
        "per_point_forecast": forecast["p50"] / points,
        "per_point_single_call": single["p50"] / points,
        "ratio": forecast["p50"] / single["p50"],
    }
    if "onnxruntime_single_call" in samples:
        record["onnxruntime_single_call"] = summary(samples["onnxruntime_single_call"])
    logger.info("dense forecast of %d points: %.2f ms; one call at batch %d: %.2f ms", points,
                forecast["p50"] * 1e3, points, single["p50"] * 1e3)
    return record


def _agreement(latency: list[dict], batch: list[dict]) -> dict[str, float]:
    """Largest absolute difference of each peer's answer from stridecast's, over all runs."""
    worst: dict[str, float] = {}
    for row in latency:
        reference = np.asarray(row["answers"]["stridecast"])
        for name, answer in row["answers"].items():
            if name != "stridecast":
                difference = float(np.max(np.abs(np.asarray(answer) - reference)))
                worst[name] = max(worst.get(name, 0.0), difference)
    for row in batch:
        for name, difference in row["max_abs_difference"].items():
            worst[name] = max(worst.get(name, 0.0), difference)
    return worst


def to_markdown(result: Mapping[str, Any]) -> str:
    """The tables of one `run` result (latency, batch, dense forecast) as Markdown."""
    from .report import bundle_tables

    return bundle_tables(result)
