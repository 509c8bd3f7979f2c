"""`runtime/plan.py`: the `Plan` record, its step count and its JSON form.

Expected values: the exact flow map of a linear system, expm(A t) (SciPy, `scipy.linalg.expm`),
for what a plan's steps amount to; RFC 8259 §6 (JSON has no NaN or Infinity) for `to_dict`.
"""

from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest
from scipy.linalg import expm

from stridecast.runtime import Finding, load
from stridecast.runtime.plan import METHODS, Plan
from tests.builders import linear_bundle, oscillator_matrix

BASE_STEP = 0.1
STRIDES = (1, 4, 16)


@pytest.fixture(scope="module")
def stepper(tmp_path_factory):
    path = linear_bundle(tmp_path_factory.mktemp("plan") / "osc.bundle", oscillator_matrix(),
                         base_step=BASE_STEP, strides=STRIDES)
    return load(path, dtype="float64")


@pytest.mark.parametrize("t", [0.1, 1.3, 2.0, 3.7])
def test_grid_plan_steps_compose_to_the_exact_flow_map(stepper, t):
    plan = stepper.plan(t)
    assert plan.method == "grid" and plan.remainder == 0.0
    assert plan.base_steps == sum(stride * count for stride, count in plan.steps)
    assert plan.network_steps == sum(count for _, count in plan.steps)
    assert [stride for stride, _ in plan.steps] == sorted(
        (stride for stride, _ in plan.steps), reverse=True)
    # Applying each step as the exact flow map over its stride reaches expm(A t) x0.
    x0 = np.array([1.0, -0.5])
    x = x0
    for stride, count in plan.steps:
        x = np.linalg.matrix_power(expm(oscillator_matrix() * stride * BASE_STEP), count) @ x
    np.testing.assert_allclose(x, expm(oscillator_matrix() * t) @ x0, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(stepper.advance(x0, t), x, rtol=1e-10, atol=1e-12)


def test_network_steps_counts_calls_not_strides():
    plan = Plan(t=3.7, base_steps=37, steps=((16, 2), (4, 1), (1, 1)), evaluations=4)
    assert plan.network_steps == 4


def test_to_dict_is_strict_json_with_every_field():
    finding = Finding(kind="beyond_horizon", message="t is past the horizon.", t=9.0,
                      amount=math.inf)
    plan = Plan(t=1.25, base_steps=12, steps=((4, 3),), evaluations=3, remainder=0.05,
                method="interpolate", anchors=(8, 12, 16, 20), expected_error=0.01,
                findings=(finding,))
    document = json.loads(json.dumps(plan.to_dict(), allow_nan=False))
    assert document == {
        "t": 1.25, "base_steps": 12, "steps": [[4, 3]], "evaluations": 3, "remainder": 0.05,
        "method": "interpolate", "integrator_evaluations": 0, "anchors": [8, 12, 16, 20],
        "expected_error": 0.01, "findings": [finding.to_dict()],
    }
    assert {field.name for field in dataclasses.fields(Plan)} == set(document)


@pytest.mark.parametrize("error", [math.nan, math.inf])
def test_to_dict_writes_a_missing_expected_error_as_null(error):
    # RFC 8259 §6: "Numeric values that cannot be represented ... (such as Infinity and NaN)
    # are not permitted."
    plan = Plan(t=1.0, base_steps=10, steps=((1, 10),), evaluations=10, expected_error=error)
    assert plan.to_dict()["expected_error"] is None
    json.dumps(plan.to_dict(), allow_nan=False)


def test_plans_are_frozen_and_methods_cover_what_the_stepper_reports(stepper):
    plan = stepper.plan(1.0)
    with pytest.raises(dataclasses.FrozenInstanceError):
        plan.t = 2.0  # type: ignore[misc]
    assert stepper.plan(1.05).method in METHODS
    assert stepper.plan(1.05, off_grid="nearest").method in METHODS
