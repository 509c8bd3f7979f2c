"""Settings from `STRIDECAST_*` variables, and as an overridable dependency."""

from __future__ import annotations

import pytest
from pydantic import ValidationError

from stridecast.service import Settings, create_app, get_settings
from stridecast.service.server import effective_settings, environment_for


def test_defaults_are_the_documented_limits():
    settings = Settings()
    # design.md §6: body 4 MiB, batch 4,096, forecast points 100,000, wall time 10 s.
    assert settings.max_body_bytes == 4 * 1024 * 1024
    assert settings.max_batch == 4096
    assert settings.max_forecast_points == 100_000
    assert settings.request_timeout == 10.0
    assert settings.max_concurrency >= 1
    assert settings.bearer_token() is None


def test_environment_variables_with_the_prefix(monkeypatch):
    monkeypatch.setenv("STRIDECAST_MAX_BATCH", "7")
    monkeypatch.setenv("STRIDECAST_MODELS", '["a", "b"]')
    monkeypatch.setenv("STRIDECAST_REQUEST_TIMEOUT", "2.5")
    settings = Settings()
    assert settings.max_batch == 7 and settings.models == ["a", "b"]
    assert settings.request_timeout == 2.5


def test_invalid_values_are_refused(monkeypatch):
    with pytest.raises(ValidationError, match="max_batch"):
        Settings(max_batch=0)
    with pytest.raises(ValidationError, match="request_timeout"):
        Settings(request_timeout=float("inf"))
    with pytest.raises(ValidationError, match="dtype"):
        Settings(dtype="float16")


def test_settings_dependency_can_be_overridden(models_dir):
    from fastapi.testclient import TestClient

    app = create_app([models_dir])
    app.dependency_overrides[get_settings] = lambda: Settings(max_batch=1)
    with TestClient(app) as client:
        response = client.post("/v1/models/oscillator/advance",
                               json={"state": [[1, 0], [0, 1]], "t": 1})
    assert response.status_code == 422
    assert "the limit is 1" in response.json()["error"]


def test_serve_settings_travel_to_workers_through_the_environment(tmp_path, monkeypatch):
    token = tmp_path / "token"
    token.write_text("abc\n")
    settings = effective_settings(["m1", tmp_path / "m2"], token_file=token, max_batch=9)
    assert settings.models == ["m1", str(tmp_path / "m2")]
    assert settings.bearer_token() == "abc"
    variables = environment_for(settings)
    assert "STRIDECAST_TOKEN" not in variables
    for name, value in variables.items():
        monkeypatch.setenv(name, value)
    rebuilt = Settings()
    assert rebuilt == settings
    assert rebuilt.bearer_token() == "abc"
