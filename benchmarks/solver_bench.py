"""stridecast against SciPy's `solve_ivp` on the crane scenario, reaching the same times.

RK45 runs at SciPy's default tolerances. DOP853 runs at the loosest tolerance whose error is no
larger than the stepper's own error against the ground truth (`stridecast.demo.crane.simulate`,
DOP853 at 1e-10) — which needs a bundle trained on the crane. Without one, the stepper timed is
the given (untrained) bundle, which costs the same per step as any network of its size, and
DOP853 runs at a fixed tolerance that is reported as not matched.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from typing import Any

import numpy as np

from stridecast.demo import crane
from stridecast.runtime import Stepper

from .timing import Budget, interleaved, summary

logger = logging.getLogger("benchmarks")

RK45_DEFAULT = {"rtol": 1e-3, "atol": 1e-6}  # SciPy's documented defaults for solve_ivp
UNMATCHED_DOP853 = {"rtol": 1e-6, "atol": 1e-9}
CANDIDATE_RTOLS = tuple(10.0**-power for power in range(2, 12))
ERROR_STATES = 8


def initial_state() -> np.ndarray:
    """The benchmark's crane state: a 0.15 rad swing and a 2 cm bob, both released at rest."""
    return crane.state_from_modes(0.15, 0.0, 0.02, 0.0)


def solve(state: np.ndarray, t: float, method: str, tolerance: dict[str, float]) -> np.ndarray:
    """`solve_ivp` of the crane's vector field from `state` to time `t`; the final state."""
    from scipy.integrate import solve_ivp

    if t == 0:
        return np.array(state, dtype=np.float64)
    solution = solve_ivp(lambda _time, y: crane.vector_field(y), (0.0, t), state,
                         method=method, **tolerance)
    if not solution.success:
        raise RuntimeError(f"solve_ivp ({method}) failed: {solution.message}")
    return solution.y[:, -1]


def _error(answers: np.ndarray, truth: np.ndarray) -> float:
    """Root mean square over states of the Euclidean position-and-velocity error."""
    return float(np.sqrt(np.mean(np.sum((answers - truth) ** 2, axis=-1))))


def matched_tolerance(stepper: Stepper, t: float, seed: int = 0) -> dict[str, Any]:
    """The stepper's error at `t` and the loosest DOP853 tolerance that is at least as accurate.

    Errors are measured on `ERROR_STATES` states drawn from the crane's training range, against
    `crane.simulate` (DOP853 at rtol = atol = 1e-10).
    """
    states = crane.sample_initial_states(ERROR_STATES, np.random.default_rng(seed))
    truth = crane.simulate(states, np.array([t]))[0]
    stepper_error = _error(np.asarray(stepper.advance(states, t), np.float64), truth)
    rk45_error = _error(np.stack([solve(s, t, "RK45", RK45_DEFAULT) for s in states]), truth)
    chosen, chosen_error = None, None
    for rtol in CANDIDATE_RTOLS:
        tolerance = {"rtol": rtol, "atol": rtol}
        error = _error(np.stack([solve(s, t, "DOP853", tolerance) for s in states]), truth)
        if error <= stepper_error:
            chosen, chosen_error = tolerance, error
            break
    return {"t": t, "stepper_error": stepper_error, "rk45_error": rk45_error,
            "dop853_tolerance": chosen, "dop853_error": chosen_error}


def run(stepper: Stepper, horizons: Sequence[int], *, trained_on_crane: bool,
        target_steps: int, quick: bool = False, budget: Budget | None = None,
        source: str | None = None) -> dict[str, Any]:
    """Time `stepper.advance` and `solve_ivp` (RK45, DOP853) to the same times.

    Parameters
    ----------
    stepper : Stepper
        The stepper timed (a crane bundle when `trained_on_crane`).
    horizons : sequence of int
        Targets in the stepper's base steps.
    trained_on_crane : bool
        Whether `stepper` models the crane, so its error can set DOP853's tolerance.
    target_steps : int
        The horizon (base steps) of the solver target and of the tolerance match.
    quick : bool
        Shorter budgets.
    budget : Budget, optional
        Overrides the budgets `quick` chooses (for the stepper and the solvers alike).
    source : str, optional
        Where the stepper was loaded from, for the report.
    """
    # The stepper is ~1000× faster than the solvers: it gets its own, longer series of rounds
    # rather than only as many as the solvers can afford.
    own_budget = budget or Budget(seconds=0.2 if quick else 0.5, min_rounds=20, warmup=3)
    if budget is None:
        budget = Budget(seconds=0.3 if quick else 1.0, min_rounds=2 if quick else 3, warmup=1)
    target_t = target_steps * stepper.base_step
    if trained_on_crane:
        # Matched where the bundle claims validity: beyond its validated horizon its error is
        # not a figure anyone should rely on.
        horizon = stepper.manifest.validated_horizon
        match_t = target_t if horizon is None else min(target_t, horizon)
        match_t = stepper.plan(match_t, off_grid="nearest").base_steps * stepper.base_step
        match = matched_tolerance(stepper, match_t)
        dop853 = match["dop853_tolerance"] or {"rtol": CANDIDATE_RTOLS[-1],
                                               "atol": CANDIDATE_RTOLS[-1]}
    else:
        match = None
        dop853 = UNMATCHED_DOP853
    state = initial_state()
    stepper_state = state.astype(stepper.dtype) if trained_on_crane else None
    if stepper_state is None:
        # An untrained bundle's own centre: the crane state would leave its normalisation.
        stepper_state = np.asarray(stepper.manifest.mean, dtype=stepper.dtype)
    rows = []
    for base_steps in sorted(set(horizons) | {target_steps}):
        t = base_steps * stepper.base_step
        samples = interleaved({"stridecast": lambda t=t: stepper.advance(stepper_state, t)},
                              own_budget)
        samples.update(interleaved({
            "rk45": lambda t=t: solve(state, t, "RK45", RK45_DEFAULT),
            "dop853": lambda t=t: solve(state, t, "DOP853", dop853),
        }, budget))
        row = {"base_steps": base_steps, "t": t,
               "times": {name: summary(values) for name, values in samples.items()}}
        logger.info("to t = %g: %s", t,
                    {name: f"{value['p50'] * 1e3:.3g} ms" for name, value in row["times"].items()})
        rows.append(row)
    return {
        "scenario": "stridecast.demo.crane (planar elastic pendulum)",
        "trained_on_crane": trained_on_crane,
        "stepper": stepper.manifest.name,
        "stepper_source": source,
        "candidate_rtols": list(CANDIDATE_RTOLS),
        "rk45_tolerance": RK45_DEFAULT,
        "dop853_tolerance": dop853,
        "tolerance_matched": match is not None and match["dop853_tolerance"] is not None,
        "match": match,
        "target_steps": target_steps,
        "rows": rows,
    }


def speedup_at(result: dict[str, Any], base_steps: int, solver: str) -> float | None:
    """How many times faster stridecast was than `solver` at `base_steps` (p50 over p50)."""
    for row in result["rows"]:
        if row["base_steps"] == base_steps:
            return row["times"][solver]["p50"] / row["times"]["stridecast"]["p50"]
    return None

