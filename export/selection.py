"""Level selection: the subset of trained levels (always with the finest) whose hierarchy has
the lowest held-out error over the horizons the user cares about, among the subsets whose
forecasts last at least as long as the finest level's alone.

The score (`score`) averages log normalised RMS over start states, which the worst states
dominate; a subset can win it while most of its forecasts diverge sooner than the finest
level's. So a subset is eligible only if its median held-out time to divergence
(`divergence.median_divergence_time`: per start state, the first time its normalised error
exceeds `divergence.DIVERGENCE_THRESHOLD`; a start that never does within the score horizon
counts at the horizon) is at least the finest level's alone; among the eligible ones the
lowest score wins (ties within `SCORE_TIE` to the cheapest). The finest level alone is always
eligible.

Exhaustive over the subsets when there are at most `EXHAUSTIVE_LEVELS` levels (at most 32
subsets); beyond, greedy backward elimination by score (at most L·(L − 1)/2 subsets) plus the
finest level alone, the choice made among every subset tried. Every subset tried is kept with
its error curve and median divergence time for report.json.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .divergence import DIVERGENCE_THRESHOLD, median_divergence_time
from .evaluation import HeldOut, Levels, evaluations, json_number, rms_over_states, state_errors
from .validity import dense_grid

EXHAUSTIVE_LEVELS = 6
# Horizons of the score: evenly spaced over (0, horizon], multiples of the finest stride.
SCORE_POINTS = 32
# Errors are clipped to [ERROR_FLOOR, ERROR_CAP] before the log (see `score`).
ERROR_FLOOR = 1e-5
ERROR_CAP = 1.0
# Scores closer than this to the best count as ties, which go to the cheapest subset: 0.01 is
# a 1 % difference in the geometric-mean error, below the sampling noise of a few hundred
# held-out start states.
SCORE_TIE = 0.01
# Horizons at which divergence times are looked for: every multiple of the finest stride up to
# the score horizon, or evenly spaced ones (power-of-two multiples) when there are more than
# this many, so the medians are resolved to 1/DIVERGENCE_POINTS of the horizon or better.
DIVERGENCE_POINTS = 512


@dataclass(frozen=True)
class Candidate:
    """One subset tried: its strides, held-out errors on the score horizons, score, cost and
    median held-out time to divergence (base steps)."""

    strides: tuple[int, ...]
    errors: np.ndarray
    score: float
    evaluations: float
    median_divergence: float

    @property
    def cost(self) -> tuple[float, int, tuple[int, ...]]:
        """Lower is cheaper: fewer network evaluations, then fewer levels (a total order)."""
        return (self.evaluations, len(self.strides), self.strides)

    def beats(self, other: Candidate) -> bool:
        """Clearly lower score, or a tie (within SCORE_TIE) at a lower cost."""
        if self.score < other.score - SCORE_TIE:
            return True
        return self.score <= other.score + SCORE_TIE and self.cost < other.cost

    def to_dict(self) -> dict[str, Any]:
        return {"strides": list(self.strides), "score": self.score,
                "mean_evaluations": self.evaluations,
                "median_divergence_steps": self.median_divergence,
                "errors": [json_number(e) for e in self.errors]}


@dataclass(frozen=True)
class Selection:
    """The chosen strides and the evidence."""

    kept: tuple[int, ...]
    method: str
    steps: np.ndarray
    candidates: tuple[Candidate, ...]
    reference: Candidate

    def eligible(self, candidate: Candidate) -> bool:
        """Whether `candidate` lasts (median divergence time) as long as the finest alone."""
        return candidate.median_divergence >= self.reference.median_divergence

    def to_dict(self, base_step: float) -> dict[str, Any]:
        return {
            "kept": list(self.kept),
            "method": self.method,
            "score": "mean over the horizons of log(clip(normalised RMS, "
                     f"{ERROR_FLOOR:g}, {ERROR_CAP:g})); lower is better",
            "eligibility": "median over held-out start states of the first time the "
                           f"normalised error exceeds {DIVERGENCE_THRESHOLD:g} (starts that "
                           "never do count at the score horizon) at least the finest level's "
                           "alone",
            "finest_median_divergence_time": self.reference.median_divergence * base_step,
            "times": [float(n * base_step) for n in self.steps],
            "candidates": [{**candidate.to_dict(),
                            "median_divergence_time": candidate.median_divergence * base_step,
                            "eligible": self.eligible(candidate)}
                           for candidate in self.candidates],
        }


def score_steps(horizon_steps: int, finest: int) -> np.ndarray:
    """Score horizons: up to `SCORE_POINTS` multiples of `finest`, evenly spread to the horizon."""
    multiples = horizon_steps // finest
    points = np.linspace(multiples / SCORE_POINTS, multiples, SCORE_POINTS)
    return np.unique(np.maximum(1, np.floor(points)).astype(np.int64)) * finest


def score(errors: np.ndarray) -> float:
    """Mean log of the clipped errors.

    The log weighs a halving of the error the same at short horizons (errors of 1e-3) as at
    long ones (errors near 1), so the long horizons, where every candidate is poor, do not
    drown the short ones. Errors at or above ERROR_CAP = 1, the error of forecasting the
    training mean (the normalisation makes each component's spread 1), carry no information:
    clipping there makes a diverged candidate (error inf) finite and no worse than any other
    useless forecast, so candidates that all diverge at long horizons are still ranked by the
    horizons where they differ. The floor, 1e-5, is float32 rounding after hundreds of steps
    (unit roundoff 6e-8): differences below it are noise, and ties go to the cheaper subset.
    """
    clipped = np.clip(np.nan_to_num(errors, nan=ERROR_CAP, posinf=ERROR_CAP), ERROR_FLOOR,
                      ERROR_CAP)
    return float(np.mean(np.log(clipped)))


def choose(candidates: Sequence[Candidate], reference: Candidate) -> Candidate:
    """The eligible candidate (median divergence time at least `reference`'s) with the lowest
    score; scores within `SCORE_TIE` of it tie, and ties go to the lowest `cost`.

    `reference` (the finest level alone) is eligible by definition and always considered.
    """
    eligible = [c for c in candidates if c.median_divergence >= reference.median_divergence]
    eligible = eligible if any(c is reference for c in eligible) else [*eligible, reference]
    lowest = min(c.score for c in eligible)
    return min((c for c in eligible if c.score <= lowest + SCORE_TIE), key=lambda c: c.cost)


def select_levels(levels: Levels, held_out: HeldOut, horizon_steps: int) -> Selection:
    """Choose the subset of `levels` (finest always kept): the lowest `score` up to the horizon
    among those whose median held-out time to divergence is at least the finest level's.

    Parameters
    ----------
    levels : mapping of int to module
        All trained levels (increment networks on normalised states).
    held_out : HeldOut
        Held-out trajectories and start states.
    horizon_steps : int
        Longest horizon of the score, in base steps (≥ the finest stride).
    """
    strides = tuple(sorted(levels))
    finest = strides[0]
    steps = score_steps(horizon_steps, finest)
    # One forecast pass per candidate on the score horizons and the divergence grid together.
    grid = np.union1d(steps, dense_grid(horizon_steps, finest, DIVERGENCE_POINTS))
    at_score = np.searchsorted(grid, steps)
    tried: dict[tuple[int, ...], Candidate] = {}

    def candidate(subset: Sequence[int]) -> Candidate:
        subset = tuple(sorted(subset))
        if subset not in tried:
            chosen = {stride: levels[stride] for stride in subset}
            per_state = state_errors(chosen, held_out, grid)
            errors = rms_over_states(per_state[at_score])
            median = median_divergence_time(per_state, grid, float(horizon_steps))
            tried[subset] = Candidate(subset, errors, score(errors), evaluations(chosen, steps),
                                      median)
        return tried[subset]

    coarse = strides[1:]
    if len(strides) <= EXHAUSTIVE_LEVELS:
        method = "exhaustive"
        for size in range(len(coarse) + 1):
            for chosen in itertools.combinations(coarse, size):
                candidate((finest, *chosen))
    else:
        method = "backward elimination"
        best = candidate(strides)
        while len(best.strides) > 1:
            trials = [candidate([s for s in best.strides if s != drop])
                      for drop in best.strides[1:]]
            challenger = min(trials, key=lambda c: (c.score, c.cost))
            if not challenger.beats(best):
                break
            best = challenger
    reference = candidate((finest,))
    best = choose(list(tried.values()), reference)
    ordered = sorted(tried.values(), key=lambda c: (len(c.strides), c.strides), reverse=True)
    return Selection(kept=best.strides, method=method, steps=steps, candidates=tuple(ordered),
                     reference=reference)


def horizon_in_steps(horizon: float | None, *, base_step: float, finest: int, longest: int
                     ) -> tuple[int, bool]:
    """The score horizon in base steps (a multiple of `finest`) and whether it was clipped to
    the held-out span `longest` (base steps). None means the held-out span."""
    limit = longest // finest * finest
    if horizon is None:
        return limit, False
    # A relative allowance so 0.3 / 0.1 = 2.9999999999999996 still means 3 base steps.
    steps = math.floor(horizon / base_step * (1 + 1e-9)) // finest * finest
    return (limit, True) if steps > limit else (steps, False)
