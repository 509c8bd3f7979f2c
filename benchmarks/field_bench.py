"""A field forecast against integrating the full field with SciPy: the mooring scenario.

Run: ``env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE python -m stridecast.benchmarks.field_bench
--bundle mooring-demo.bundle`` (a bundle from ``stridecast demo --scenario mooring``; without
``--bundle`` one is trained first with the demo's quick settings, a few minutes). For a batch
of held-out line motions and a grid of times, it times the runtime's `forecast` (encode, latent
levels in waves, decode the requested times) and SciPy's `solve_ivp` on the 256-component
vector field with DOP853 and RK45, each at the loosest tolerance (from a ladder) whose error is
no larger than the forecast's, and prints the ratios and errors side by side. Errors are the
bundle's metric (normalised RMS over times, states and components) against a tight DOP853
solution (rtol 1e-10).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

from stridecast.demo import mooring
from stridecast.demo.field_evaluation import held_out_states, normalised_rms
from stridecast.runtime import Stepper, load

from .environment import describe
from .timing import Budget, format_seconds, interleaved, summary

REFERENCE = {"rtol": 1e-10, "atol": 1e-12}
RTOL_LADDER = (1e-1, 1e-2, 1e-3, 1e-4, 1e-5, 1e-6, 1e-7, 1e-8)
ATOL_FACTOR = 1e-3  # atol = this × rtol (m and m/s: the motions are 0.01–3 in size)
METHODS = ("DOP853", "RK45")


def solve(states: np.ndarray, times: np.ndarray, method: str, rtol: float) -> np.ndarray:
    """`solve_ivp` of the whole batch as one system; shape (T, B, 2N)."""
    from scipy.integrate import solve_ivp

    count, dim = states.shape

    def field(_time: float, flat: np.ndarray) -> np.ndarray:
        return mooring.vector_field(flat.reshape(count, dim)).reshape(-1)

    solution = solve_ivp(field, (0.0, float(times[-1])), states.reshape(-1), method=method,
                         t_eval=times, rtol=rtol, atol=ATOL_FACTOR * rtol)
    if not solution.success:
        raise RuntimeError(f"solve_ivp ({method}) failed: {solution.message}")
    return solution.y.T.reshape(len(times), count, dim)


def matched(states: np.ndarray, times: np.ndarray, method: str, target: float,
            truth: np.ndarray, scale: np.ndarray) -> dict[str, Any]:
    """The loosest rung of `RTOL_LADDER` at which `method` is at least as accurate as
    `target`, with its wall time (one run: these take seconds) and error."""
    tried = []
    for rtol in RTOL_LADDER:
        started = time.perf_counter()
        try:
            with np.errstate(all="ignore"):  # a loose rung may blow up; it is reported
                answer = solve(states, times, method, rtol)
            error = float(np.sqrt(np.mean(normalised_rms(answer, truth, scale) ** 2)))
        except RuntimeError:  # solve_ivp gave up (its step underflowed)
            error = math.inf
        seconds = time.perf_counter() - started
        # A rung that failed or blew up is recorded with error None (JSON has no infinity).
        tried.append({"rtol": rtol, "seconds": seconds,
                      "error": error if math.isfinite(error) else None})
        if error <= target:
            return {"method": method, "rtol": rtol, "seconds": seconds, "error": error,
                    "matched": True, "tried": tried}
    last = tried[-1]
    return {"method": method, "rtol": last["rtol"], "seconds": last["seconds"],
            "error": last["error"], "matched": False, "tried": tried}


def run_case(stepper: Stepper, batch: int, times: np.ndarray, budget: Budget) -> dict[str, Any]:
    states = held_out_states(batch)
    truth = mooring.simulate(states, times, **REFERENCE)
    scale = np.asarray(stepper.manifest.validation.reference_std) \
        if stepper.manifest.validation is not None else np.std(truth, axis=(0, 1))
    forecast = stepper.forecast(states, times)
    error = float(np.sqrt(np.mean(normalised_rms(forecast, truth, scale) ** 2)))
    samples = interleaved({"stridecast": lambda: stepper.forecast(states, times)}, budget)
    seconds = summary(samples["stridecast"])["p50"]
    peers = [matched(states, times, method, error, truth, scale) for method in METHODS]
    return {"batch": batch, "times": len(times), "until": float(times[-1]),
            "stridecast": {"seconds": seconds, "error": error}, "scipy": peers}


def _bundle(path: str | None, folder: Path) -> Path:
    if path is not None:
        return Path(path)
    from stridecast.demo.field_run import run_field_demo

    print("no --bundle given: training one with the demo's quick settings first ...",
          file=sys.stderr)
    run_field_demo(folder / "mooring-demo.bundle", quick=True, progress=False,
                   stream=sys.stderr)
    return folder / "mooring-demo.bundle"


def format_table(results: list[dict[str, Any]]) -> str:
    lines = [f"{'batch':>5} {'times':>6}  {'method':<22} {'rtol':>7} {'wall time':>10} "
             f"{'× stridecast':>12} {'error':>9}"]
    for case in results:
        own = case["stridecast"]
        lines.append(f"{case['batch']:>5} {case['times']:>6}  {'stridecast forecast':<22} "
                     f"{'':>7} {format_seconds(own['seconds']):>10} {'1':>12} "
                     f"{own['error']:>9.3g}")
        for peer in case["scipy"]:
            error = "failed" if peer["error"] is None else format(peer["error"], ".3g")
            label = f"solve_ivp {peer['method']}" + ("" if peer["matched"] else " (unmatched)")
            lines.append(f"{'':>5} {'':>6}  {label:<22} {peer['rtol']:>7.0e} "
                         f"{format_seconds(peer['seconds']):>10} "
                         f"{peer['seconds'] / own['seconds']:>12.0f} "
                         f"{error:>9}")
    lines.append("rungs tried (rtol: wall time, error) — the step is bounded by the line's "
                 "shortest discrete mode, so loose tolerances barely run faster:")
    for case in results:
        for peer in case["scipy"]:
            rungs = ", ".join(f"{rung['rtol']:.0e}: {format_seconds(rung['seconds'])}, "
                              + ("failed" if rung["error"] is None else f"{rung['error']:.3g}")
                              for rung in peer["tried"])
            lines.append(f"  batch {case['batch']:>2} {peer['method']:<6} {rungs}")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m stridecast.benchmarks.field_bench",
                                     description=__doc__.splitlines()[0])
    parser.add_argument("--bundle", default=None, help="a mooring bundle (default: train one)")
    parser.add_argument("--quick", action="store_true", help="one batch size, shorter budget")
    parser.add_argument("--until", type=float, default=20.0, help="last time, s (default 20)")
    parser.add_argument("--every", type=float, default=0.1, help="time grid spacing, s")
    parser.add_argument("--json-out", default=None, metavar="FILE", help="also write JSON")
    arguments = parser.parse_args(argv)
    times = np.arange(1, math.floor(arguments.until / arguments.every + 1e-9) + 1) \
        * arguments.every
    budget = Budget(seconds=0.5 if arguments.quick else 2.0, min_rounds=3, max_rounds=200)
    with tempfile.TemporaryDirectory() as folder:
        bundle = _bundle(arguments.bundle, Path(folder))
        stepper = load(bundle, on_extrapolation="ignore")
        batches = (1,) if arguments.quick else (1, 16)
        results = [run_case(stepper, batch, times, budget) for batch in batches]
    environment = describe()
    print(f"field forecast vs SciPy: {bundle.name}, state of {stepper.state_dim}, latent "
          f"{stepper.latent_dim}, strides {list(stepper.strides)}; times every "
          f"{arguments.every:g} s up to {times[-1]:g} s")
    print(format_table(results))
    blas = environment["numpy_blas"]
    print(f"BLAS {blas['library']} ({blas['kernel']}), {blas['threads']} threads "
          f"({blas['source']}); load average {environment['load_average']}; "
          f"cpu {environment['cpu']} × {environment['cpus_usable']} usable")
    if arguments.json_out:
        Path(arguments.json_out).write_text(json.dumps(
            {"results": results, "environment": environment}, indent=2) + "\n",
            encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
