"""Property-based API testing with schemathesis against the app's own OpenAPI schema.

Every operation, request bodies included (documented with `openapi_extra`), is exercised with
generated data (valid and invalid) in JSON and MessagePack: no response may be a 5xx, and every
response must match the documented status codes, content types and schemas.
"""

from __future__ import annotations

import numpy as np
import pytest
import schemathesis
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, Phase, given, settings
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from stridecast.service import Settings, create_app
from tests.http_cases import documented_operations, register_msgpack_serializer

CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance,
          response_schema_conformance]
OPERATIONS = documented_operations()
EXAMPLES = 25


register_msgpack_serializer()


@pytest.fixture(scope="module")
def api_schema(models_dir):
    # Small limits, so generated data also reaches the 413 and 422 answers.
    limits = Settings(max_body_bytes=16 * 1024, max_batch=16, max_forecast_points=50,
                      request_timeout=5.0)
    return schemathesis.openapi.from_asgi("/openapi.json", create_app([models_dir], limits))


def test_every_post_route_documents_its_request_body(api_schema):
    posts = [path for path, method in OPERATIONS if method == "POST"]
    assert posts == ["/v1/models/{name}/advance", "/v1/models/{name}/forecast",
                     "/v2/models/{name}/infer", "/v2/models/{name}/versions/{version}/infer"]
    for path in posts:
        body = api_schema.raw_schema["paths"][path]["post"]["requestBody"]
        assert set(body["content"]) == {"application/json", "application/msgpack"}


# Invalid data only where there is something to make invalid: the request bodies.
CASES = [(path, method, mode) for path, method in OPERATIONS
         for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE)
         if mode == GenerationMode.POSITIVE or method == "POST"]


@pytest.mark.parametrize(("path", "method", "mode"), CASES,
                         ids=[f"{m} {p} {mode.value}" for p, m, mode in CASES])
def test_operation_conforms_to_its_schema(api_schema, path, method, mode):
    fixed = {"name": "oscillator"} if "{name}" in path else None
    strategy = api_schema[path][method].as_strategy(generation_mode=mode)
    if fixed:
        # Half the cases name the served model, so bodies reach validation and the runtime.
        strategy = strategy | api_schema[path][method].as_strategy(
            generation_mode=mode, path_parameters=fixed)

    @given(case=strategy)
    # No shrinking phase: a failure is reported as generated, so the run stays bounded.
    @settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None,
              phases=[Phase.explicit, Phase.generate], suppress_health_check=list(HealthCheck))
    def check(case):
        case.call_and_validate(checks=CHECKS)

    check()


def _document(make_client, **settings):
    return make_client(**settings).get("/openapi.json").json()


def test_bearer_auth_is_optional_without_a_token_and_required_with_one(make_client):
    # OpenAPI 3.1 §4.8.10 (Security Requirement Object): an empty object in `security` makes
    # authentication optional.
    for document, expected in ((_document(make_client), [{}, {"HTTPBearer": []}]),
                               (_document(make_client, token="t"), [{"HTTPBearer": []}])):
        for path in ("/v1/models/{name}/advance", "/v2/models/{name}/infer"):
            assert document["paths"][path]["post"]["security"] == expected


def test_generic_schema_says_what_every_model_needs(make_client):
    components = _document(make_client, max_batch=16)["components"]["schemas"]
    row, batch = components["AdvanceRequest"]["properties"]["state"]["anyOf"]
    assert row["minItems"] == 1 and batch["minItems"] == 1
    assert components["AdvanceRequest"]["properties"]["t"]["minimum"] == 0
    times = components["ForecastRequest"]["properties"]["times"]
    assert times["minItems"] == 1 and times["items"]["minimum"] == 0
    tensor = components["InferRequestInput"]["properties"]
    assert (tensor["shape"]["minItems"], tensor["shape"]["maxItems"]) == (1, 2)
    assert tensor["shape"]["items"]["minimum"] == 0 and tensor["data"]["minItems"] == 1


MODEL_PATHS = {"/v1/models/oscillator/advance": "AdvanceRequest.oscillator-0",
               "/v1/models/oscillator/forecast": "ForecastRequest.oscillator-0",
               "/v2/models/oscillator/infer": "InferRequest.oscillator-0",
               "/v2/models/oscillator/versions/1/infer": "InferRequest.oscillator-0"}


