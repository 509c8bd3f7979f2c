"""Prometheus metrics of one app, in a registry of its own (no process-wide globals).

`MetricsMiddleware` counts every request and its latency by route template and model;
handlers add the network evaluations and states they computed.
"""

from __future__ import annotations

import time
from collections.abc import Callable

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client.exposition import CONTENT_TYPE_LATEST
from starlette.types import ASGIApp, Message, Receive, Scope, Send

# Service latencies span sub-millisecond advances to multi-second forecasts.
LATENCY_BUCKETS = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5,
                   5.0, 10.0, 30.0)
CONTENT_TYPE = CONTENT_TYPE_LATEST


class Metrics:
    """The counters and histograms of one app."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        self.requests = Counter(
            "stridecast_http_requests", "HTTP requests answered, by route, model and status.",
            ("method", "route", "model", "status"), registry=self.registry)
        self.latency = Histogram(
            "stridecast_http_request_duration_seconds",
            "Wall time from request start to the last response byte, by route and model.",
            ("method", "route", "model"), buckets=LATENCY_BUCKETS, registry=self.registry)
        self.evaluations = Counter(
            "stridecast_network_evaluations",
            "Network evaluations (level calls on a batch) computed, by model and route.",
            ("model", "route"), registry=self.registry)
        self.states = Counter(
            "stridecast_states", "States advanced (batch rows times requested times).",
            ("model", "route"), registry=self.registry)
        self.models_loaded = Gauge(
            "stridecast_models", "Models by load status.", ("status",), registry=self.registry)

    def record_computation(self, model: str, route: str, *, evaluations: int,
                           states: int) -> None:
        self.evaluations.labels(model, route).inc(evaluations)
        self.states.labels(model, route).inc(states)

    def exposition(self) -> bytes:
        return generate_latest(self.registry)


class MetricsMiddleware:
    """Pure ASGI middleware: time each HTTP request and label it after routing.

    Parameters
    ----------
    app : ASGI app
    metrics : Metrics
    known_model : callable
        Whether a path's `name` is a configured model; other names are labelled "unknown" so
        that probing clients cannot grow the label set without bound.
    """

    def __init__(self, app: ASGIApp, *, metrics: Metrics, known_model: Callable[[str], bool]):
        self.app = app
        self.metrics = metrics
        self.known_model = known_model

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        status = 500  # what the client sees if the app raises before responding

        async def send_and_record(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, send_and_record)
        finally:
            route = getattr(scope.get("route"), "path", None) or "unmatched"
            name = scope.get("path_params", {}).get("name")
            model = "" if name is None else (name if self.known_model(name) else "unknown")
            method = scope.get("method", "")
            self.metrics.requests.labels(method, route, model, str(status)).inc()
            self.metrics.latency.labels(method, route, model).observe(
                time.perf_counter() - started)
