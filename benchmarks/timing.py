"""Timing helpers: interleaved rounds of competing calls, and latency summaries.

Competitors are timed round by round in turn rather than one after the other, so a burst of
load from elsewhere on the machine hits all of them alike and the ratios stay fair.
"""

from __future__ import annotations

import gc
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Budget:
    """How long to keep measuring one comparison.

    Attributes
    ----------
    seconds : float
        Stop starting new rounds once this much time has passed...
    min_rounds : int
        ...but only after at least this many rounds.
    max_rounds : int
        Never more rounds than this.
    warmup : int
        Untimed calls of each competitor first (caches, buffers, lazy tables).
    """

    seconds: float = 1.0
    min_rounds: int = 5
    max_rounds: int = 2000
    warmup: int = 3


def interleaved(calls: Mapping[str, Callable[[], object]], budget: Budget = Budget(), *,
                inner: int = 1) -> dict[str, np.ndarray]:
    """Time each call in turn, round after round; return seconds per call for every round.

    Parameters
    ----------
    calls : mapping of name to zero-argument callable
        The competitors.
    budget : Budget
        Rounds and time allowed.
    inner : int
        Calls per timed sample (the sample is their mean); 1 gives true per-call latencies.

    Returns
    -------
    dict of name to ndarray, shape (rounds,)
    """
    for call in calls.values():
        for _ in range(budget.warmup):
            call()
    samples: dict[str, list[float]] = {name: [] for name in calls}
    clock = time.perf_counter
    was_enabled = gc.isenabled()
    gc.disable()  # a collection inside one sample would be charged to whoever ran then
    try:
        start = clock()
        rounds = 0
        while rounds < budget.max_rounds and (
                rounds < budget.min_rounds or clock() - start < budget.seconds):
            for name, call in calls.items():
                begin = clock()
                for _ in range(inner):
                    call()
                samples[name].append((clock() - begin) / inner)
            rounds += 1
    finally:
        if was_enabled:
            gc.enable()
    return {name: np.asarray(values) for name, values in samples.items()}


def summary(samples: np.ndarray) -> dict[str, float]:
    """p50, p99, mean and count of per-call times (seconds)."""
    return {
        "p50": float(np.percentile(samples, 50)),
        "p99": float(np.percentile(samples, 99)),
        "mean": float(np.mean(samples)),
        "rounds": int(samples.size),
    }


def format_seconds(seconds: float | None) -> str:
    """A duration with a unit that keeps 3 significant figures (ns, µs, ms or s)."""
    if seconds is None:
        return "—"
    for unit, factor in (("s", 1.0), ("ms", 1e-3), ("µs", 1e-6)):
        if seconds >= factor:
            return f"{seconds / factor:.3g} {unit}"
    return f"{seconds / 1e-9:.3g} ns"


def format_rate(per_second: float | None) -> str:
    """A rate such as 1.23e+07/s."""
    return "—" if per_second is None else f"{per_second:.3g}/s"
