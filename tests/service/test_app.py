"""`service/app.py`: the app factory and its lifespan (models loaded once, gRPC beside HTTP).

Expected states: the exact flow map expm(A t) of the served oscillator (SciPy), and the
runtime's own answer; gRPC calls go through tritonclient's stock client (the reference client
of the open inference protocol, kserve/open-inference-protocol inference_grpc.md: ServerLive,
ModelReady, ModelInfer). Routes, limits and metrics have their own test files.
"""

from __future__ import annotations

import numpy as np
import pytest
import tritonclient.grpc as grpcclient
from fastapi.testclient import TestClient
from tritonclient.utils import InferenceServerException

from stridecast import __version__
from stridecast.runtime import load
from stridecast.service import Settings, create_app
from stridecast.service.app import app_from_environment
from tests.systems import exact_oscillator_state


def test_not_ready_and_503_before_the_lifespan_runs(models_dir):
    client = TestClient(create_app([models_dir]))  # not entered: no lifespan, nothing loaded
    assert client.get("/readyz").status_code == 503
    response = client.post("/v1/models/oscillator/advance", json={"state": [1, 0], "t": 1})
    assert response.status_code == 503
    assert "still loading" in response.json()["error"]


def test_the_lifespan_loads_once_and_serves_the_exact_flow_map(models_dir):
    app = create_app([models_dir], Settings())
    assert app.title == "stridecast" and app.version == __version__
    with TestClient(app) as client:
        registry = app.state.registry
        assert sorted(entry.name for entry in registry.entries) == ["broken", "oscillator"]
        answer = client.post("/v1/models/oscillator/advance",
                             json={"state": [1.0, 0.5], "t": 0.8}).json()
        assert app.state.registry is registry  # requests do not reload anything
    # Expected: expm(A t) x0 (SciPy); the levels hold float32 weights.
    np.testing.assert_allclose(answer["state"], exact_oscillator_state([1.0, 0.5], 0.8),
                               rtol=1e-6, atol=1e-6)
    assert app.state.gate is None  # the concurrency gate ends with the lifespan


def test_a_mapping_names_the_models_and_takes_loaded_steppers(oscillator_path):
    stepper = load(oscillator_path, dtype="float64")
    app = create_app({"osc64": stepper, "osc": oscillator_path})
    with TestClient(app) as client:
        names = sorted(model["name"] for model in client.get("/v1/models").json()["models"])
        assert names == ["osc", "osc64"]
        answer = client.post("/v1/models/osc64/advance", json={"state": [1.0, 0.5], "t": 0.8})
    # The loaded stepper is served as it is (float64 here), bit for bit.
    assert np.asarray(answer.json()["state"]).tobytes() == \
        stepper.advance(np.array([1.0, 0.5]), 0.8).tobytes()


def test_models_that_are_not_models_fail_at_once(tmp_path):
    with pytest.raises(TypeError, match="single path"):
        create_app(tmp_path)
    with pytest.raises(ValueError, match="must be a non-empty string without '/'"):
        create_app({"a/b": tmp_path})


def test_app_from_environment_reads_models_and_settings(monkeypatch, oscillator_path):
    monkeypatch.setenv("STRIDECAST_MODELS", f'["{oscillator_path}"]')
    monkeypatch.setenv("STRIDECAST_MAX_BATCH", "3")
    app = app_from_environment()
    assert app.state.settings.max_batch == 3
    with TestClient(app) as client:
        assert client.get("/v1/models/oscillator").status_code == 200
        too_many = client.post("/v1/models/oscillator/advance",
                               json={"state": [[1.0, 0.0]] * 4, "t": 0.8})
    assert too_many.status_code == 422


def test_grpc_starts_and_stops_with_the_lifespan(models_dir, stepper):
    app = create_app([models_dir], Settings(grpc_port=0))
    with TestClient(app):
        port = app.state.grpc_port
        assert isinstance(port, int) and port > 0  # port 0 asks the system for a free one
        client = grpcclient.InferenceServerClient(f"127.0.0.1:{port}")
        try:
            assert client.is_server_live()
            assert client.is_model_ready("oscillator")
            assert not client.is_model_ready("broken")
            state = np.array([[1.0, 0.5]], np.float32)
            inputs = [grpcclient.InferInput("state", [1, 2], "FP32"),
                      grpcclient.InferInput("t", [1], "FP64")]
            inputs[0].set_data_from_numpy(state)
            inputs[1].set_data_from_numpy(np.array([0.8]))
            result = client.infer("oscillator", inputs).as_numpy("state")
        finally:
            client.close()
    assert result.tobytes() == stepper.advance(state, 0.8).tobytes()
    after = grpcclient.InferenceServerClient(f"127.0.0.1:{port}")
    try:
        with pytest.raises(InferenceServerException, match=r"UNAVAILABLE|DEADLINE"):
            after.is_server_live(client_timeout=2)
    finally:
        after.close()


def test_without_grpc_port_no_grpc_server_starts(client):
    assert client.app.state.grpc_port is None
