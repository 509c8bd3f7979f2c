"""`export/arguments.py`: every check of what `export_bundle` is given, in one place.

Sources: IEEE 754 binary32 keeps any decimal of at most 6 significant digits through a round
trip (FLT_DIG = 6, C11 §5.2.4.2.2; `numpy.finfo(np.float32).precision` is the same figure)
and binary16 any of 3; the shortest decimal that rounds back to a float is what NumPy prints
(Steele & White, "How to print floating-point numbers accurately", PLDI 1990). The bundle
format (docs/bundle-format.md): `update` is "increment" or "replace", `scale` > 0, envelope
min ≤ max per component.
"""

from __future__ import annotations

import random

import numpy as np
import pytest

from stridecast.export.arguments import (
    BASE_STEP_RELATIVE_TOLERANCE,
    build_spec,
    check_base_step,
    check_envelope,
    check_envelope_samples,
    check_exporter,
    check_radius,
    check_scale,
    check_strings,
    check_update,
    declared_state_dim,
    finite_vector,
    intended_value,
    level_pairs,
    same_base_step,
)
from stridecast.runtime import BundleError


def _decimals(significant: int, exponents: tuple[int, int], count: int) -> list[float]:
    rng = random.Random(significant)
    return [float(f"{rng.randint(10**(significant - 1), 10**significant - 1)}e"
                  f"{rng.randint(*exponents)}") for _ in range(count)]


# Exponents keep the decimals inside each type's normal range (float16: 6.1e-5 to 65504).
@pytest.mark.parametrize(("dtype", "digits", "exponents"), [
    (np.float32, 6, (-12, 6)), (np.float16, 3, (-4, 1))])
def test_a_narrow_float_becomes_the_decimal_it_was_written_as(dtype, digits, exponents):
    assert np.finfo(dtype).precision == digits
    for decimal in _decimals(digits, exponents, 300):
        assert intended_value(dtype(decimal)) == decimal


def test_wide_floats_and_integers_are_kept_as_they_are():
    assert intended_value(np.float64(0.1) + np.float64(0.2)) == 0.30000000000000004
    assert intended_value(0.1 + 0.2) == 0.30000000000000004
    assert intended_value(np.int64(3)) == 3.0
    assert float(np.float32(0.01)) != 0.01 and intended_value(np.float32(0.01)) == 0.01


@pytest.mark.parametrize(("value", "expected"), [
    (0.01, 0.01), (2, 2.0), (np.float32(0.05), 0.05), (np.array([np.float32(0.1)]), 0.1),
    (np.array(0.25), 0.25), (np.int32(3), 3.0),
])
def test_check_base_step_accepts_positive_numbers(value, expected):
    assert check_base_step(value) == expected


@pytest.mark.parametrize("value", [0, -0.1, float("nan"), float("inf"), True, "0.1", None,
                                   np.array([0.1, 0.2])])
def test_check_base_step_refuses_the_rest(value):
    with pytest.raises(BundleError, match=r"`base_step` is .*; expected a finite number > 0"):
        check_base_step(value)


def test_same_base_step_within_the_relative_tolerance():
    assert same_base_step(0.01, float(np.float32(0.01)))  # float32 rounding: 2^-24 relative
    assert same_base_step(1000.0, 1000.0 * (1 + BASE_STEP_RELATIVE_TOLERANCE / 2))
    assert not same_base_step(0.01, 0.01 * (1 + 2 * BASE_STEP_RELATIVE_TOLERANCE))
    assert not same_base_step(0.01, 0.02)


def test_level_pairs_sorted_by_stride_from_a_mapping_or_pairs():
    assert level_pairs({16: "c", 1: "a", 4: "b"}) == [(1, "a"), (4, "b"), (16, "c")]
    assert level_pairs([(4, "b"), [1, "a"]]) == [(1, "a"), (4, "b")]


@pytest.mark.parametrize(("levels", "pattern"), [
    ({}, "`levels` is empty"),
    ([(1, "a"), (1, "b")], "repeats stride 1"),
    ([(1, "a", "extra")], "must map strides to modules"),
    (["a"], "must map strides to modules"),
])
def test_level_pairs_refuses_bad_levels(levels, pattern):
    with pytest.raises(BundleError, match=pattern):
        level_pairs(levels)


@pytest.mark.parametrize("stride", [0, -4, 1.5, "4", True])
def test_level_pairs_refuses_strides_that_are_not_positive_integers(stride):
    with pytest.raises(ValueError):
        level_pairs({stride: "module"})


def test_finite_vector():
    assert finite_vector([1, 2.5], "mean", 2) == (1.0, 2.5)
    assert finite_vector(np.array([3.0]), "mean") == (3.0,)
    with pytest.raises(BundleError, match="`mean` has 3 entries; the state has 2"):
        finite_vector([1, 2, 3], "mean", 2)
    with pytest.raises(BundleError, match="`mean` must be finite; entry 1 is nan"):
        finite_vector([1, float("nan")], "mean")
    with pytest.raises(BundleError, match=r"`mean` has shape \(0,\)"):
        finite_vector([], "mean")
    with pytest.raises(BundleError, match=r"`mean` has shape \(1, 2\)"):
        finite_vector([[1, 2]], "mean")
    with pytest.raises(BundleError, match="expected a list of numbers"):
        finite_vector(["a"], "mean")


