"""The documenting pydantic models (service/schemas.py): pydantic's own validation, the JSON
Schema pydantic derives from them (checked with `jsonschema`, Draft 2020-12), and agreement
with what the runtime produces (`Finding.to_dict`, `Plan.to_dict`, `OFF_GRID_POLICIES`)."""

from __future__ import annotations

import typing

import pytest
from jsonschema import Draft202012Validator
from pydantic import ValidationError

from stridecast.runtime.findings import KINDS
from stridecast.runtime.validation import OFF_GRID_POLICIES
from stridecast.service import schemas

GOOD = {
    schemas.AdvanceRequest: [{"state": [1.0], "t": 0}, {"state": [[1, 2], [3, 4]], "t": 2.5,
                                                        "off_grid": "nearest"}],
    schemas.ForecastRequest: [{"state": [0.5, 1], "times": [0, 3, 1]}],
    schemas.InferRequest: [{"inputs": [
        {"name": "state", "shape": [1, 2], "datatype": "FP32", "data": [1, 2]},
        {"name": "t", "shape": [1], "datatype": "FP64", "data": [0.5]}]}],
}
BAD = {
    schemas.AdvanceRequest: [{"state": [], "t": 1}, {"state": [[]], "t": 1},
                             {"state": [1], "t": -0.5}, {"state": [1]},
                             {"state": [1], "t": 1, "extra": True},
                             {"state": [1], "t": 1, "off_grid": "sideways"}],
    schemas.ForecastRequest: [{"state": [1], "times": []}, {"state": [1], "times": [-1]}],
    schemas.InferRequest: [
        {"inputs": []},
        {"inputs": [{"name": "state", "shape": [1, 2], "datatype": "FP32", "data": [1, 2]}]},
        {"inputs": [{"name": "x", "shape": [1], "datatype": "FP32", "data": [1]}] * 2},
        {"inputs": [{"name": "t", "shape": [1, 1, 1], "datatype": "FP32", "data": [1]}] * 2}],
}


@pytest.mark.parametrize(("model", "body"),
                         [(model, body) for model, bodies in GOOD.items() for body in bodies])
def test_good_bodies_pass_pydantic_and_its_json_schema(model, body):
    model.model_validate(body)
    schema = model.model_json_schema()
    Draft202012Validator.check_schema(schema)
    assert Draft202012Validator(schema).is_valid(body)


@pytest.mark.parametrize(("model", "body"),
                         [(model, body) for model, bodies in BAD.items() for body in bodies])
def test_bad_bodies_fail_pydantic_and_its_json_schema(model, body):
    with pytest.raises(ValidationError):
        model.model_validate(body)
    assert not Draft202012Validator(model.model_json_schema()).is_valid(body)


def test_off_grid_choices_are_the_runtimes():
    assert typing.get_args(schemas.OffGrid) == tuple(OFF_GRID_POLICIES)
    assert schemas.AdvanceRequest.model_validate({"state": [1], "t": 1}).off_grid == (
        "interpolate")


def test_every_runtime_finding_kind_is_documented():
    documented = typing.get_args(schemas.FindingBody.model_fields["kind"].annotation)
    missing = sorted(set(KINDS) - set(documented))
    assert missing == [], f"FindingBody.kind lacks {missing}"


def test_request_models_are_the_strict_request_bodies():
    expected = (schemas.AdvanceRequest, schemas.ForecastRequest, schemas.InferRequest)
    assert expected == schemas.REQUEST_MODELS
    for model in schemas.REQUEST_MODELS:
        assert model.model_json_schema()["additionalProperties"] is False
