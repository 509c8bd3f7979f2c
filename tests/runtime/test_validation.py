"""Checks of states, times and options (runtime/validation.py): results and error messages.

These are the one wording of each rule: the Python API and the service (tests/http_cases.py)
show the same sentences, the service naming its fields with `where`.
"""

from __future__ import annotations

import numpy as np
import pytest

from stridecast.runtime.errors import OptionError, StateError, TimeError
from stridecast.runtime.validation import check_off_grid, check_state, check_time, check_times

NAMES = ("x", "v")
EXPECTED = (r"this bundle's state has 2 components \['x', 'v'\], so expected \(2,\) or "
            r"\(batch, 2\)\.")


def test_check_state_returns_a_batch_and_whether_it_was_single():
    array, single = check_state([1, 2], names=NAMES, dtype=np.dtype("float32"), max_batch=4)
    assert single and array.shape == (1, 2) and array.dtype == np.float32
    batch = np.ones((3, 2))
    array, single = check_state(batch, names=NAMES, dtype=np.dtype("float64"), max_batch=4)
    assert not single and array is batch
    # A non-contiguous float32 batch leaves the fast path and comes back contiguous, same values.
    strided = np.arange(8, dtype=np.float32).reshape(2, 4)[:, ::2]
    array, single = check_state(strided, names=NAMES, dtype=np.dtype("float32"), max_batch=4)
    assert not single and array.flags.c_contiguous and array.tolist() == strided.tolist()


@pytest.mark.parametrize(("state", "pattern"), [
    ([1.0, 2.0, 3.0], r"^`state` has shape \(3,\); " + EXPECTED + "$"),
    (np.ones((2, 2, 2)), r"^`state` has shape \(2, 2, 2\); " + EXPECTED + "$"),
    ([], r"^`state` has shape \(0,\); " + EXPECTED + "$"),
    ([[]], r"^`state` has shape \(1, 0\); " + EXPECTED + "$"),
    (np.zeros((0, 2)), r"^`state` is an empty batch \(shape \(0, 2\)\); expected at least one "
                       r"state\.$"),
    (np.ones((5, 2)), r"^`state` holds 5 states; the limit is 4 \(`max_batch`\)\.$"),
    ([1.0, float("nan")], r"^`state` holds nan at index \[1\]; expected finite numbers\.$"),
    ([[0.0, 1.0], [float("-inf"), 0.0]],
     r"^`state` holds -inf at index \[1, 0\]; expected finite numbers\.$"),
    ([True, False], r"^`state` has dtype bool; expected real numbers \(float or integer\)\.$"),
    (["a", "b"], r"`state` has dtype <U1; expected real numbers"),
    ([[1.0, 2.0], [3.0]], r"^`state` is not a numeric array: .*\.$"),
    # float32's largest finite value is (2 − 2⁻²³)·2¹²⁷ ≈ 3.4028235e38 (IEEE 754 binary32).
    ([0.0, 1e300], r"^`state` holds 1e\+300 at index \[1\]; too large for float32; expected "
                   r"magnitudes up to 3\.4028235e\+38\.$"),
])
def test_check_state_refuses_with_the_parameter_named(state, pattern):
    with pytest.raises(StateError, match=pattern):
        check_state(state, names=NAMES, dtype=np.dtype("float32"), max_batch=4)


def test_check_state_names_the_field_and_abbreviates_a_field_s_names():
    names = tuple(f"u{i}" for i in range(10_000))
    with pytest.raises(StateError, match=r"^`inputs\['state'\]` has shape \(1, 3\); this bundle's "
                                         r"state has 10000 components \['u0', 'u1', 'u2', '…', "
                                         r"'u9997', 'u9998', 'u9999'\], so expected \(10000,\) "
                                         r"or \(batch, 10000\)\.$"):
        check_state(np.ones((1, 3)), names=names, dtype=np.dtype("float64"), max_batch=4,
                    where="inputs['state']")


def test_check_times_and_check_time():
    assert check_times([0, 1.5], max_points=3).tolist() == [0.0, 1.5]
    with pytest.raises(TimeError, match=r"^`times` holds 4 times; the limit is 3 "
                                        r"\(`max_forecast_points`\)\.$"):
        check_times([0, 1, 2, 3], max_points=3)
    with pytest.raises(TimeError, match=r"^`times` contains -1\.0; expected finite times ≥ 0\.$"):
        check_times([1, -1], max_points=3)
    with pytest.raises(TimeError, match=r"^`ts` contains nan; expected finite times ≥ 0\.$"):
        check_times([1, float("nan")], max_points=3, where="ts")
    with pytest.raises(TimeError, match=r"^`times` has shape \(0,\); expected a non-empty 1-D "
                                        r"list of times\.$"):
        check_times([], max_points=3)
    with pytest.raises(TimeError, match=r"`times` has shape \(1, 1\)"):
        check_times([[1.0]], max_points=3)
    assert check_time(np.int64(3), unit="s") == 3.0
    for bad in (True, "1", None):
        with pytest.raises(TimeError, match=r"^`t` is .*; expected a finite time ≥ 0 \(in s\)\.$"):
            check_time(bad, unit="s")
    with pytest.raises(TimeError, match=r"^`t` is inf; expected a finite time ≥ 0 \(in s\)\.$"):
        check_time(float("inf"), unit="s")
    with pytest.raises(TimeError,
                       match=r"^`inputs\['t'\]` is -0\.5; expected a finite time ≥ 0\.$"):
        check_time(-0.5, unit="", where="inputs['t']")
    # 10**400 exceeds float64's largest value, about 1.8e308 (IEEE 754 binary64).
    with pytest.raises(TimeError, match=r"^`t` is an integer too large for a float; expected"):
        check_time(10**400, unit="s")


def test_check_off_grid_lists_the_choices():
    assert check_off_grid("nearest") == "nearest"
    # An option, not a time: OptionError (still a ValueError for callers catching that).
    with pytest.raises(OptionError, match=r"^`off_grid` is 'round'; expected one of "
                                          r"\['interpolate', 'nearest', 'error'\]\.$"):
        check_off_grid("round")
    for bad in (1, None, ["nearest"]):
        with pytest.raises(OptionError, match=r"^`parameters.off_grid` is .*; expected one of"):
            check_off_grid(bad, where="parameters.off_grid")
