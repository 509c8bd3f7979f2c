"""What every handler shares (service/context.py): the served stepper's lookups and their
statuses, JSON-safe errors (JSON has no NaN or infinity: RFC 8259 section 6, so they become
null), warnings in the runtime's own words, and the state rules built from the settings."""

from __future__ import annotations

import json
import math
from types import SimpleNamespace

import numpy as np
import pytest

from stridecast.runtime import Finding
from stridecast.service.context import (
    batch_rows,
    gate_of,
    json_error,
    served_stepper,
    state_rules,
    trust_fields,
    warning_messages,
)
from stridecast.service.errors import ApiError
from stridecast.service.settings import Settings


def _request(**state) -> SimpleNamespace:
    return SimpleNamespace(app=SimpleNamespace(state=SimpleNamespace(**state)))


def _registry(loaded=True, entries=()):
    table = {entry.name: entry for entry in entries}
    return SimpleNamespace(loaded=loaded, get=table.get, served=list(entries))


def test_the_served_stepper_or_the_right_status():
    ok = SimpleNamespace(name="osc", ready=True, stepper="the stepper", error=None)
    bad = SimpleNamespace(name="broken", ready=False, stepper=None, error="bad checksum.")
    request = _request(registry=_registry(entries=[ok, bad]))
    assert served_stepper(request, "osc") == "the stepper"
    with pytest.raises(ApiError) as caught:
        served_stepper(request, "nope")
    assert caught.value.status == 404 and "['osc', 'broken']" in caught.value.message
    with pytest.raises(ApiError) as caught:
        served_stepper(request, "broken")
    assert (caught.value.status, caught.value.code) == (404, "model_unavailable")
    assert caught.value.message.endswith("failed to load: bad checksum.")
    with pytest.raises(ApiError) as caught:
        served_stepper(_request(registry=_registry(loaded=False)), "osc")
    assert caught.value.status == 503 and caught.value.headers == {"Retry-After": "1"}


def test_no_gate_before_the_lifespan_ran():
    with pytest.raises(ApiError, match="lifespan did not run") as caught:
        gate_of(_request())
    assert caught.value.status == 503
    assert gate_of(_request(gate="g")) == "g"


@pytest.mark.parametrize(("value", "expected"), [(0.25, 0.25), (np.float32(0.5), 0.5),
                                                 (math.nan, None), (math.inf, None),
                                                 (-math.inf, None)])
def test_json_errors_are_finite_numbers_or_null(value, expected):
    result = json_error(value)
    assert result == expected
    json.dumps(result, allow_nan=False)  # strict JSON accepts it


def test_batch_rows_counts_states():
    assert batch_rows(np.zeros(4)) == 1 and batch_rows(np.zeros((3, 4))) == 3


def test_trust_fields_carry_the_runtimes_findings_and_only_warning_kinds_warn():
    findings = [Finding(kind="outside_box", message="state 0 is outside the box.", states=(0,),
                        components=("x",), amount=1.5),
                Finding(kind="no_validation", message="the bundle records no validation.")]
    assert warning_messages(findings) == ["state 0 is outside the box."]
    fields = trust_fields(findings, np.array([0.1, math.nan, math.inf]))
    assert fields["expected_error"] == [0.1, None, None]
    assert fields["findings"] == [finding.to_dict() for finding in findings]
    assert fields["warnings"] == ["state 0 is outside the box."]
    assert trust_fields([], 0.2)["expected_error"] == 0.2  # one time: one number
    json.dumps(fields, allow_nan=False)


def test_state_rules_follow_the_stepper_and_the_settings():
    stepper = SimpleNamespace(state_names=("x", "v"), dtype="float64", strides=(1, 4),
                              base_step=0.5, manifest=SimpleNamespace(time_unit="s"),
                              limits=SimpleNamespace(max_steps_per_query=400))
    rules = state_rules(stepper, Settings(max_batch=7, max_abs_value=None))
    assert (rules.names, rules.dim, rules.max_batch, rules.time_unit) == (("x", "v"), 2, 7, "s")
    assert rules.dtype == np.float64 and rules.max_value == math.inf
    assert state_rules(stepper, Settings(max_abs_value=5.0)).max_value == 5.0
    assert math.isfinite(rules.max_time) and rules.max_time > 0
