"""The /v1 routes over TestClient: JSON and MessagePack, compared with the runtime itself.

Expected values: the runtime called directly on the same input (bitwise, same dtype) and the
matrix exponential of the oscillator (SciPy `expm`, see conftest).
"""

from __future__ import annotations

import warnings

import msgpack
import numpy as np
import pytest

from tests.systems import OSCILLATOR_BASE_STEP as BASE_STEP
from tests.systems import OSCILLATOR_HORIZON as VALIDATED_HORIZON
from tests.systems import exact_oscillator_state as exact_state

ADVANCE = "/v1/models/oscillator/advance"
FORECAST = "/v1/models/oscillator/forecast"
MSGPACK = {"content-type": "application/msgpack", "accept": "application/msgpack"}
BATCH = [[1.0, 0.0], [0.5, -0.25], [-1.5, 2.0]]


def typed(array: np.ndarray) -> dict:
    """The documented MessagePack typed-array form."""
    return {"dtype": array.dtype.str, "shape": list(array.shape), "data": array.tobytes()}


def from_typed(value: dict) -> np.ndarray:
    return np.frombuffer(value["data"], dtype=np.dtype(value["dtype"])).reshape(value["shape"])


def same_bits(left: np.ndarray, right: np.ndarray) -> None:
    assert left.dtype == right.dtype and left.shape == right.shape
    assert left.tobytes() == right.tobytes()


def test_list_models_reports_served_and_failed(client, models_dir):
    response = client.get("/v1/models")
    assert response.status_code == 200
    models = {entry["name"]: entry for entry in response.json()["models"]}
    assert set(models) == {"oscillator", "broken"}
    assert models["oscillator"]["ready"] is True
    assert models["oscillator"]["strides"] == [1, 4, 16]
    assert models["oscillator"]["state_dim"] == 2
    assert models["broken"]["ready"] is False
    assert "checksum" in models["broken"]["error"]


def test_describe_model_summarises_the_manifest(client):
    response = client.get("/v1/models/oscillator")
    assert response.status_code == 200
    detail = response.json()
    assert detail["state"] == {"dim": 2, "names": ["x", "v"], "units": ["m", "m/s"]}
    assert detail["time"] == {"base_step": BASE_STEP, "unit": "s"}
    assert detail["strides"] == [1, 4, 16]
    assert detail["envelope"] == {"min": [-2.0, -4.0], "max": [2.0, 4.0]}
    assert detail["validated_horizon"] == VALIDATED_HORIZON
    assert detail["update"] == "replace"
    assert detail["dtype"] == "float32"


def test_model_documents_are_the_runtime_description_in_the_documented_shape(client, stepper):
    from stridecast.runtime.describe import describe_stepper
    from stridecast.service.schemas import ModelDetail, ModelSummary

    described = describe_stepper(stepper)
    detail = client.get("/v1/models/oscillator").json()
    # Exactly the fields the schema documents, each as the runtime describes the stepper.
    assert set(detail) == set(ModelDetail.model_fields)
    assert detail == {**{key: described[key] for key in detail}, "name": "oscillator"}
    summary = next(entry for entry in client.get("/v1/models").json()["models"]
                   if entry["name"] == "oscillator")
    assert set(summary) == set(ModelSummary.model_fields)
    assert (summary["state_dim"], summary["base_step"], summary["time_unit"],
            summary["strides"]) == (described["state"]["dim"], described["time"]["base_step"],
                                    described["time"]["unit"], described["strides"])


def test_describe_failed_and_unknown_models_is_404(client):
    broken = client.get("/v1/models/broken")
    assert broken.status_code == 404
    assert "failed to load: the checksum" in broken.json()["error"]
    unknown = client.get("/v1/models/nothing")
    assert unknown.status_code == 404
    assert unknown.json()["error"] == (
        "there is no model 'nothing'; the served models are ['oscillator'].")


