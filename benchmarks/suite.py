"""The whole benchmark: build the reference model, measure every part, then the busy neighbour.

Both passes run in this process, in the environment as found (no thread variables are set):
the first on the machine as it is, the second again with a neighbour process the benchmark
starts keeping one core busy (`neighbour.busy_neighbour`).
"""

from __future__ import annotations

import logging
import tempfile
import time
from pathlib import Path
from typing import Any

from stridecast.runtime import load

from . import bundle_bench, environment, solver_bench, system_bench, threads_bench
from .neighbour import busy_neighbour
from .reference import build_reference

logger = logging.getLogger("benchmarks")

BUSY_LABEL = "busy neighbour"
# The busy pass repeats what threads change: one latency horizon, the batches, the dense forecast.
BUSY_HORIZONS = (1_000,)
# The solver comparison stops at this many time units: beyond it a tight DOP853 run costs
# seconds per call and adds nothing the log-log slope does not already show.
MAX_SOLVER_TIME = 120.0
QUICK_SOLVER_STEPS = (100, 1_000, 3_000)
PACKAGE = __name__.rsplit(".", 1)[0]  # stridecast.benchmarks, its only import name


def shipped_crane_bundle() -> Path | None:
    """`stridecast.demo_bundle()` if the package ships it, else None."""
    import stridecast

    try:
        return stridecast.demo_bundle()
    except FileNotFoundError:
        return None


def measure_pass(bundle: Path, *, quick: bool, modules=None, crane_bundle: Path | None = None,
                 solvers: bool = True, system: bool = True,
                 work_dir: Path | None = None) -> dict[str, Any]:
    """One pass in this process: bundle comparisons, and optionally solvers and start-up."""
    record: dict[str, Any] = {"environment": environment.describe(), "durations": {}}
    begin = time.perf_counter()
    record["bench"] = bundle_bench.run(bundle, quick=quick, torch_modules=modules,
                                       work_dir=work_dir)
    record["durations"]["bench"] = time.perf_counter() - begin
    begin = time.perf_counter()
    record["threads"] = threads_bench.run(bundle, quick=quick)
    record["durations"]["threads"] = time.perf_counter() - begin
    if solvers:
        begin = time.perf_counter()
        record["solvers"] = _solvers(bundle, crane_bundle, quick)
        record["durations"]["solvers"] = time.perf_counter() - begin
    if system:
        logger.info("start-up and memory (fresh processes)")
        begin = time.perf_counter()
        record["system"] = system_bench.run(bundle, quick=quick)
        record["durations"]["system"] = time.perf_counter() - begin
    # Described again at the end: torch is imported by now, so its thread count is known.
    record["environment"] = {**environment.describe(),
                             "load_average_start": record["environment"]["load_average"]}
    return record


def _solvers(bundle: Path, crane_bundle: Path | None, quick: bool) -> dict[str, Any]:
    trained = crane_bundle is not None
    stepper = load(crane_bundle if trained else bundle)
    horizons = QUICK_SOLVER_STEPS if quick else bundle_bench.HORIZONS
    horizons = [bundle_bench.on_grid(stepper, n) for n in horizons
                if n * stepper.base_step <= MAX_SOLVER_TIME]
    target = bundle_bench.on_grid(stepper, bundle_bench.NAIVE_TARGET_STEPS)
    logger.info("solve_ivp comparison with %s", crane_bundle if trained else bundle)
    return solver_bench.run(stepper, horizons, trained_on_crane=trained, target_steps=target,
                            quick=quick, source=_source_name(crane_bundle if trained else bundle))


def _source_name(path: Path) -> str:
    """How the report names a bundle: the shipped one by its API call (a checkout's absolute
    path would mean nothing to a reader), any other by the path given."""
    shipped = shipped_crane_bundle()
    if shipped is not None and Path(path).resolve() == shipped.resolve():
        return "stridecast.demo_bundle()"
    return str(path)


def busy_neighbour_pass(bundle: Path, *, quick: bool, modules=None) -> dict[str, Any]:
    """The bundle comparisons again while a neighbour process keeps one core busy."""
    logger.info("busy-neighbour pass: one core kept busy by another process")
    with busy_neighbour() as neighbour:
        record: dict[str, Any] = {"environment": environment.describe(),
                                  "neighbour_pid": neighbour.pid}
        record["bench"] = bundle_bench.run(bundle, quick=quick, torch_modules=modules,
                                           horizons=BUSY_HORIZONS, naive=False,
                                           naive_target_steps=BUSY_HORIZONS[0])
        record["threads"] = threads_bench.run(bundle, quick=quick)
        record["environment"] = {**environment.describe(),
                                 "load_average_start": record["environment"]["load_average"]}
    return record


def run_suite(out_dir: Path, *, quick: bool = False, bundle: Path | None = None,
              crane_bundle: Path | None = None, busy: bool = True,
              via_export: bool = False) -> dict[str, Any]:
    """Everything: the default pass (with solvers and start-up) and the busy-neighbour pass.

    The reference model is built in a temporary directory unless `bundle` is given.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    if crane_bundle is None:
        crane_bundle = shipped_crane_bundle()
    results: dict[str, Any] = {"passes": {}}
    with tempfile.TemporaryDirectory(prefix="stridecast-bench-") as scratch:
        work = Path(scratch)
        modules = None
        if bundle is None:
            reference = build_reference(work, via_export=via_export)
            bundle, modules = reference.path, reference.modules
            results["reference"] = reference.describe()
        results["passes"]["default"] = measure_pass(bundle, quick=quick, modules=modules,
                                                    crane_bundle=crane_bundle, work_dir=work)
        if busy:
            results["passes"][BUSY_LABEL] = busy_neighbour_pass(bundle, quick=quick,
                                                                modules=modules)
    return results
