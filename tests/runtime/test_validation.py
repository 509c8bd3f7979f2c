"""Checks of states, times and options (runtime/validation.py): results and error messages."""

from __future__ import annotations

import numpy as np
import pytest

from stridecast.runtime.errors import OptionError, StateError, TimeError
from stridecast.runtime.validation import check_off_grid, check_state, check_time, check_times

NAMES = ("x", "v")


def test_check_state_returns_a_batch_and_whether_it_was_single():
    array, single = check_state([1, 2], names=NAMES, dtype=np.dtype("float32"), max_batch=4)
    assert single and array.shape == (1, 2) and array.dtype == np.float32
    batch = np.ones((3, 2))
    array, single = check_state(batch, names=NAMES, dtype=np.dtype("float64"), max_batch=4)
    assert not single and array is batch


@pytest.mark.parametrize(("state", "pattern"), [
    ([1.0, 2.0, 3.0], r"`state` has shape \(3,\); this bundle's state has 2 components"),
    (np.ones((2, 2, 2)), r"`state` has shape \(2, 2, 2\); expected \(2,\) or \(batch, 2\)\."),
    (np.zeros((0, 2)), r"`state` is an empty batch"),
    (np.ones((5, 2)), r"`state` holds 5 states; the limit is 4\."),
    ([1.0, float("nan")], r"`state` row 0 holds a non-finite value"),
    ([True, False], r"`state` has dtype bool; expected real numbers"),
    (["a", "b"], r"`state` has dtype <U1; expected real numbers"),
    ([1e300, 0.0], r"too large for float32"),
])
def test_check_state_refuses_with_the_parameter_named(state, pattern):
    with pytest.raises(StateError, match=pattern):
        check_state(state, names=NAMES, dtype=np.dtype("float32"), max_batch=4)


def test_check_times_and_check_time():
    assert check_times([0, 1.5], max_points=3).tolist() == [0.0, 1.5]
    with pytest.raises(TimeError, match=r"`times` holds 4 times; the limit is 3"):
        check_times([0, 1, 2, 3], max_points=3)
    with pytest.raises(TimeError, match=r"`times` contains -1\.0; expected finite times ≥ 0\."):
        check_times([1, -1], max_points=3)
    with pytest.raises(TimeError, match=r"`times` has shape \(0,\)"):
        check_times([], max_points=3)
    assert check_time(np.int64(3), unit="s") == 3.0
    for bad in (True, "1", None):
        with pytest.raises(TimeError, match=r"`t` is .*; expected a finite number of s ≥ 0\."):
            check_time(bad, unit="s")
    with pytest.raises(TimeError, match=r"`t` is inf; expected a finite time ≥ 0\."):
        check_time(float("inf"), unit="s")


def test_check_off_grid_lists_the_choices():
    assert check_off_grid("nearest") == "nearest"
    # An option, not a time: OptionError (still a ValueError for callers catching that).
    with pytest.raises(OptionError, match=r"`off_grid` is 'round'; expected one of "
                                         r"\['interpolate', 'nearest', 'error'\]\."):
        check_off_grid("round")
