"""Level selection: the subset of trained levels (always with the finest) whose hierarchy has
the lowest held-out error over the horizons the user cares about.

Exhaustive over the subsets when there are at most `EXHAUSTIVE_LEVELS` levels (at most 32
subsets), greedy backward elimination beyond (at most L·(L − 1)/2 subsets). Every subset tried
is kept with its error curve for report.json.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .evaluation import HeldOut, Levels, error_curve, evaluations, json_number

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


@dataclass(frozen=True)
class Candidate:
    """One subset tried: its strides, held-out errors on the score horizons, score and cost."""

    strides: tuple[int, ...]
    errors: np.ndarray
    score: float
    evaluations: float

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
                "errors": [json_number(e) for e in self.errors]}


@dataclass(frozen=True)
class Selection:
    """The chosen strides and the evidence."""

    kept: tuple[int, ...]
    method: str
    steps: np.ndarray
    candidates: tuple[Candidate, ...]

    def to_dict(self, base_step: float) -> dict[str, Any]:
        return {
            "kept": list(self.kept),
            "method": self.method,
            "score": "mean over the horizons of log(clip(normalised RMS, "
                     f"{ERROR_FLOOR:g}, {ERROR_CAP:g})); lower is better",
            "times": [float(n * base_step) for n in self.steps],
            "candidates": [candidate.to_dict() for candidate in self.candidates],
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


def select_levels(levels: Levels, held_out: HeldOut, horizon_steps: int) -> Selection:
    """Choose the subset of `levels` (finest always kept) minimising `score` up to the horizon.

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
    tried: dict[tuple[int, ...], Candidate] = {}

    def candidate(subset: Sequence[int]) -> Candidate:
        subset = tuple(sorted(subset))
        if subset not in tried:
            chosen = {stride: levels[stride] for stride in subset}
            errors = error_curve(chosen, held_out, steps)
            tried[subset] = Candidate(subset, errors, score(errors), evaluations(chosen, steps))
        return tried[subset]

    coarse = strides[1:]
    if len(strides) <= EXHAUSTIVE_LEVELS:
        method = "exhaustive"
        for size in range(len(coarse) + 1):
            for chosen in itertools.combinations(coarse, size):
                candidate((finest, *chosen))
        lowest = min(c.score for c in tried.values())
        best = min((c for c in tried.values() if c.score <= lowest + SCORE_TIE),
                   key=lambda c: c.cost)
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
    ordered = sorted(tried.values(), key=lambda c: (len(c.strides), c.strides), reverse=True)
    return Selection(kept=best.strides, method=method, steps=steps, candidates=tuple(ordered))


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