def test_scale_must_be_positive_in_every_component():
    assert check_scale([0.5, 2], 2) == (0.5, 2.0)
    with pytest.raises(BundleError, match="`scale` must be > 0 in every component; entry 1"):
        check_scale([1.0, 0.0], 2)


def test_strings():
    assert check_strings(["x", "v"], "state_names", 2, distinct=True) == ("x", "v")
    assert check_strings(["m", "m"], "units", 2, distinct=False) == ("m", "m")
    for bad in ("xv", ["x"], ["x", 1]):
        with pytest.raises(BundleError, match="expected a list of 2 strings"):
            check_strings(bad, "state_names", 2, distinct=True)
    with pytest.raises(BundleError, match="`state_names` must be distinct"):
        check_strings(["x", "x"], "state_names", 2, distinct=True)


def test_envelope_as_a_pair_or_a_mapping():
    expected = ((-1.0, 0.0), (1.0, 2.0))
    assert check_envelope(([-1, 0], [1, 2]), 2) == expected
    assert check_envelope({"min": [-1, 0], "max": [1, 2]}, 2) == expected
    assert check_envelope(([1, 1], [1, 1]), 2) == ((1.0, 1.0), (1.0, 1.0))  # min = max is fine
    with pytest.raises(BundleError, match=r"min exceeds max in component 1 \(3\.0 > 2\.0\)"):
        check_envelope(([-1, 3], [1, 2]), 2)
    with pytest.raises(BundleError, match=r"has keys \['low', 'max'\]"):
        check_envelope({"low": [0, 0], "max": [1, 1]}, 2)
    with pytest.raises(BundleError, match="expected \\(min, max\\)"):
        check_envelope([[0, 0]], 2)


def test_update_and_exporter_choices():
    assert check_update("increment") == "increment" and check_update("replace") == "replace"
    with pytest.raises(BundleError, match="`update` is 'residual'"):
        check_update("residual")
    assert [check_exporter(name) for name in ("auto", "dynamo", "legacy")] == \
        ["auto", "dynamo", "legacy"]
    with pytest.raises(BundleError, match="`exporter` is 'jit'"):
        check_exporter("jit")


@pytest.mark.parametrize(("arguments", "dim"), [
    ({}, None),
    ({"mean": [0, 0, 0]}, 3),
    ({"scale": [1, 1], "state_names": ["a", "b", "c"]}, 2),  # the first given decides
    ({"state_names": ["a", "b", "c"]}, 3),
    ({"units": ["m"]}, 1),
    ({"envelope": {"min": [0] * 4, "max": [1] * 4}}, 4),
    ({"envelope": ([0] * 5, [1] * 5)}, 5),
])
def test_declared_state_dim(arguments, dim):
    given = {"mean": None, "scale": None, "state_names": None, "units": None, "envelope": None}
    assert declared_state_dim(**{**given, **arguments}) == dim


def _spec(**overrides):
    arguments = dict(strides=(1, 4), state_dim=2, base_step=np.float32(0.01), mean=None,
                     scale=None, update="increment", state_names=None, units=None,
                     time_unit="s", name="osc", description="", envelope=None,
                     validated_horizon=None)
    return build_spec(**{**arguments, **overrides})


def test_build_spec_defaults():
    spec = _spec()
    assert spec.mean == (0.0, 0.0) and spec.scale == (1.0, 1.0)
    assert spec.state_names == ("x0", "x1") and spec.state_units == ("", "")
    assert spec.base_step == 0.01 and spec.strides == (1, 4)
    assert spec.envelope_min is None and spec.validated_horizon is None


@pytest.mark.parametrize(("overrides", "pattern"), [
    ({"mean": [0, 0, 0]}, "`mean` has 3 entries"),
    ({"time_unit": 1}, "`time_unit` is 1; expected a string"),
    ({"name": None}, "`name` is None"),
    ({"validated_horizon": -1.0}, "`validated_horizon` is -1.0"),
    ({"validated_horizon": float("inf")}, "`validated_horizon` must be finite"),
    ({"update": "both"}, "`update` is 'both'"),
])
def test_build_spec_refuses(overrides, pattern):
    with pytest.raises(BundleError, match=pattern):
        _spec(**overrides)


def test_envelope_samples_and_radius():
    samples = check_envelope_samples([[0, 1], [2, 3]], 2)
    assert samples.dtype == np.float64 and samples.shape == (2, 2)
    for bad in ([[0, 1, 2]], np.zeros((0, 2)), [0, 1]):
        with pytest.raises(BundleError, match="expected \\(M, 2\\) with M ≥ 1"):
            check_envelope_samples(bad, 2)
    with pytest.raises(BundleError, match="NaN or infinity"):
        check_envelope_samples([[0, np.inf]], 2)
    assert check_radius(0.5) == 0.5 and check_radius(2) == 2.0
    for bad in (0, -1.0, float("nan"), float("inf"), True, "1"):
        with pytest.raises(BundleError, match="`envelope_radius` is"):
            check_radius(bad)
