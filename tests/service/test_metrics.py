"""`service/metrics.py`: the Prometheus counters and histograms of one app and the middleware
that labels every request.

The reference reader is prometheus_client's own text-format parser
(`prometheus_client.parser.text_string_to_metric_families`); counters appear with the
`_total` suffix and histograms as `_bucket`/`_count`/`_sum` series (Prometheus exposition
format, "Text-based format", prometheus.io/docs/instrumenting/exposition_formats).
"""

from __future__ import annotations

import asyncio

import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from stridecast.service.metrics import LATENCY_BUCKETS, Metrics, MetricsMiddleware


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


def parsed(metrics: Metrics) -> dict[tuple[str, tuple], float]:
    return {(sample.name, tuple(sorted(sample.labels.items()))): sample.value
            for family in text_string_to_metric_families(metrics.exposition().decode())
            for sample in family.samples}


def test_record_computation_adds_up_per_model_and_route():
    metrics = Metrics()
    metrics.record_computation("a", "advance", evaluations=3, states=2)
    metrics.record_computation("a", "advance", evaluations=5, states=1)
    metrics.record_computation("b", "forecast", evaluations=7, states=4)
    table = parsed(metrics)
    assert value(table, "stridecast_network_evaluations_total", model="a", route="advance") == 8
    assert value(table, "stridecast_states_total", model="a", route="advance") == 3
    assert value(table, "stridecast_network_evaluations_total", model="b", route="forecast") == 7
    assert value(table, "stridecast_states_total", model="b", route="forecast") == 4


def test_latency_buckets_are_cumulative_at_the_documented_bounds():
    metrics = Metrics()
    metrics.latency.labels("GET", "/x", "").observe(0.003)
    metrics.latency.labels("GET", "/x", "").observe(0.2)
    table = parsed(metrics)
    labels = {"method": "GET", "route": "/x", "model": ""}
    bounds = sorted(float(dict(key[1])["le"]) for key in table
                    if key[0] == "stridecast_http_request_duration_seconds_bucket")
    assert bounds == [*LATENCY_BUCKETS, float("inf")]

    def bucket(le: str) -> float:
        return value(table, "stridecast_http_request_duration_seconds_bucket", le=le, **labels)

    # A bucket counts observations ≤ its bound (Prometheus histograms are cumulative).
    assert bucket("0.0025") == 0 and bucket("0.005") == 1
    assert bucket("0.1") == 1 and bucket("0.25") == 2 and bucket("+Inf") == 2
    assert value(table, "stridecast_http_request_duration_seconds_count", **labels) == 2
    assert value(table, "stridecast_http_request_duration_seconds_sum",
                 **labels) == pytest.approx(0.203)


def _call(middleware: MetricsMiddleware, scope: dict) -> list[dict]:
    sent: list[dict] = []

    async def receive():
        return {"type": "http.request", "body": b"", "more_body": False}

    async def send(message):
        sent.append(message)

    asyncio.run(middleware(scope, receive, send))
    return sent


def test_middleware_labels_route_model_and_status_after_routing():
    class Route:
        path = "/v1/models/{name}"

    async def app(scope, receive, send):
        # What the router does: it fills in the matched route and path parameters.
        scope["route"] = Route()
        scope["path_params"] = {"name": scope["path"].rsplit("/", 1)[-1]}
        await send({"type": "http.response.start", "status": 204, "headers": []})
        await send({"type": "http.response.body", "body": b""})

    metrics = Metrics()
    middleware = MetricsMiddleware(app, metrics=metrics, known_model=lambda name: name == "osc")
    for path in ("/v1/models/osc", "/v1/models/osc", "/v1/models/probe-1"):
        sent = _call(middleware, {"type": "http", "method": "GET", "path": path})
        assert sent[0]["status"] == 204  # the answer passes through unchanged
    table = parsed(metrics)
    labels = {"method": "GET", "route": "/v1/models/{name}", "status": "204"}
    assert value(table, "stridecast_http_requests_total", model="osc", **labels) == 2
    assert value(table, "stridecast_http_requests_total", model="unknown", **labels) == 1
    assert value(table, "stridecast_http_request_duration_seconds_count", method="GET",
                 route="/v1/models/{name}", model="osc") == 2


def test_middleware_counts_a_crash_before_any_answer_as_500_unmatched():
    async def app(scope, receive, send):
        raise RuntimeError("boom")

    metrics = Metrics()
    middleware = MetricsMiddleware(app, metrics=metrics, known_model=lambda name: True)
    with pytest.raises(RuntimeError, match="boom"):
        _call(middleware, {"type": "http", "method": "POST", "path": "/nowhere"})
    table = parsed(metrics)
    assert value(table, "stridecast_http_requests_total", method="POST", route="unmatched",
                 model="", status="500") == 1


def test_middleware_passes_other_scopes_through_uncounted():
    seen = []

    async def app(scope, receive, send):
        seen.append(scope["type"])

    metrics = Metrics()
    middleware = MetricsMiddleware(app, metrics=metrics, known_model=lambda name: True)
    _call(middleware, {"type": "lifespan"})
    assert seen == ["lifespan"]
    assert not [key for key in parsed(metrics) if key[0] == "stridecast_http_requests_total"]
