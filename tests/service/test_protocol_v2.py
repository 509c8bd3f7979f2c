"""`service/protocol_v2.py`: inference-protocol queries, metadata and the one answer document.

Sources: the Open Inference Protocol (kserve/open-inference-protocol,
specification/protocol/inference_rest.md): "Server Metadata" ($metadata_server_response:
name, version, extensions), "Model Metadata" ($metadata_model_response: name, versions,
platform, inputs/outputs as $metadata_tensor with name, datatype, shape; -1 for a
variable-size dimension), "Inference" ($inference_request: id, parameters, inputs, outputs;
$inference_response: model_name, model_version, id, parameters, outputs as $response_output
with name, shape, datatype, data), "Tensor Data Types" (FP32, FP64, INT32, INT64). Binary
outputs: the binary tensor data extension's `binary_data` output parameter and
`binary_data_output` request parameter (Triton, protocol/extension_binary_data.md). Expected
states: the exact flow map expm(A t) (SciPy) of the served oscillator.
"""

from __future__ import annotations

import math
import re

import numpy as np
import pytest

from stridecast import __version__
from stridecast.runtime import Finding
from stridecast.service import Settings
from stridecast.service.context import state_rules
from stridecast.service.errors import ApiError
from stridecast.service.protocol_v2 import (
    InferOutcome,
    RequestOptions,
    Tensor,
    build_query,
    check_model_fields,
    check_version,
    infer_document,
    model_metadata,
    run_infer,
    server_metadata_document,
)
from tests.systems import exact_oscillator_state

STATE = np.array([[1.0, 0.0], [0.5, -0.25], [0.0, 1.0]])
NO_OPTIONS = RequestOptions(request_id=None, parameters={}, outputs=None)


def _tensors(state=STATE, times=(0.8,), *, state_type="FP64", time_type="FP64"):
    state = np.asarray(state)
    return [Tensor("state", state_type, state.shape, state.reshape(-1), "inputs[0]"),
            Tensor("t", time_type, (len(times),), np.asarray(times, float), "inputs[1]")]


@pytest.fixture
def rules(stepper64):
    return state_rules(stepper64, Settings())


def _refused(call, status=422) -> str:
    with pytest.raises(ApiError) as caught:
        call()
    assert caught.value.status == status
    assert caught.value.message.endswith(".")
    return caught.value.message


def test_server_metadata_has_the_protocol_s_fields():
    assert server_metadata_document() == {"name": "stridecast", "version": __version__,
                                          "extensions": ["binary_tensor_data"]}


@pytest.mark.parametrize(("fixture", "datatype"), [("stepper", "FP32"), ("stepper64", "FP64")])
def test_model_metadata_describes_state_and_time(request, fixture, datatype):
    stepper = request.getfixturevalue(fixture)
    document = model_metadata("oscillator", stepper)
    assert set(document) == {"name", "versions", "platform", "inputs", "outputs"}
    assert document["name"] == "oscillator" and document["versions"] == ["1"]
    assert document["inputs"] == [
        {"name": "state", "datatype": datatype, "shape": [-1, stepper.state_dim]},
        {"name": "t", "datatype": "FP64", "shape": [-1]}]
    assert document["outputs"] == [
        {"name": "state", "datatype": datatype, "shape": [-1, stepper.state_dim]}]


def test_the_only_version_is_1():
    for version in (None, "", "1"):
        check_version("oscillator", version)
    assert "no version '2'" in _refused(lambda: check_version("oscillator", "2"), 404)


def test_body_model_fields_must_match_the_path():
    check_model_fields("osc", None, "osc", "1")
    check_model_fields("osc", "1", None, "")
    assert "`model_name` is 'other'" in _refused(
        lambda: check_model_fields("osc", None, "other", None))
    assert "expected a string" in _refused(lambda: check_model_fields("osc", None, None, 1))
    assert "no version '3'" in _refused(lambda: check_model_fields("osc", None, None, "3"), 404)


def test_build_query_shapes_the_tensors(rules):
    query = build_query(_tensors(), RequestOptions("r-1", {}, None), rules)
    np.testing.assert_array_equal(query.state, STATE)
    np.testing.assert_array_equal(query.times, [0.8])
    assert query.times.dtype == np.float64
    assert query.request_id == "r-1" and query.off_grid == "interpolate"
    assert query.binary_output is False
    # One time per state, in any of the protocol's numeric time types.
    query = build_query(_tensors(times=(1, 2, 3), time_type="INT64"), NO_OPTIONS, rules)
    np.testing.assert_array_equal(query.times, [1.0, 2.0, 3.0])
    # Nested data of the declared shape is accepted as well as flat data.
    nested = [Tensor("t", "FP64", (1,), np.array([0.8]), "inputs[0]"),
              Tensor("state", "FP64", (3, 2), STATE, "inputs[1]")]
    np.testing.assert_array_equal(build_query(nested, NO_OPTIONS, rules).state, STATE)


