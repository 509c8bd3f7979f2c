"""Stepper trust API: expected_error, with_levels, check, and the warnings of advance/forecast.

References: exact flow maps x(t) = expm(A t) x(0) (scipy.linalg.expm); nearest distances from
scipy.spatial.cKDTree; curve values from numpy.interp.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy.linalg import expm
from scipy.spatial import cKDTree

from stridecast import demo_bundle
from stridecast.runtime import (
    ExtrapolationError,
    ExtrapolationWarning,
    OptionError,
    TimeError,
    ValidationCurve,
    load,
)
from tests.builders import linear_bundle, older_crane_bundle, oscillator_matrix

OMEGA = 2.0  # x'' = −ω² x: period π, velocity amplitude ω for unit position amplitude
OSCILLATOR = oscillator_matrix(OMEGA)
BASE = math.pi / 8  # a quarter period is two base steps
CRANE = demo_bundle()
CURVE = ValidationCurve(metric="normalised_rms", tolerance=0.1, reference_std=(1.0, 2.0),
                        times=(0.5, 1.0, 1.5, 2.0), errors=(0.01, 0.03, 0.2, math.inf))
RING = np.stack([np.cos(np.linspace(0, 2 * np.pi, 720, endpoint=False)),
                 np.sin(np.linspace(0, 2 * np.pi, 720, endpoint=False))], axis=1)


def no_warnings():
    """Record every warning, so a test can assert there were none."""
    return warnings.catch_warnings(record=True)


@pytest.fixture(scope="module")
def oscillator(tmp_path_factory):
    """Box |x| ≤ 1.2, |v| ≤ 2.1: a swing of amplitude 1.1 (|v| up to 2.2) leaves it at odd
    quarter periods and comes back. Samples: the unit circle in normalised units (scales 1
    and 2), radius 0.3."""
    out = tmp_path_factory.mktemp("trust") / "osc.bundle"
    return linear_bundle(out, OSCILLATOR, base_step=BASE, strides=(1, 2, 4),
                         scale=[1.0, 2.0], envelope=([-1.2, -2.1], [1.2, 2.1]),
                         samples=RING, radius=0.3, validation=CURVE, validated_horizon=1.0)


def test_expected_error_interpolates_the_curve(oscillator, tmp_path):
    stepper = load(oscillator, dtype="float64")
    times = np.linspace(0.0, 1.5, 31)
    # Reference: numpy.interp on the curve with (0, 0) prepended.
    expected = np.interp(times, [0.0, 0.5, 1.0, 1.5], [0.0, 0.01, 0.03, 0.2])
    np.testing.assert_allclose(stepper.expected_error(times), expected, rtol=1e-15)
    assert stepper.expected_error(0.75) == pytest.approx(0.02, rel=1e-15)
    assert math.isinf(stepper.expected_error(1.75)) and math.isinf(stepper.expected_error(9.0))
    older = older_crane_bundle(tmp_path / "older.bundle")
    assert math.isnan(load(older).expected_error(1.0))  # no validation block
    with pytest.raises(TimeError, match=r"`t` is -1.0; expected a finite time ≥ 0 \(in s\)\."):
        stepper.expected_error(-1.0)


def test_plan_and_forecast_carry_expected_error(oscillator):
    stepper = load(oscillator, dtype="float64", on_extrapolation="ignore")
    plan = stepper.plan(2 * BASE)
    assert plan.expected_error == pytest.approx(np.interp(2 * BASE, [0, 0.5, 1.0, 1.5],
                                                          [0, 0.01, 0.03, 0.2]), rel=1e-15)
    assert math.isinf(stepper.plan(4 * BASE).expected_error)  # past 1.5, before a null
    times = [1.2, 0.3, 5.0]
    _, info = stepper.forecast_with_info([0.0, 0.0], times)
    np.testing.assert_allclose(info.expected_error[:2], np.interp(times[:2], [0, 0.5, 1.0, 1.5],
                                                                  [0, 0.01, 0.03, 0.2]))
    assert math.isinf(info.expected_error[2])
    document = stepper.advance_with_plan([1.0, 0.0], 5.0)[1].to_dict()
    assert document["expected_error"] is None  # inf is not JSON
    (finding,) = document["findings"]
    assert finding["kind"] == "beyond_horizon" and finding["t"] == 5.0
    assert finding["amount"] == 5.0 and finding["states"] == []


@pytest.fixture(scope="module")
def boxed(tmp_path_factory):
    """The same oscillator with the min/max box only (as older bundles have)."""
    out = tmp_path_factory.mktemp("trust") / "boxed.bundle"
    return linear_bundle(out, OSCILLATOR, base_step=BASE, strides=(1, 2, 4),
                         envelope=([-1.2, -2.1], [1.2, 2.1]), validated_horizon=1.0)


def test_path_leaving_the_box_mid_way_warns_with_time_and_amount(boxed):
    stepper = load(boxed, dtype="float64")
    start = np.array([1.1, 0.0])
    # 7 base steps = 4 + 2 + 1: visits at 4, 6 and 7 base steps. At 6 (3/4 of a period,
    # 2t = 3π/2) v = 2.2 > 2.1; at the end (7) the state is back inside the box.
    with pytest.warns(ExtrapolationWarning, match=r"The state leaves the training range") \
            as record:
        result, plan = stepper.advance_with_plan(start, 7 * BASE)
    assert plan.steps == ((4, 1), (2, 1), (1, 1))
    assert record[0].filename == __file__  # stacklevel points at the caller
    assert len(record) == 1  # box and horizon findings joined in one warning
    visited = {k: expm(OSCILLATOR * k * BASE) @ start for k in (0, 4, 6, 7)}  # reference: expm
    assert np.all(np.abs(visited[7]) <= [1.2, 2.1])
    np.testing.assert_allclose(result, visited[7], atol=1e-12)
    excess = max(max(abs(state[1]) - 2.1, 0.0) / 4.2 for state in visited.values())
    (finding,) = [f for f in plan.findings if f.kind == "outside_box"]
    assert finding.components == ("x1",) and finding.states == (0,)
    assert finding.amount == pytest.approx(excess, rel=1e-9)
    assert finding.t == pytest.approx(6 * BASE)
    assert f"first at t = {6 * BASE:.4g} s: x1 by up to {excess:.3g} range widths beyond " \
           "[-2.1, 2.1]" in finding.message


def test_state_far_from_data_inside_the_box(oscillator):
    stepper = load(oscillator, dtype="float64")
    start = np.array([0.0, 0.0])  # the fixed point: inside the box, 1.0 from the ring
    findings = stepper.check(start)
    (finding,) = findings
    # Reference: cKDTree nearest distance in normalised units, over the radius 0.3.
    expected = cKDTree(RING).query([0.0, 0.0])[0] / 0.3
    assert finding.kind == "far_from_data" and finding.t is None
    assert finding.amount == pytest.approx(expected, rel=1e-12)
    assert "is far from the training data: the nearest training state is 3.33× the radius" \
        in finding.message
    with pytest.warns(ExtrapolationWarning, match=r"far from the training data from the start"):
        stepper.advance(start, 2 * BASE)
    with pytest.warns(ExtrapolationWarning, match=r"1 of 2 states is far from the training") \
            as record:
        stepper.forecast(np.array([[0.0, 0.0], [1.0, 0.0]]), [BASE, 2 * BASE])
    assert record[0].filename == __file__  # through forecast → forecast_with_info


def test_time_beyond_horizon_warns_and_policies(oscillator):
    stepper = load(oscillator, dtype="float64")
    on_ring = np.array([1.0, 0.0])
    with no_warnings() as record:
        warnings.simplefilter("always")
        stepper.advance(on_ring, 1.0)  # at the horizon: fine
    assert record == []
    error = np.interp(3 * BASE, [1.0, 1.5], [0.03, 0.2])  # reference: numpy.interp
    message = (rf"^t = 1.178 s is beyond the validated horizon of 1 s \(1.18×\); expected "
               rf"error there up to {error:.3g} normalised RMS \(tolerance 0.1\)\.$")
    with pytest.warns(ExtrapolationWarning, match=message):
        stepper.advance(on_ring, 3 * BASE)
    with pytest.warns(ExtrapolationWarning, match=r"2 of 3 requested times \(from 1.178 s to "
                                                  r"6.283 s\) are beyond the validated horizon"):
        stepper.forecast(on_ring, [BASE, 3 * BASE, 16 * BASE])
    strict = load(oscillator, dtype="float64", on_extrapolation="error")
    with pytest.raises(ExtrapolationError, match=r"beyond the validated horizon.*'error'"):
        strict.advance(on_ring, 3 * BASE)
    strict.advance(on_ring, 2 * BASE)  # nothing to say: no error
    quiet = load(oscillator, dtype="float64", on_extrapolation="ignore")
    with no_warnings() as record:
        warnings.simplefilter("always")
        _, plan = quiet.advance_with_plan(np.zeros(2), 16 * BASE)
        _, info = quiet.forecast_with_info(np.zeros(2), [16 * BASE])
    assert record == []
    assert {f.kind for f in plan.findings} == {"far_from_data", "beyond_horizon"}
    assert {f.kind for f in info.findings} == {"far_from_data", "beyond_horizon"}
    with pytest.raises(ValueError, match=r"`on_extrapolation` is 'loud'; expected one of"):
        load(oscillator, on_extrapolation="loud")


def test_unstable_system_leaves_the_envelope_in_a_forecast(tmp_path):
    growth = np.array([[0.4, 0.0], [0.0, -0.2]])  # x grows like e^{0.4 t}
    bundle = linear_bundle(tmp_path / "unstable.bundle", growth, base_step=0.25,
                           strides=(1, 4), envelope=([-2.0, -2.0], [2.0, 2.0]),
                           samples=np.stack([np.linspace(-2, 2, 41), np.zeros(41)], axis=1),
                           radius=0.25, validated_horizon=100.0)
    stepper = load(bundle, dtype="float64")
    start = np.array([1.0, 0.5])
    times = [0.5, 1.0, 3.0]
    with pytest.warns(ExtrapolationWarning) as record:
        result, info = stepper.forecast_with_info(start, times)
    # Reference: scipy.linalg.expm.
    np.testing.assert_allclose(result, [expm(growth * t) @ start for t in times], rtol=1e-12)
    kinds = {f.kind: f for f in info.findings}
    # With samples the box is widened by the radius: |x| ≤ 2.25. x = e^{0.4 t} passes it at
    # t = ln 2.25 / 0.4 ≈ 2.03; the visited times are 0.25, 0.5, 1, 2, 3, so the first is 3.
    box = kinds["outside_box"]
    assert box.t == pytest.approx(3.0) and box.components == ("x0",)
    assert box.amount == pytest.approx((math.exp(1.2) - 2.25) / 4.5, rel=1e-9)
    assert "widened by the radius), first at t = 3 s: x0 by up to" in box.message
    # y = 0.5 e^{−0.2 t} is 0.5 from the samples' line at the start: far from the data.
    assert kinds["far_from_data"].t == 0.0
    assert len(record) == 1  # one warning per call, joining the findings


def test_with_levels_equals_a_bundle_built_with_those_levels(oscillator, tmp_path):
    full = load(oscillator, dtype="float64", on_extrapolation="ignore")
    subset = full.with_levels([4, 1])
    built = load(linear_bundle(tmp_path / "sub.bundle", OSCILLATOR, base_step=BASE,
                               strides=(1, 4), scale=[1.0, 2.0]), dtype="float64")
    assert subset.strides == (1, 4) == built.strides
    assert [lv.stride for lv in subset.manifest.levels] == [1, 4]
    start = np.array([[0.3, -0.2], [1.0, 0.5]])
    for t in (BASE, 3 * BASE, 7 * BASE, 2.0, 10.0):
        np.testing.assert_array_equal(subset.advance(start, t), built.advance(start, t))
        assert subset.plan(t).steps == built.plan(t).steps
    # Reference: scipy.linalg.expm.
    np.testing.assert_allclose(subset.advance(start[0], 7 * BASE),
                               expm(OSCILLATOR * 7 * BASE) @ start[0], atol=1e-12)
    assert subset._kernels[4] is full._kernels[4]  # shared, not reloaded
    assert subset.manifest.validation is None and subset.manifest.validated_horizon is None
    assert math.isnan(subset.expected_error(0.5))
    assert [f.kind for f in subset.check([1.0, 0.0], t=1.0)] == ["no_validation"]
    same = full.with_levels([1, 2, 4])
    assert same.manifest.validation == CURVE and same.expected_error(0.5) == 0.01
    # The runtime's one stride rule (validation.check_strides), raised as OptionError here.
    for bad, message in (([], r"`strides` is \[\]; expected a non-empty list of strides\."),
                         ([3], r"\[3\] are not strides of this bundle, \[1, 2, 4\]\."),
                         ([1, 1], r"`strides` repeats a stride: \[1, 1\]"),
                         (["1"], r"stride '1' is not an integer"),
                         ([True], r"stride True is not an integer")):
        with pytest.raises(OptionError, match=message):
            full.with_levels(bad)


def test_older_bundle_without_blocks_checks_box_only(tmp_path):
    stepper = load(older_crane_bundle(tmp_path / "older.bundle"), on_extrapolation="ignore")
    state = np.array([0.5, -24.0, 0.1, 0.0])
    assert stepper.check(state) == ()
    outside = stepper.check(np.array([100.0, -24.0, 0.1, 0.0]), t=200.0)
    assert [f.kind for f in outside] == ["outside_box", "beyond_horizon"]
    assert outside[0].components == ("x",)
    assert bool(stepper.outside_envelope(np.array([100.0, -24.0, 0.1, 0.0])))
