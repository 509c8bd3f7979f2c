"""Reduced bundles of a 10^4-component field over HTTP: /v1 JSON and MessagePack, and the
open inference protocol with binary tensors, within the default body limit.

The bundle: a linear POD-like basis (the first 8 sine eigenvectors of the second-difference
matrix, orthonormal) with latent flow maps from scipy.linalg.expm (tests/builders.py). Expected
values: the runtime called directly on the same input, bit for bit (float32 survives JSON as
the shortest repr of a double, MessagePack typed arrays and binary tensors as raw bytes), and
the exact solution expm(diag(rates) t) decoded, within float32 rounding.
"""

from __future__ import annotations

import json
from concurrent.futures import ThreadPoolExecutor

import msgpack
import numpy as np
import pytest
from scipy.linalg import expm

from stridecast.runtime import load
from stridecast.service.settings import DEFAULT_MAX_BODY_BYTES
from tests.builders import field_bundle, sine_basis

DIM, RATES, BASE_STEP = 10_000, (-0.02, -0.1, -0.3, -0.5, -0.8, -1.2, -2.0, -3.0), 0.05
ADVANCE, FORECAST = "/v1/models/field/advance", "/v1/models/field/forecast"
INFER = "/v2/models/field/infer"
MSGPACK = {"content-type": "application/msgpack", "accept": "application/msgpack"}


@pytest.fixture(scope="module")
def field(tmp_path_factory):
    return field_bundle(tmp_path_factory.mktemp("fields") / "field", dim=DIM, rates=RATES,
                        base_step=BASE_STEP, strides=(1, 4, 16), mean=15.0, scale=3.0,
                        dtype=np.float32, reconstruction=0.05)


@pytest.fixture(scope="module")
def stepper(field):
    return load(field, threads=1)  # float32 and one thread per call, as the service loads it


@pytest.fixture
def field_client(make_client, field):
    return make_client(models=[field])


def states(count: int) -> np.ndarray:
    """Smooth fields in the span of the basis (no off-subspace finding), float32."""
    weights = np.random.default_rng(8).normal(size=(count, len(RATES)))
    return (15.0 + 3.0 * weights @ sine_basis(DIM, len(RATES)).T).astype("<f4")


def exact(initial: np.ndarray, t: float) -> np.ndarray:
    """The latent flow expm(diag(rates) t) (scipy.linalg.expm) on the sine basis, decoded."""
    basis = sine_basis(DIM, len(RATES))
    latent = ((initial.astype(np.float64) - 15.0) / 3.0) @ basis
    return (latent @ expm(np.diag(RATES) * t).T) @ basis.T * 3.0 + 15.0


def direct(call, *arguments, **options):
    """The Python API, called from a worker thread as the service calls it: with a 10^4-wide
    encoder and a batch under the thread policy's threshold, BLAS may split the long dot
    products differently in the main thread (observed with OpenBLAS: last-bit differences)."""
    with ThreadPoolExecutor(1) as pool:
        return pool.submit(call, *arguments, **options).result()


def typed(array: np.ndarray) -> dict:
    """The documented MessagePack typed-array form."""
    return {"dtype": array.dtype.str, "shape": list(array.shape), "data": array.tobytes()}


def from_typed(value: dict) -> np.ndarray:
    return np.frombuffer(value["data"], dtype=np.dtype(value["dtype"])).reshape(value["shape"])


def test_json_batch_of_fields_equals_the_runtime_bitwise(field_client, stepper):
    batch = states(4)
    body = json.dumps({"state": batch.tolist(), "t": 1.7}).encode()
    assert len(body) < DEFAULT_MAX_BODY_BYTES
    response = field_client.post(ADVANCE, content=body,
                                 headers={"content-type": "application/json"})
    assert response.status_code == 200, response.text[:300]
    answer = np.asarray(response.json()["state"], dtype=np.float32)
    assert answer.tobytes() == direct(stepper.advance, batch, 1.7).tobytes()
    # float32 arithmetic through a 10^4-wide basis: ~1e-5 of the field's size.
    np.testing.assert_allclose(answer, exact(batch, 1.7), rtol=0, atol=5e-4)
    assert response.json()["warnings"] == []


