"""The thread policy's crossover: one network call per batch size, with and without the policy.

Three steppers load the same bundle: "as called" (no policy: BLAS as the process has it, the
runtime's behaviour before it managed threads), "1 thread" (`threads=1`: BLAS held at one
thread, no split) and "split" (`threads=None`: BLAS at one thread, rows split over the usable
CPUs). Also timed: entering and leaving the runtime's BLAS scope, against threadpoolctl's
`threadpool_limits`, which scans the loaded libraries on every call.

"as called" is timed in its own rounds after the others: OpenBLAS's threads keep spinning for
a while after a threaded product and would take CPU time from whichever call came next.
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Sequence
from typing import Any

import numpy as np

from stridecast.runtime import load
from stridecast.runtime.threads import SCOPE_MIN_BATCH, single_threaded_blas

from .timing import Budget, interleaved, summary

logger = logging.getLogger("benchmarks")

BATCHES = (1, 8, 16, 17, 31, 32, 64, 128, 256, 512, 1024, 4096)
# Long enough for OpenBLAS's idle threads to stop spinning and sleep (about 0.1 s by default).
SPIN_SECONDS = 0.3


def run(bundle: os.PathLike[str] | str, *, quick: bool = False,
        batches: Sequence[int] = BATCHES, budget: Budget | None = None) -> dict[str, Any]:
    """Per-call time of the finest level at each batch size, for the three steppers."""
    budget = budget or (Budget(seconds=0.1, min_rounds=5, max_rounds=300, warmup=2) if quick
                        else Budget(seconds=0.4, min_rounds=10, max_rounds=1000, warmup=3))
    steppers = {"as called": load(bundle), "1 thread": load(bundle, threads=1),
                "split": load(bundle)}
    for kernel in steppers["as called"]._kernels.values():
        kernel.policy = None  # the runtime without its policy: BLAS as the process has it
    finest = steppers["split"].strides[0]
    kernels = {name: stepper._kernels[finest] for name, stepper in steppers.items()}
    mean = np.asarray(steppers["split"].manifest.mean, dtype=np.float32)
    rows = []
    for batch in batches:
        states = np.ascontiguousarray(np.tile(mean, (batch, 1)))
        calls = {name: (lambda kernel=kernel, states=states: kernel(states))
                 for name, kernel in kernels.items()}
        unmanaged = calls.pop("as called")
        samples = interleaved(calls, budget)
        samples["as called"] = interleaved({"as called": unmanaged}, budget)["as called"]
        time.sleep(SPIN_SECONDS)
        times = {name: summary(samples[name]) for name in ("as called", "1 thread", "split")}
        rows.append({"batch": batch, "times": times})
        logger.info("one call at batch %d: %s", batch,
                    {name: f"{value['p50'] * 1e6:.1f} µs" for name, value in times.items()})
    return {"rows": rows, "threads": steppers["split"]._kernels[finest].policy.threads,
            "scope_min_batch": SCOPE_MIN_BATCH, "scope": _scope_cost(budget)}


def _scope_cost(budget: Budget) -> dict[str, float]:
    """Seconds per enter+exit of the runtime's scope and of `threadpool_limits`."""
    from threadpoolctl import threadpool_limits

    scope = single_threaded_blas()

    def runtime_scope() -> None:
        with scope:
            pass

    def rescanning() -> None:
        with threadpool_limits(limits=1, user_api="blas"):
            pass

    samples = interleaved({"runtime": runtime_scope, "threadpool_limits": rescanning}, budget,
                          inner=20)
    return {name: float(np.median(values)) for name, values in samples.items()}
