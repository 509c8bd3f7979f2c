"""schemathesis over every route of the service with every check it has, valid and invalid
data, JSON and MessagePack bodies: no 5xx, every answer as documented, every request the document
allows accepted (`positive_data_acceptance`) and every request it forbids refused
(`negative_data_rejection`).

Expected behaviour comes from the app's own OpenAPI document (schemathesis's checks): the served
model's own paths carry its exact body schemas, the templated paths the other names. The app
has a bearer token, so `ignored_auth` can check that POST routes refuse requests without it.
"""

from __future__ import annotations

from collections import Counter

import pytest
import schemathesis
from hypothesis import HealthCheck, Phase, given, settings
from schemathesis import GenerationMode
from schemathesis.checks import CHECKS as REGISTERED_CHECKS
from schemathesis.checks import load_all_checks

from stridecast.service import Settings, create_app
from stridecast.service.openapi import MODEL_ROUTES
from tests.http_cases import documented_operations, register_msgpack_serializer
from tests.systems import write_oscillator

register_msgpack_serializer()
load_all_checks()
OPERATIONS = documented_operations()
TOKEN = "reliability-token"
AUTH = {"Authorization": f"Bearer {TOKEN}"}
CHECKS = REGISTERED_CHECKS.get_all()
EXAMPLES = 40
MODEL = "oscillator"
# The served model's own POST paths, beside the templated ones.
MODEL_OPERATIONS = [(path.replace("{name}", MODEL).replace("{version}", "1"), "POST")
                    for path in MODEL_ROUTES]
# Invalid data only where there is something to make invalid (GET routes take at most a
# model name, which any string is): the request bodies and headers of the POST routes.
CASES = [(path, method, mode) for path, method in OPERATIONS + MODEL_OPERATIONS
         for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE)
         if mode == GenerationMode.POSITIVE or method == "POST"]
STATUSES: Counter[int] = Counter()


@pytest.fixture(scope="module")
def api_schema(tmp_path_factory):
    root = tmp_path_factory.mktemp("schema-models")
    write_oscillator(root / MODEL)
    # Small limits, so generated data reaches them; a magnitude bound under which the
    # oscillator's arithmetic cannot overflow float32 (its flow maps at most double a state);
    # times up to 400 s (500 steps of the coarsest level), answered well within the budget.
    limits = Settings(max_body_bytes=16 * 1024, max_batch=16, max_forecast_points=50,
                      max_abs_value=1e30, max_coarse_steps=500, request_timeout=5.0,
                      token=TOKEN)
    return schemathesis.openapi.from_asgi("/openapi.json", create_app([root], limits))


@pytest.mark.parametrize(("path", "method", "mode"), CASES,
                         ids=[f"{m} {p} {mode.value}" for p, m, mode in CASES])
def test_route_answers_as_documented(api_schema, reliability, path, method, mode):
    operation = api_schema[path][method]
    strategy = operation.as_strategy(generation_mode=mode)
    if "{name}" in path and method == "GET":
        # Half the cases name the served model (its POST routes have paths of their own).
        strategy = strategy | operation.as_strategy(generation_mode=mode,
                                                    path_parameters={"name": MODEL})
    seen: Counter[int] = Counter()

    @given(case=strategy)
    # No shrinking phase: a failure is reported as generated, so the run stays bounded.
    @settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None,
              phases=[Phase.explicit, Phase.generate], suppress_health_check=list(HealthCheck))
    def check(case) -> None:
        response = case.call_and_validate(checks=CHECKS, headers=AUTH)
        seen[response.status_code] += 1

    check()
    assert all(status < 500 for status in seen)
    STATUSES.update(seen)
    reliability.record(
        "Service: schemathesis", f"{len(OPERATIONS) + len(MODEL_OPERATIONS)} operations "
        "(the served model's own POST paths included), valid data (and invalid data for the "
        f"POST bodies), JSON and MessagePack; all {len(CHECKS)} checks",
        sum(seen.values()), "0 5xx; every answer matched its documented status, content type, "
        "headers and schema; valid requests accepted, invalid ones refused; POST routes "
        "refused requests without the token")


def test_statuses_seen_by_schemathesis(reliability):
    # Runs after the cases above (file order) and reports what they produced.
    assert STATUSES and max(STATUSES) < 500
    reliability.record("Service: schemathesis", "statuses of all the cases above",
                       sum(STATUSES.values()),
                       ", ".join(f"{status} × {count}" for status, count in
                                 sorted(STATUSES.items())))
