"""Liveness and readiness of one app (its metrics: test_metrics.py)."""

from __future__ import annotations


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