@pytest.mark.parametrize(("tensors", "pattern"), [
    (_tensors()[:1], r"lacks \['t'\]"),
    (_tensors() + _tensors()[1:], "names 't' twice"),
    (_tensors(state_type="INT8"), "`inputs\\[0\\].datatype` of input 'state' is 'INT8'"),
    (_tensors(time_type="BOOL"), "`inputs\\[1\\].datatype` of input 't' is 'BOOL'"),
    ([Tensor("x", "FP64", (1,), np.ones(1), "inputs[0]")], "`inputs\\[0\\].name` is 'x'"),
    ([Tensor("state", "FP64", (2, 2), np.ones(3), "inputs[0]")], "holds 3 values; shape"),
    ([Tensor("state", "FP64", (1, 1, 2), np.ones(2), "inputs[0]")], "expected 1 or 2"),
    ([_tensors()[0], Tensor("t", "FP64", (1,), np.array([np.nan]), "inputs[1]")],
     r"`inputs\['t'\]` is nan; expected a finite time"),
    (_tensors(state=STATE[0]), r"expected \[B, 2\]"),
    (_tensors(times=(1.0, 2.0)), r"input 't' has shape \[2\]; expected \[1\] or \[3\]"),
])
def test_build_query_refuses_malformed_tensors(rules, tensors, pattern):
    assert re.search(pattern, _refused(lambda: build_query(tensors, NO_OPTIONS, rules)))


@pytest.mark.parametrize(("parameters", "outputs", "binary"), [
    ({"binary_data_output": True}, None, True),
    ({"binary_data_output": True}, [("state", {})], True),
    ({"binary_data_output": True}, [("state", {"binary_data": False})], False),
    ({}, [("state", {"binary_data": True})], True),
    ({"unknown": "ignored"}, None, False),
])
def test_binary_output_follows_the_extension_s_parameters(rules, parameters, outputs, binary):
    query = build_query(_tensors(), RequestOptions(None, parameters, outputs), rules)
    assert query.binary_output is binary


@pytest.mark.parametrize(("options", "pattern"), [
    (RequestOptions(7, {}, None), "`id` is 7; expected a string"),
    (RequestOptions(None, {"binary_data_output": "yes"}, None), "binary_data_output` is 'yes'"),
    (RequestOptions(None, {}, [("other", {})]), "`outputs\\[0\\].name` is 'other'"),
    (RequestOptions(None, {}, [("state", {"binary_data": 1})]), "binary_data` is 1"),
    (RequestOptions(None, {}, [("state", {"classification": 2})]), "classification extension"),
])
def test_build_query_refuses_bad_options(rules, options, pattern):
    assert re.search(pattern, _refused(lambda: build_query(_tensors(), options, rules)))


def test_run_infer_one_time_is_the_exact_flow_map(stepper64, rules):
    query = build_query(_tensors(times=(0.8,)), NO_OPTIONS, rules)
    outcome = run_infer(stepper64, query)
    # Expected: expm(A t) applied to every row (SciPy); t = 0.8 is on the grid (16 base steps).
    # The levels store float32 weights: a few steps of rounding at 2^-24 relative each.
    np.testing.assert_allclose(outcome.result, exact_oscillator_state(STATE, 0.8),
                               rtol=1e-6, atol=1e-6)
    plan = stepper64.plan(0.8)
    assert outcome.evaluations == plan.evaluations and outcome.methods == (plan.method,)


def test_run_infer_one_time_per_state(stepper64, rules):
    times = (0.8, 0.2, 0.8)
    query = build_query(_tensors(times=times), NO_OPTIONS, rules)
    outcome = run_infer(stepper64, query)
    for row, t in enumerate(times):
        np.testing.assert_allclose(outcome.result[row], exact_oscillator_state(STATE[row], t),
                                   rtol=1e-6, atol=1e-6)
    # States sharing a time are advanced together: one plan per distinct time.
    assert outcome.evaluations == stepper64.plan(0.8).evaluations + \
        stepper64.plan(0.2).evaluations
    assert outcome.methods == ("grid",)
    # The worst expected error over the requested times (nan: this bundle records no curve).
    np.testing.assert_equal(outcome.expected_error,
                            float(np.max(stepper64.expected_error(np.array([0.2, 0.8])))))


def test_infer_document_is_the_protocol_s_response(rules):
    result = np.arange(6, dtype=np.float32).reshape(3, 2)
    query = build_query(_tensors(), RequestOptions("abc", {}, None),
                        rules)
    outcome = InferOutcome(result, evaluations=4, methods=("grid", "interpolate"),
                           findings=(), expected_error=math.nan)
    document = infer_document("osc", query, outcome)
    assert document["model_name"] == "osc" and document["model_version"] == "1"
    assert document["id"] == "abc"
    assert document["parameters"] == {"evaluations": 4, "method": "grid,interpolate",
                                      "extrapolation": False}
    [output] = document["outputs"]
    assert output["name"] == "state" and output["shape"] == [3, 2]
    assert output["datatype"] == "FP32"
    np.testing.assert_array_equal(output["data"], result.reshape(-1))
    assert "id" not in infer_document("osc", build_query(_tensors(), NO_OPTIONS,
                                                         rules), outcome)


def test_infer_document_reports_warnings_but_not_a_missing_validation(rules):
    query = build_query(_tensors(), NO_OPTIONS, rules)
    findings = (Finding(kind="no_validation", message="No horizon."),
                Finding(kind="outside_box", message="Row 0 left the box.", states=(0,)),
                Finding(kind="beyond_horizon", message="t is past the horizon.", t=9.0))
    outcome = InferOutcome(STATE, 1, ("grid",), findings, expected_error=0.125)
    parameters = infer_document("osc", query, outcome)["parameters"]
    assert parameters["extrapolation"] is True
    assert parameters["warnings"] == "Row 0 left the box. t is past the horizon."
    assert parameters["expected_error"] == 0.125
    assert infer_document("osc", query, InferOutcome(STATE, 1, ("grid",), findings[:1], 0.1)
                          )["parameters"]["extrapolation"] is False
