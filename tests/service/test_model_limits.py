"""Per-model bounds (service/model_limits.py).

`overflow_threshold` is checked against NumPy's own float64 → float16/float32 casts (IEEE 754
round to nearest, ties to even); `max_time` against the arithmetic its docstring states, with
the runtime's 2**52 base-step bound (`runtime/anchors.MAX_BASE_STEPS`).
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest

from stridecast.service.model_limits import COARSE_SHARE, max_time, overflow_threshold


@pytest.mark.parametrize("dtype", [np.float16, np.float32])
def test_the_overflow_threshold_is_where_numpys_cast_becomes_infinite(dtype):
    threshold = overflow_threshold(dtype)
    below = np.nextafter(threshold, 0.0)
    with np.errstate(over="ignore"):
        assert np.isinf(dtype(threshold)) and np.isinf(dtype(-threshold))
        assert np.isfinite(dtype(below)) and np.isfinite(dtype(-below))
    assert dtype(below) == np.finfo(dtype).max  # rounds down to the largest finite value


def test_float64_never_overflows_from_float64():
    assert overflow_threshold(np.float64) == math.inf
    assert overflow_threshold("float64") == math.inf


def _stepper(strides, base_step, max_steps):
    return SimpleNamespace(strides=strides, base_step=base_step,
                           limits=SimpleNamespace(max_steps_per_query=max_steps))


def test_max_time_spends_a_quarter_of_the_budget_on_the_coarsest_level():
    stepper = _stepper((1, 4, 16), 0.1, 1000)
    assert COARSE_SHARE == 4
    # 1000 // 4 = 250 coarse steps of 16 base steps of 0.1.
    assert max_time(stepper) == pytest.approx(250 * 16 * 0.1)
    assert max_time(stepper, coarse_steps=10) == pytest.approx(10 * 16 * 0.1)
    assert max_time(stepper, coarse_steps=10**9) == pytest.approx(250 * 16 * 0.1)


def test_max_time_stays_within_the_runtimes_base_step_bound():
    stepper = _stepper((1, 2**30), 0.5, 10**9)
    assert max_time(stepper) == 2.0**52 * 0.5
    # A plan to max_time needs at most the budget of coarsest steps (floor division).
    small = _stepper((3, 7), 0.2, 403)
    steps = round(max_time(small) / small.base_step)
    assert steps // max(small.strides) <= small.limits.max_steps_per_query // COARSE_SHARE
