"""One served model's request schemas (service/model_schemas.py), checked by an independent
JSON Schema validator: the `jsonschema` package, Draft 2020-12 (the dialect of OpenAPI 3.1).
Instances are generated around each bound: exactly d components, 1..max_batch rows, times in
[0, max_time], the grid of `off_grid="error"`, and data lengths equal to the product of shape.
"""

from __future__ import annotations

import itertools
from types import SimpleNamespace

import numpy as np
import pytest
from jsonschema import Draft202012Validator

from stridecast.service.model_schemas import (
    ENUMERATED_BATCH,
    grid_step,
    infer_request,
    v1_requests,
    value_schema,
)
from stridecast.service.validation import StateRules

STEPPER = SimpleNamespace(base_step=0.25, strides=(2, 6))  # grid: 0.25 × gcd(2, 6) = 0.5
RULES = StateRules(names=("a", "b", "c"), dtype=np.dtype("float32"), max_batch=3,
                   max_time=10.0)


def _validator(schema) -> Draft202012Validator:
    Draft202012Validator.check_schema(schema)  # the schema itself is valid 2020-12
    return Draft202012Validator(schema)


@pytest.fixture(scope="module")
def v1():
    schemas = v1_requests(STEPPER, RULES, max_points=4, max_values=100)
    return {name: _validator(schema) for name, schema in schemas.items()}


def test_the_grid_step_is_the_base_step_times_the_gcd_of_the_strides():
    assert grid_step(STEPPER) == 0.5
    assert grid_step(SimpleNamespace(base_step=0.1, strides=(3, 5))) == pytest.approx(0.1)


@pytest.mark.parametrize("length", range(0, 7))
def test_a_state_is_accepted_exactly_at_the_model_dimension(v1, length):
    state = [0.5] * length
    advance = v1["AdvanceRequest"]
    assert advance.is_valid({"state": state, "t": 1.0}) == (length == 3)
    assert advance.is_valid({"state": [state], "t": 1.0}) == (length == 3)
    assert v1["ForecastRequest"].is_valid({"state": state, "times": [1.0]}) == (length == 3)


@pytest.mark.parametrize("rows", range(0, 6))
def test_a_batch_holds_one_to_max_batch_rows_of_equal_length(v1, rows):
    assert v1["AdvanceRequest"].is_valid({"state": [[1, 2, 3]] * rows, "t": 0}) == (
        1 <= rows <= RULES.max_batch)


def test_ragged_rows_extra_fields_and_bad_types_are_refused(v1):
    advance = v1["AdvanceRequest"]
    for body in ({"state": [[1, 2, 3], [1, 2]], "t": 1}, {"state": [1, 2, 3], "t": 1, "x": 0},
                 {"state": [1, 2, "3"], "t": 1}, {"state": [1, 2, 3]}, {"t": 1},
                 {"state": [1, 2, 3], "t": 1, "off_grid": "sideways"}):
        assert not advance.is_valid(body), body


@pytest.mark.parametrize(("t", "valid"), [(0, True), (10.0, True), (10.000001, False),
                                          (-1e-9, False), (3.3, True)])
def test_times_lie_in_zero_to_max_time(v1, t, valid):
    assert v1["AdvanceRequest"].is_valid({"state": [0, 0, 0], "t": t}) == valid
    assert v1["ForecastRequest"].is_valid({"state": [0, 0, 0], "times": [1.0, t]}) == valid


@pytest.mark.parametrize(("t", "on_grid"), [(0.5, True), (3.0, True), (0.25, False),
                                            (1.3, False)])
def test_off_grid_error_admits_only_grid_times(v1, t, on_grid):
    advance, forecast = v1["AdvanceRequest"], v1["ForecastRequest"]
    assert advance.is_valid({"state": [0, 0, 0], "t": t, "off_grid": "error"}) == on_grid
    assert advance.is_valid({"state": [0, 0, 0], "t": t, "off_grid": "nearest"})
    assert forecast.is_valid({"state": [0, 0, 0], "times": [0.5, t],
                              "off_grid": "error"}) == on_grid


def test_forecast_times_count_from_one_to_max_points(v1):
    forecast = v1["ForecastRequest"]
    for count in range(0, 7):
        assert forecast.is_valid({"state": [0, 0, 0], "times": [1.0] * count}) == (
            1 <= count <= 4)


def test_value_bounds_follow_the_float32_range_and_max_value():
    # float32's largest finite value 3.4028235e38 (IEEE 754 binary32); beyond max + half an
    # ulp, NumPy's cast gives inf.
    largest = float(np.finfo(np.float32).max)
    component = _validator(value_schema(RULES))
    assert component.is_valid(largest) and component.is_valid(-largest)
    assert not component.is_valid(3.5e38) and not component.is_valid(-3.5e38)
    for value in (largest, 3.5e38):
        with np.errstate(over="ignore"):
            assert component.is_valid(value) == bool(np.isfinite(np.float32(value)))
    bounded = _validator(value_schema(StateRules(names=("a",), dtype=np.dtype("float64"),
                                                 max_batch=1, max_value=100.0)))
    assert bounded.is_valid(100.0) and not bounded.is_valid(100.5)


def _tensor(name, shape, data, datatype):
    return {"name": name, "shape": shape, "datatype": datatype, "data": data}


@pytest.fixture(scope="module")
def infer():
    return _validator(infer_request("osc", STEPPER, RULES))


def test_inference_data_lengths_equal_the_product_of_the_shape(infer):
    for batch, times, length in itertools.product(range(1, 5), (1, 2, 3), range(1, 14)):
        state = _tensor("state", [batch, 3], [0.5] * length, "FP32")
        t = _tensor("t", [times], [1.0] * times, "FP64")
        expected = (batch <= RULES.max_batch and length == batch * 3
                    and (times == 1 or times == batch))
        assert infer.is_valid({"inputs": [state, t]}) == expected, (batch, times, length)
        assert infer.is_valid({"inputs": [t, state]}) == expected  # either order


def test_inference_names_types_versions_and_the_grid(infer):
    state = _tensor("state", [1, 3], [0, 0, 0], "FP64")
    t = _tensor("t", [1], [1.3], "FP32")
    assert infer.is_valid({"inputs": [state, t], "model_name": "osc", "model_version": "1",
                           "id": "r1", "outputs": [{"name": "state"}]})
    for change in ({"model_name": "other"}, {"model_version": "2"}, {"extra": 1},
                   {"inputs": [state]}, {"inputs": [state, {**t, "datatype": "FP16"}]},
                   {"inputs": [{**state, "datatype": "INT32"}, t]},
                   {"outputs": [{"name": "t"}]}):
        assert not infer.is_valid({"inputs": [state, t], **change}), change
    strict = {"parameters": {"off_grid": "error"}}
    assert not infer.is_valid({"inputs": [state, t], **strict})  # 1.3 is off the 0.5 grid
    assert infer.is_valid({"inputs": [state, {**t, "data": [2.0]}], **strict})


def test_above_the_enumerated_batch_lengths_are_bounded_but_not_tied():
    rules = StateRules(names=("a", "b"), dtype=np.dtype("float64"),
                       max_batch=ENUMERATED_BATCH + 1)
    validator = _validator(infer_request("osc", STEPPER, rules))
    t = _tensor("t", [1], [1.0], "FP64")
    assert validator.is_valid({"inputs": [_tensor("state", [2, 2], [0.0] * 4, "FP64"), t]})
    too_long = [0.0] * (2 * rules.max_batch + 1)
    assert not validator.is_valid({"inputs": [_tensor("state", [2, 2], too_long, "FP64"), t]})