def test_msgpack_forecast_of_fields_equals_the_runtime_bitwise(field_client, stepper):
    batch = states(8)
    times = np.array([0.0, 0.35, 0.8, 2.4], dtype="<f8")
    payload = msgpack.packb({"state": typed(batch), "times": typed(times)})
    assert len(payload) < DEFAULT_MAX_BODY_BYTES
    response = field_client.post(FORECAST, content=payload, headers=MSGPACK)
    assert response.status_code == 200, response.content[:300]
    answer = from_typed(msgpack.unpackb(response.content)["states"])
    # The same query as JSON: both codecs carry float32 losslessly, so the bits agree.
    again = field_client.post(FORECAST, json={"state": batch.tolist(), "times": times.tolist()})
    assert np.asarray(again.json()["states"], np.float32).tobytes() == answer.tobytes()
    # Against the Python API: equal within 1 ulp, not bit for bit. Decoding 32 rows runs under
    # the thread policy (BLAS held at one thread); with OpenBLAS the last bit of a few of the
    # 10^4-long sums still depends on the calling thread (observed: 35 of 320,000 values).
    expected = direct(stepper.forecast, batch, times)
    assert answer.shape == (4, 8, DIM)
    np.testing.assert_array_max_ulp(answer, expected, maxulp=1)
    for index in (0, 2, 3):  # grid times: exact up to float32 rounding (0.35 interpolates)
        np.testing.assert_allclose(answer[index], exact(batch, times[index]), atol=5e-4)


def test_binary_tensors_of_fields_equal_the_runtime_bitwise(field_client, stepper):
    batch = states(16)
    header = json.dumps({
        "inputs": [
            {"name": "state", "shape": list(batch.shape), "datatype": "FP32",
             "parameters": {"binary_data_size": batch.nbytes}},
            {"name": "t", "shape": [1], "datatype": "FP64", "parameters": {"binary_data_size": 8}},
        ],
        "outputs": [{"name": "state", "parameters": {"binary_data": True}}],
    }).encode()
    body = header + batch.tobytes() + np.asarray([2.4], "<f8").tobytes()
    assert len(body) < DEFAULT_MAX_BODY_BYTES
    response = field_client.post(INFER, content=body,
                                 headers={"Inference-Header-Content-Length": str(len(header))})
    assert response.status_code == 200, response.content[:300]
    length = int(response.headers["inference-header-content-length"])
    assert response.content[length:] == direct(stepper.advance, batch, 2.4).tobytes()


def test_off_subspace_fields_are_reported_over_http(field_client):
    state = states(1)[0]
    state[1234] += 30.0  # a spike the smooth basis cannot hold
    response = field_client.post(ADVANCE, json={"state": state.tolist(), "t": 0.8})
    assert response.status_code == 200
    [finding] = [f for f in response.json()["findings"] if f["kind"] == "off_subspace"]
    assert finding["components"][0] == "u1234"


@pytest.mark.parametrize(("encoding", "capacity"), [("json", 20), ("binary", 100)])
def test_default_body_limit_carries_the_documented_batches(encoding, capacity):
    # docs/http-api.md ("Large states") promises these batch sizes of 10^4-component float32
    # states within the default 4 MiB; JSON numbers are the shortest repr of each float32
    # value's double (Python's float repr, common practice in JSON encoders).
    batch = (states(capacity) * np.float32(1.0 + 1e-7)).astype("<f4")  # full-length digits
    if encoding == "json":
        size = len(json.dumps({"state": batch.tolist(), "t": 1.0}).encode())
    else:
        size = batch.nbytes + 512  # raw bytes and a header
    assert size <= DEFAULT_MAX_BODY_BYTES
