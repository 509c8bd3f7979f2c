"""The `Plan` record: how an answer for one requested time is (or would be) produced."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from .findings import Finding

METHODS = ("grid", "interpolate", "nearest", "integrate", "hybrid")


@dataclass(frozen=True)
class Plan:
    """How `advance` reaches a time.

    Attributes
    ----------
    t : float
        The requested time, in the bundle's time unit.
    base_steps : int
        The grid time reached by network steps, in base steps (the anchor for off-grid methods).
    steps : tuple of (stride, count)
        Network steps to reach `base_steps`, coarsest stride first.
    evaluations : int
        Network calls per state, over everything the answer needs (for "interpolate", the
        shared tree of the four grid anchors).
    remainder : float
        Time between the anchor `base_steps` and `t`, in time units (0.0 on the grid).
    method : str
        "grid" (exact grid time), "interpolate" (cubic through four grid states), "nearest"
        (the nearest grid time, answered for `t`), "integrate" (network to the anchor, then
        Runge–Kutta on the vector field), "hybrid" (coarse levels only, then Runge–Kutta).
    integrator_evaluations : int
        Vector-field evaluations spent by the Runge–Kutta integrator (0 when none).
    anchors : tuple of int
        Grid times (base steps) the answer was built from.
    expected_error : float
        The bundle's held-out error curve at `t` (normalised RMS; nan without a curve, inf
        past it); see `Stepper.expected_error`.
    findings : tuple of Finding
        Why not to trust the answer: from `plan`, the time against the validated horizon;
        from `advance_with_plan`, also every state the call visited against the envelope.
    """

    t: float
    base_steps: int
    steps: tuple[tuple[int, int], ...]
    evaluations: int
    remainder: float = 0.0
    method: str = "grid"
    integrator_evaluations: int = 0
    anchors: tuple[int, ...] = ()
    expected_error: float = math.nan
    findings: tuple[Finding, ...] = ()

    @property
    def network_steps(self) -> int:
        return sum(count for _, count in self.steps)

    def to_dict(self) -> dict[str, Any]:
        return {
            "t": self.t,
            "base_steps": self.base_steps,
            "steps": [[stride, count] for stride, count in self.steps],
            "evaluations": self.evaluations,
            "remainder": self.remainder,
            "method": self.method,
            "integrator_evaluations": self.integrator_evaluations,
            "anchors": list(self.anchors),
            "expected_error": (self.expected_error if math.isfinite(self.expected_error)
                               else None),
            "findings": [finding.to_dict() for finding in self.findings],
        }