@pytest.mark.parametrize("state", [BATCH[0], BATCH], ids=["single", "batch"])
def test_advance_json_equals_runtime_bitwise(client, stepper, state):
    response = client.post(ADVANCE, json={"state": state, "t": 1.0})
    assert response.status_code == 200, response.text
    body = response.json()
    direct, plan = stepper.advance_with_plan(np.asarray(state, dtype=np.float32), 1.0)
    # Expected: the runtime itself; float32 survives JSON exactly (shortest repr of a double).
    same_bits(np.asarray(body["state"], dtype=np.float32), direct)
    assert body["plan"] == plan.to_dict()
    assert body["method"] == "grid" and body["evaluations"] == plan.evaluations
    assert body["dtype"] == "float32" and body["warnings"] == []
    # Expected: the matrix exponential (SciPy), within float32 rounding of two steps.
    np.testing.assert_allclose(body["state"], exact_state(state, 1.0), atol=2e-6)


def test_advance_msgpack_typed_arrays_equal_runtime_bitwise(client, stepper):
    state = np.asarray(BATCH, dtype="<f4")
    payload = msgpack.packb({"state": typed(state), "t": 2.35, "off_grid": "nearest"})
    response = client.post(ADVANCE, content=payload, headers=MSGPACK)
    assert response.status_code == 200
    assert response.headers["content-type"] == "application/msgpack"
    body = msgpack.unpackb(response.content)
    direct, plan = stepper.advance_with_plan(state, 2.35, off_grid="nearest")
    # Expected: the runtime itself, byte for byte.
    same_bits(from_typed(body["state"]), direct)
    assert body["state"]["dtype"] == "<f4"
    assert body["plan"] == plan.to_dict()


def test_advance_msgpack_nested_lists_with_json_answer(client, stepper):
    payload = msgpack.packb({"state": BATCH, "t": 0.8})
    response = client.post(ADVANCE, content=payload,
                           headers={"content-type": "application/msgpack"})
    assert response.status_code == 200
    assert response.headers["content-type"] == "application/json"
    # Expected: the runtime on the same float32 input.
    same_bits(np.asarray(response.json()["state"], dtype=np.float32),
              stepper.advance(np.asarray(BATCH, dtype=np.float32), 0.8))


def test_advance_float64_service_equals_float64_runtime(make_client, stepper64):
    client = make_client(dtype="float64")
    response = client.post(ADVANCE, json={"state": BATCH, "t": 3.2})
    assert response.status_code == 200
    assert response.json()["dtype"] == "float64"
    # Expected: the float64 runtime, bitwise (JSON round-trips doubles exactly).
    same_bits(np.asarray(response.json()["state"]),
              stepper64.advance(np.asarray(BATCH), 3.2))
    # Expected: the matrix exponential; the float32 weights limit agreement to ~1e-6.
    np.testing.assert_allclose(response.json()["state"], exact_state(BATCH, 3.2), atol=1e-5)


def test_advance_off_grid_interpolates_by_default(client, stepper):
    response = client.post(ADVANCE, json={"state": [1.0, 0.0], "t": 0.333})
    body = response.json()
    assert body["method"] == "interpolate"
    same_bits(np.asarray(body["state"], dtype=np.float32),
              stepper.advance(np.asarray([1.0, 0.0], dtype=np.float32), 0.333))
    # Expected: the matrix exponential; cubic interpolation on a 0.05 s grid (common practice:
    # error ~ (ω h)^4 / 24 of the state scale).
    np.testing.assert_allclose(body["state"], exact_state([1.0, 0.0], 0.333), atol=1e-4)


def test_advance_off_grid_error_policy_is_422(client):
    response = client.post(ADVANCE, json={"state": [1.0, 0.0], "t": 0.333, "off_grid": "error"})
    assert response.status_code == 422
    assert "not a reachable grid time" in response.json()["error"]
    assert response.json()["code"] == "invalid_time"