def test_each_served_model_has_paths_with_its_exact_schema(make_client, stepper):
    client = make_client(max_batch=16, max_forecast_points=50, max_abs_value=1e30,
                         max_coarse_steps=500)
    document = client.get("/openapi.json").json()
    components = document["components"]["schemas"]
    for path, component in MODEL_PATHS.items():
        body = document["paths"][path]["post"]["requestBody"]["content"]
        assert {media["schema"]["$ref"] for media in body.values()} == {
            f"#/components/schemas/{component}"}
        assert all(parameter["name"] not in ("name", "version")
                   for parameter in document["paths"][path]["post"].get("parameters", []))
    advance = components["AdvanceRequest.oscillator-0"]["properties"]
    row, batch = advance["state"]["anyOf"]
    # The oscillator's state has 2 components: rows of exactly 2, batches of 1..16 rows.
    assert (row["minItems"], row["maxItems"]) == (2, 2)
    assert (batch["minItems"], batch["maxItems"]) == (1, 16)
    assert (row["items"]["minimum"], row["items"]["maximum"]) == (-1e30, 1e30)
    # 500 steps of the largest stride (16 base steps of 0.05 s): 400 s.
    assert advance["t"] == {"type": "number", "minimum": 0, "maximum": 500 * 16 * 0.05}
    forecast = components["ForecastRequest.oscillator-0"]["properties"]
    assert forecast["times"]["maxItems"] == 50
    infer = components["InferRequest.oscillator-0"]["properties"]
    # One alternative per batch size and order: [B, 2] with 't' [1] (both orders), and with
    # 't' [B] for B > 1.
    assert len(infer["inputs"]["anyOf"]) == 2 * 16 + 2 * 15
    first = infer["inputs"]["anyOf"][0]["prefixItems"]
    assert first[0]["properties"]["data"]["minItems"] == 2
    assert first[1]["properties"]["shape"]["prefixItems"] == [{"const": 1}]


def test_float32_values_are_bounded_where_the_cast_overflows(make_client):
    # Rounding to nearest float32 (IEEE 754): below FLT_MAX + half an ulp = 2**128 - 2**103 a
    # float64 rounds to FLT_MAX; from there on it becomes inf.
    document = make_client().get("/openapi.json").json()
    row = document["components"]["schemas"]["AdvanceRequest.oscillator-0"]["properties"][
        "state"]["anyOf"][0]
    assert row["items"]["exclusiveMaximum"] == 2.0**128 - 2.0**103
    client = make_client()
    below = float(np.nextafter(2.0**128 - 2.0**103, 0))
    ok = client.post("/v1/models/oscillator/advance", json={"state": [below, 0.0], "t": 0})
    assert ok.status_code == 200
    refused = client.post("/v1/models/oscillator/advance",
                          json={"state": [2.0**128 - 2.0**103, 0.0], "t": 0})
    assert refused.status_code == 422


def test_the_bounds_the_document_states_are_enforced(make_client):
    client = make_client(max_abs_value=10.0, max_coarse_steps=500)
    advance = "/v1/models/oscillator/advance"
    assert client.post(advance, json={"state": [10.0, -10.0], "t": 400.0}).status_code == 200
    late = client.post(advance, json={"state": [1.0, 0.0], "t": 400.01})
    assert late.status_code == 422 and "up to 400.0" in late.json()["error"]
    large = client.post(advance, json={"state": [1.0, -10.5], "t": 1.0})
    assert large.status_code == 422 and "max_abs_value" in large.json()["error"]
    forecast = client.post("/v1/models/oscillator/forecast",
                           json={"state": [1.0, 0.0], "times": [1.0, 401.0]})
    assert forecast.status_code == 422 and "401.0" in forecast.json()["error"]
    infer = client.post("/v2/models/oscillator/infer", json={"inputs": [
        {"name": "state", "shape": [1, 2], "datatype": "FP32", "data": [1, 0]},
        {"name": "t", "shape": [1], "datatype": "FP64", "data": [500]}]})
    assert infer.status_code == 422 and "up to 400.0" in infer.json()["error"]


def test_the_document_is_rebuilt_once_the_models_are_loaded(models_dir):
    app = create_app([models_dir])
    before = app.openapi()["paths"]
    assert "/v1/models/oscillator/advance" not in before
    with TestClient(app) as client:
        assert "/v1/models/oscillator/advance" in client.get("/openapi.json").json()["paths"]
