"""Liveness and readiness of one app (its metrics: test_metrics.py)."""

from __future__ import annotations

from fastapi.testclient import TestClient

from stridecast.service import create_app


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