def test_findings_for_envelope_and_horizon_in_the_runtime_words(client, stepper):
    state = [[3.0, 0.0], [1.0, 0.0]]
    t = VALIDATED_HORIZON + 1.0
    response = client.post(ADVANCE, json={"state": state, "t": t})
    assert response.status_code == 200
    body = response.json()
    kinds = {finding["kind"] for finding in body["findings"]}
    assert {"outside_box", "beyond_horizon"} <= kinds
    # One wording: the service repeats the runtime's own findings, message for message.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _, plan = stepper.advance_with_plan(np.asarray(state, dtype=np.float32), t)
    assert body["findings"] == [finding.to_dict() for finding in plan.findings]
    assert body["warnings"] == [finding.message for finding in plan.findings
                                if finding.kind != "no_validation"]
    assert any("beyond the validated horizon" in message for message in body["warnings"])
    assert body["plan"]["findings"] == body["findings"]


def test_forecast_carries_expected_error_per_time(client, stepper):
    times = [0.5, 0.0, 2.0]
    response = client.post(FORECAST, json={"state": BATCH[1], "times": times})
    assert response.status_code == 200
    expected = response.json()["expected_error"]
    assert len(expected) == len(times)
    # Reference: the runtime's own curve (None where it has none: nan or inf).
    for value, t in zip(expected, times, strict=True):
        direct = float(stepper.expected_error(t))
        assert value == (direct if np.isfinite(direct) else None)


@pytest.mark.parametrize("state", [BATCH[1], BATCH], ids=["single", "batch"])
def test_forecast_json_equals_runtime_bitwise(client, stepper, state):
    times = [2.0, 0.0, 0.45, 0.45, 1.6]
    response = client.post(FORECAST, json={"state": state, "times": times})
    assert response.status_code == 200
    body = response.json()
    direct, info = stepper.forecast_with_info(np.asarray(state, dtype=np.float32), times)
    states = np.asarray(body["states"], dtype=np.float32)
    # Expected: the runtime itself, bitwise.
    same_bits(states, direct)
    assert body["times"] == times
    assert body["evaluations"] == info.evaluations and body["depth"] == info.depth
    # Expected: the matrix exponential at every (grid) time.
    for index, t in enumerate(times):
        np.testing.assert_allclose(states[index], exact_state(state, t), atol=5e-6)


def test_forecast_msgpack_equals_runtime_bitwise(client, stepper):
    state = np.asarray(BATCH, dtype="<f4")
    times = np.asarray([0.05, 0.8, 1.25, 0.1], dtype="<f8")
    payload = msgpack.packb({"state": typed(state), "times": typed(times)})
    response = client.post(FORECAST, content=payload, headers=MSGPACK)
    assert response.status_code == 200
    states = from_typed(msgpack.unpackb(response.content)["states"])
    # Expected: the runtime itself, byte for byte.
    same_bits(states, stepper.forecast(state, times.tolist()))
    assert states.shape == (4, 3, 2)


def test_forecast_warns_when_the_answer_leaves_the_envelope(client):
    # Starts inside (|x| ≤ 2, |v| ≤ 4); the amplitude sqrt(1.9² + (3.9/ω)²) ≈ 2.72 m (published
    # solution of the oscillator) exceeds 2 m, and x(0.3) = 1.9 cos 0.6 + 1.95 sin 0.6 ≈ 2.67 m.
    response = client.post(FORECAST, json={"state": [1.9, 3.9], "times": [0.0, 0.3, 0.6]})
    findings = response.json()["findings"]
    outside = [finding for finding in findings if finding["kind"] == "outside_box"]
    assert outside and outside[0]["components"][0] == "x"
    # Found along the path, not at the start (t = 0 is inside).
    assert outside[0]["t"] is not None and outside[0]["t"] > 0
    assert response.json()["warnings"] == [finding["message"] for finding in outside]
