"""The bounds one served model puts on requests, beyond the service-wide limits.

Validation (`validation.StateRules`) enforces them and the OpenAPI document (`model_schemas`)
states them, so a request the document allows is one the service answers.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

# The runtime's bound on times (2**52 base steps), imported rather than restated.
from stridecast.runtime.anchors import MAX_BASE_STEPS

# Share of the runtime's per-query evaluation budget (`Limits.max_steps_per_query`) spent on the
# coarsest level at the longest accepted time; the rest covers the finer levels of each of the
# (at most four) interpolation anchors and of the other times of a forecast.
COARSE_SHARE = 4


def max_time(stepper: Any, coarse_steps: int | None = None) -> float:
    """The longest time the service accepts for `stepper`, in its time unit.

    Up to it the coarse-to-fine plan of any time needs at most `coarse_steps` evaluations of
    the coarsest level (at most a quarter of the runtime's evaluation budget; that quarter
    when None), and the runtime's 2**52 base-step bound holds: answerable times form one
    interval [0, max_time] that a schema can state. (The exact set of times within the budget
    is not an interval: 16 k + 15 base steps with strides 1, 4, 16 need more evaluations than
    16 (k + 1).)
    """
    budget = stepper.limits.max_steps_per_query // COARSE_SHARE
    if coarse_steps is not None:
        budget = min(budget, coarse_steps)
    steps = min(MAX_BASE_STEPS, max(stepper.strides) * budget)
    return float(steps * stepper.base_step)


def overflow_threshold(dtype: Any) -> float:
    """The smallest float64 magnitude that becomes infinite when cast to `dtype`.

    Casting rounds to nearest (ties to even): values below max + half an ulp round down to the
    largest finite value. For float64 itself there is no such float64, so inf.
    """
    info = np.finfo(np.dtype(dtype))
    if info.dtype == np.float64:
        return math.inf
    return 2.0**info.maxexp - 2.0**(info.maxexp - info.nmant - 2)
