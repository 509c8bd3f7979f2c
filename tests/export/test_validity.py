"""The validity contract: the first-crossing rule, the dense grid, the manifest curve, and
dense roughness of exact flow maps (scipy.linalg.expm) against the data's own jumps."""

from __future__ import annotations

import numpy as np
import pytest

from stridecast.export.evaluation import prepare_held_out
from stridecast.export.validity import (
    BLOCKS,
    DENSE_POINTS,
    MIN_TRAJECTORIES,
    curve_block,
    dense_grid,
    dense_run,
    manifest_indices,
    resampling_units,
    roughness,
    upper_bound,
    validated_horizon,
)
from tests.systems import DAMPED_BASE_STEP as BASE_STEP
from tests.systems import exact_level, held_out_list


@pytest.mark.parametrize(("errors", "expected"), [
    # The contract's rule: the last time before the FIRST point above the tolerance; a later
    # dip back under it does not count; 0.0 when the first point exceeds; the tolerance
    # itself is within.
    ([0.01, 0.05, 0.1, 0.2, 0.05, 0.01], 3.0),
    ([0.01, 0.05, 0.08, 0.09, 0.09, 0.099], 6.0),
    ([0.5, 0.01, 0.01, 0.01, 0.01, 0.01], 0.0),
    ([0.01, None, 0.01, 0.01, 0.01, 0.01], 1.0),
    ([0.01, 0.02, float("inf"), 0.0, 0.0, 0.0], 2.0),
    ([0.01, float("nan"), 0.0, 0.0, 0.0, 0.0], 1.0),
])
def test_validated_horizon_first_crossing(errors, expected):
    times = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0]
    assert validated_horizon(times, errors, 0.1) == expected


def test_validated_horizon_without_points():
    assert validated_horizon([], [], 0.1) is None


def test_dense_grid():
    assert list(dense_grid(10, 2)) == [2, 4, 6, 8, 10]
    assert len(dense_grid(3, 4)) == 0
    # Beyond DENSE_POINTS multiples the spacing doubles until they fit.
    grid = dense_grid(15 * DENSE_POINTS, 3)  # 5 · DENSE_POINTS multiples: spacing 8
    assert np.all(np.diff(grid) == 3 * 8) and len(grid) <= DENSE_POINTS
    assert grid[-1] <= 15 * DENSE_POINTS and grid[0] == 3 * 8


def test_manifest_thinning_keeps_the_crossing():
    errors = np.linspace(0.0, 0.3, 1000)  # crosses 0.1 between indices 333 and 334
    keep = manifest_indices(errors, 0.1, limit=64)
    assert len(keep) <= 66 and {333, 334} <= set(keep.tolist())
    times = np.arange(1, 1001) * 0.5
    # The rule on the thinned curve gives the same horizon as on the full one.
    assert (validated_horizon(times[keep], errors[keep], 0.1)
            == validated_horizon(times, errors, 0.1) == 334 * 0.5)
    assert list(manifest_indices(errors[:50], 0.1)) == list(range(50))


def test_exact_levels_are_as_smooth_as_the_data():
    levels = {1: exact_level(1), 4: exact_level(4)}
    data = prepare_held_out(held_out_list())
    run = dense_run(levels, data, dense_grid(data.longest, 1))
    assert list(run.steps) == list(range(1, 40))
    assert np.all(run.errors < 1e-5)
    block = curve_block(run, base_step=BASE_STEP, tolerance=0.1, reference_std=[2.0, 3.0])
    assert block["metric"] == "normalised_rms" and block["reference_std"] == [2.0, 3.0]
    assert block["times"] == pytest.approx(list(np.arange(1, 40) * BASE_STEP))
    figures = roughness(run, horizon_steps=20)
    inside, beyond = figures["inside"], figures["beyond"]
    assert inside["pairs"] == 20 and beyond["pairs"] == 19
    # Expected: the flow map is exact (expm), so the forecasts' jumps are the data's own,
    # equal up to float32 rounding, and the excess is rounding only.
    assert inside["ratio"] == pytest.approx(1.0, abs=1e-4)
    assert beyond["ratio"] == pytest.approx(1.0, abs=1e-4)
    assert inside["largest_excess"] < 1e-5


def test_roughness_finds_a_plan_switch():
    # A stride-4 level 10 % too strong: forecasts at 3 and 4 base steps take different plans
    # (1+1+1 against 4), so the dense forecast jumps there more than the data do.
    levels = {1: exact_level(1), 4: exact_level(4, factor=1.1)}
    data = prepare_held_out(held_out_list())
    run = dense_run(levels, data, dense_grid(data.longest, 1))
    inside = roughness(run, horizon_steps=39)["inside"]
    assert inside["at_base_steps"] % 4 == 0
    assert inside["ratio"] > 1.5 and inside["largest_excess"] > 0.05


def test_upper_bound_is_the_bootstrap_percentile_computed_by_hand():
    rng = np.random.default_rng(5)
    # 3 times, 8 start states in 4 resampling units (pairs); the last time has no truth for
    # the last two states (NaN), as for starts near the end of a held-out trajectory.
    errors = rng.uniform(0.0, 1.0, size=(3, 8))
    errors[2, 6:] = np.nan
    units = np.array([0, 0, 1, 1, 2, 2, 3, 3])
    bound = upper_bound(errors, units, confidence=0.9, resamples=200, seed=7)
    # By hand, the documented recipe: the same draws of 4 units with replacement, the RMS
    # over the drawn units' states with truth, numpy's "higher" 90 % quantile, at least the
    # point estimate; draws without any truth left out.
    draws = np.random.default_rng(7).integers(0, 4, size=(200, 4))
    expected = []
    for k in range(3):
        values = []
        for draw in draws:
            states = np.concatenate([errors[k, units == u] for u in draw])
            states = states[~np.isnan(states)]
            if states.size == 0:  # a draw with no truth at this time is left out
                continue
            values.append(np.sqrt(np.mean(states**2)))
        point = np.sqrt(np.nanmean(errors[k] ** 2))
        expected.append(max(np.quantile(values, 0.9, method="higher"), point))
    np.testing.assert_allclose(bound, expected, rtol=1e-12)
    assert np.all(bound >= np.sqrt(np.nanmean(errors**2, axis=1)))


def test_upper_bound_of_identical_units_is_the_estimate_and_divergence_is_inf():
    # Every unit alike: every resample has the same figure, the estimate itself.
    errors = np.tile([[0.1, 0.3]], (2, 3))  # (2 times, 6 states), units of two states
    units = np.repeat(np.arange(3), 2)
    np.testing.assert_allclose(upper_bound(errors, units), np.sqrt((0.01 + 0.09) / 2))
    # One diverged state: a unit holding it is drawn in 1 − (2/3)³ ≈ 70 % of resamples,
    # more than 5 %, so the 95 % bound is inf; without any truth the bound is NaN.
    errors[1, 0] = np.inf
    assert np.isinf(upper_bound(errors, units)[1])
    assert np.isnan(upper_bound(np.full((1, 6), np.nan), units)[0])


def test_resampling_units():
    few = prepare_held_out(held_out_list(count=3))
    units, kind = resampling_units(few)
    # Three trajectories (< MIN_TRAJECTORIES): BLOCKS contiguous blocks of start states.
    assert kind == "blocks of start states"
    assert len(np.unique(units)) == BLOCKS and np.all(np.diff(units) >= 0)
    many = prepare_held_out(held_out_list(count=MIN_TRAJECTORIES))
    units, kind = resampling_units(many)
    assert kind == "trajectories" and list(units) == list(many.trajectory)
