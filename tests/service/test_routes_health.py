"""Liveness, readiness and the Prometheus metrics of one app."""

from __future__ import annotations

from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from stridecast.service import create_app


def samples(client: TestClient) -> dict[tuple[str, tuple], float]:
    """Parse /metrics with prometheus_client's own text parser (the reference reader)."""
    response = client.get("/metrics")
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("text/plain")
    return {(sample.name, tuple(sorted(sample.labels.items()))): sample.value
            for family in text_string_to_metric_families(response.text)
            for sample in family.samples}


def value(table, name: str, **labels) -> float:
    return table.get((name, tuple(sorted(labels.items()))), 0.0)


def test_healthz_and_readyz(client):
    assert client.get("/healthz").json() == {"status": "ok"}
    ready = client.get("/readyz")
    assert ready.status_code == 200
    assert ready.json() == {"ready": True, "models": 1, "failed": 1}


def test_not_ready_when_no_model_loads(make_client, models_dir):
    client = make_client([models_dir / "broken"])
    ready = client.get("/readyz")
    assert ready.status_code == 503
    assert ready.json() == {"ready": False, "models": 0, "failed": 1}
    assert client.get("/v2/health/ready").status_code == 503
    assert client.get("/healthz").status_code == 200


def test_not_ready_and_503_before_the_lifespan_runs(models_dir):
    client = TestClient(create_app([models_dir]))  # not entered: no lifespan, nothing loaded
    assert client.get("/readyz").status_code == 503
    response = client.post("/v1/models/oscillator/advance", json={"state": [1, 0], "t": 1})
    assert response.status_code == 503
    assert "still loading" in response.json()["error"]


def test_metrics_count_requests_latency_and_evaluations(client, stepper):
    client.post("/v1/models/oscillator/advance", json={"state": [[1, 0], [0, 1]], "t": 1.0})
    client.post("/v1/models/oscillator/advance", json={"state": [1, 0], "t": -1})
    client.post("/v1/models/oscillator/forecast", json={"state": [1, 0], "times": [0.1, 0.2]})
    client.get("/v1/models/probe-1")
    table = samples(client)
    advance = {"method": "POST", "route": "/v1/models/{name}/advance", "model": "oscillator"}
    assert value(table, "stridecast_http_requests_total", status="200", **advance) == 1
    assert value(table, "stridecast_http_requests_total", status="422", **advance) == 1
    assert value(table, "stridecast_http_request_duration_seconds_count", **advance) == 2
    # Expected: the runtime's own plan for t = 1 (20 base steps: one 16 and one 4).
    evaluations = stepper.plan(1.0).evaluations
    assert value(table, "stridecast_network_evaluations_total", model="oscillator",
                 route="advance") == evaluations
    assert value(table, "stridecast_states_total", model="oscillator", route="advance") == 2
    assert value(table, "stridecast_states_total", model="oscillator", route="forecast") == 2
    # Names that are not models are pooled, so probing cannot grow the label set.
    assert value(table, "stridecast_http_requests_total", method="GET", status="404",
                 route="/v1/models/{name}", model="unknown") == 1
    assert value(table, "stridecast_models", status="served") == 1
    assert value(table, "stridecast_models", status="failed") == 1


def test_each_app_has_its_own_registry(make_client):
    first, second = make_client(), make_client()
    for _ in range(3):
        first.get("/healthz")
    second.get("/healthz")
    labels = {"method": "GET", "route": "/healthz", "model": "", "status": "200"}
    assert value(samples(first), "stridecast_http_requests_total", **labels) == 3
    assert value(samples(second), "stridecast_http_requests_total", **labels) == 1
