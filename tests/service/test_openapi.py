"""Property-based API testing with schemathesis against the app's own OpenAPI schema.

Every operation, request bodies included (documented with `openapi_extra`), is exercised with
generated data (valid and invalid) in JSON and MessagePack: no response may be a 5xx, and every
response must match the documented status codes, content types and schemas.
"""

from __future__ import annotations

import pytest
import schemathesis
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


def test_schema_says_what_the_service_checks(make_client):
    components = _document(make_client, max_batch=16)["components"]["schemas"]
    # The served oscillator has 2 components: rows of exactly 2, batches of 1..16 rows.
    row, batch = components["AdvanceRequest"]["properties"]["state"]["anyOf"]
    assert (row["minItems"], row["maxItems"]) == (2, 2)
    assert (batch["minItems"], batch["maxItems"]) == (1, 16)
    assert components["AdvanceRequest"]["properties"]["t"]["minimum"] == 0
    times = components["ForecastRequest"]["properties"]["times"]
    assert times["minItems"] == 1 and times["items"]["minimum"] == 0
    tensor = components["InferRequestInput"]["properties"]
    assert (tensor["shape"]["minItems"], tensor["shape"]["maxItems"]) == (1, 2)
    assert tensor["shape"]["items"]["minimum"] == 0 and tensor["data"]["minItems"] == 1
