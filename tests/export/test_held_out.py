"""`export/held_out.py`: what held-out trajectories say about trained levels.

The levels are exact flow maps of a linear system scaled by a factor f (z ↦ f·expm(A k Δt) z,
expm from SciPy), and the held-out trajectories are exact samples of that system. A forecast
that takes c network steps to reach n base steps is then f^c times the truth, so every figure
has a closed form: a one-step error is |f − 1| times the RMS of the true next states, the
hierarchical error over the finest-only error at n base steps is (f^c − 1)/(f^n − 1), and the
forecast plot's curves are f^c and f^n times the truth. The fewest steps c to n with strides
1, 4, 16 is the greedy coin change (optimal because each stride divides the next).
The ladder's rungs follow the geometric sequence a·r^k (NumPy's `geomspace`).
"""

from __future__ import annotations

import numpy as np
import pytest

from stridecast.export import TrainingError
from stridecast.export.held_out import HORIZON_RUNGS, ladder, validate
from tests.systems import DAMPED_BASE_STEP as BASE_STEP
from tests.systems import exact_level, held_out_list

STRIDES = (1, 4, 16)
FACTOR = 1.01
COUNT, STEPS = 4, 60


def fewest_steps(n: int) -> int:
    """Greedy coin change, exact for strides that divide one another."""
    count = 0
    for stride in sorted(STRIDES, reverse=True):
        count += n // stride
        n %= stride
    return count


@pytest.fixture(scope="module")
def held_out():
    return held_out_list(count=COUNT, steps=STEPS)


@pytest.fixture(scope="module")
def validation(held_out):
    levels = {stride: exact_level(stride, FACTOR) for stride in STRIDES}
    return validate(levels, held_out, base_step=BASE_STEP, mean=np.array([0.5, -1.0]),
                    scale=np.array([2.0, 3.0]), tolerance=0.1, horizon=None,
                    keep_all_levels=True)


def test_ladder_is_geometric_in_multiples_of_the_finest_stride():
    # geomspace(1, 64, 8) = 64^(k/7): 1, 1.81, 3.28, 5.94, 10.8, 19.5, 35.3, 64, truncated,
    # with the strides 4 and 16 added.
    assert ladder(64, [1, 4, 16]) == [1, 3, 4, 5, 10, 16, 19, 35, 64]
    rungs = ladder(1000, [4, 32])
    assert all(rung % 4 == 0 for rung in rungs) and rungs[0] == 4 and rungs[-1] == 1000
    assert 32 in rungs and len(rungs) <= HORIZON_RUNGS + 2
    assert ladder(3, [4]) == []
    assert ladder(7, [4, 16]) == [4]


def test_one_step_errors_are_the_factor_times_the_true_next_states(validation, held_out):
    data = [trajectory.numpy().astype(np.float64) for trajectory in held_out]
    for row in validation.figures["one_step"]:
        stride = row["stride"]
        following = np.concatenate([x[stride:] for x in data])
        expected = (FACTOR - 1) * np.sqrt(np.mean(following**2))
        assert row["rmse"] == pytest.approx(expected, rel=1e-4)
        per_component = (FACTOR - 1) * np.sqrt(np.mean(following**2, axis=0)) * [2.0, 3.0]
        np.testing.assert_allclose(row["rmse_physical"], per_component, rtol=1e-4)


def test_hierarchy_against_finest_only_follows_the_step_counts(validation):
    rows = validation.figures["horizons"]
    assert [row["base_steps"] for row in rows] == ladder(STEPS - 1, STRIDES)
    for row in rows:
        n = row["base_steps"]
        assert row["evaluations"] == fewest_steps(n) and row["finest_only_evaluations"] == n
        assert row["time"] == pytest.approx(n * BASE_STEP)
        assert row["start_states"] == COUNT * (STEPS - n)  # every sample n steps from the end
        ratio = (FACTOR ** fewest_steps(n) - 1) / (FACTOR**n - 1)
        assert row["hierarchical_rmse"] / row["finest_only_rmse"] == pytest.approx(ratio,
                                                                                   rel=1e-3)


def test_forecast_example_is_f_to_the_step_count_times_the_truth(validation, held_out):
    example = validation.example
    steps = np.rint(example.times / BASE_STEP).astype(int)
    assert steps[0] == 0 and steps[-1] == STEPS - 1
    mean = np.array([0.5, -1.0])
    truth = held_out[0].numpy().astype(np.float64)[steps] * [2.0, 3.0] + mean
    np.testing.assert_allclose(example.truth, truth)
    hierarchical = (FACTOR ** np.array([fewest_steps(n) for n in steps]))[:, None]
    np.testing.assert_allclose(example.hierarchical - mean, hierarchical * (truth - mean),
                               rtol=1e-4, atol=1e-5)
    np.testing.assert_allclose(example.finest_only - mean,
                               (FACTOR ** steps)[:, None] * (truth - mean), rtol=1e-4, atol=1e-5)


def test_figures_describe_the_run(validation):
    figures = validation.figures
    assert validation.strides == STRIDES and figures["strides"] == list(STRIDES)
    assert figures["held_out_trajectories"] == COUNT
    assert figures["held_out_samples"] == [STEPS] * COUNT
    assert figures["selection"] is None
    assert figures["summary"]["why"].startswith("all levels kept on request")
    assert figures["curve"]["times"][0] == pytest.approx(BASE_STEP)


def test_held_out_shorter_than_the_finest_stride_is_refused(held_out):
    levels = {16: exact_level(16)}
    short = [trajectory[:10] for trajectory in held_out]
    with pytest.raises(TrainingError, match="span 9 base steps, less than the finest stride 16"):
        validate(levels, short, base_step=BASE_STEP, mean=np.zeros(2), scale=np.ones(2),
                 tolerance=0.1, horizon=None, keep_all_levels=True)
