"""schemathesis over every route of the service with every check it has but one, valid and
invalid data, JSON and MessagePack bodies: no 5xx, and every answer as documented.

Expected behaviour comes from the app's own OpenAPI document (schemathesis's checks). The app
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
from tests.http_cases import documented_operations, register_msgpack_serializer
from tests.systems import write_oscillator

register_msgpack_serializer()
load_all_checks()
OPERATIONS = documented_operations()
TOKEN = "reliability-token"
AUTH = {"Authorization": f"Bearer {TOKEN}"}
# positive_data_acceptance expects every schema-valid body to be accepted, but validity also
# depends on the named model's state dimension and on the configured limits, which one schema
# shared by all models cannot express (e.g. a state of 3 numbers for a 2-state model).
EXCLUDED = {"positive_data_acceptance"}
CHECKS = [check for check in REGISTERED_CHECKS.get_all() if check.__name__ not in EXCLUDED]
EXAMPLES = 40
# Invalid data only where there is something to make invalid (GET routes take at most a
# model name, which any string is): the request bodies and headers of the POST routes.
CASES = [(path, method, mode) for path, method in OPERATIONS
         for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE)
         if mode == GenerationMode.POSITIVE or method == "POST"]
STATUSES: Counter[int] = Counter()


@pytest.fixture(scope="module")
def api_schema(tmp_path_factory):
    root = tmp_path_factory.mktemp("schema-models")
    write_oscillator(root / "oscillator")
    limits = Settings(max_body_bytes=16 * 1024, max_batch=16, max_forecast_points=50,
                      request_timeout=5.0, token=TOKEN)
    return schemathesis.openapi.from_asgi("/openapi.json", create_app([root], limits))


@pytest.mark.parametrize(("path", "method", "mode"), CASES,
                         ids=[f"{m} {p} {mode.value}" for p, m, mode in CASES])
def test_route_answers_as_documented(api_schema, reliability, path, method, mode):
    operation = api_schema[path][method]
    strategy = operation.as_strategy(generation_mode=mode)
    if "{name}" in path:
        # Half the cases name the served model, so bodies reach validation and the runtime.
        strategy = strategy | operation.as_strategy(generation_mode=mode,
                                                    path_parameters={"name": "oscillator"})
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
        "Service: schemathesis", f"{len(OPERATIONS)} operations, valid data (and invalid data "
        f"for the POST bodies), JSON and MessagePack; checks: {len(CHECKS)} of "
        f"{len(REGISTERED_CHECKS.get_all())} (all but positive_data_acceptance)",
        sum(seen.values()), "0 5xx; every answer matched its documented status, content type, "
        "headers and schema; POST routes refused requests without the token")


def test_statuses_seen_by_schemathesis(reliability):
    # Runs after the cases above (file order) and reports what they produced.
    assert STATUSES and max(STATUSES) < 500
    reliability.record("Service: schemathesis", "statuses of all the cases above",
                       sum(STATUSES.values()),
                       ", ".join(f"{status} × {count}" for status, count in
                                 sorted(STATUSES.items())))
