"""Stock open-inference-protocol clients from the package index, unmodified, against the service.

The clients are tritonclient's HTTP (sync and asyncio) and gRPC clients. What they send and
expect is fixed by the documents the service follows:
- kserve/open-inference-protocol, specification/protocol/inference_rest.md (REST objects),
- its inference_grpc.md and open_inference_grpc.proto (gRPC service and messages),
- the binary tensor data extension (Triton's protocol/extension_binary_data.md; KServe's
  "Binary Tensor Data Extension" page).
Expected numbers: the Python API (`stridecast.runtime.load(...).advance`), bit for bit.
"""

from __future__ import annotations

import asyncio
import threading
import time
from collections.abc import Iterator

import grpc
import numpy as np
import pytest
import tritonclient.grpc as grpcclient
import tritonclient.grpc.aio as grpcclient_aio
import tritonclient.http as httpclient
import tritonclient.http.aio as httpclient_aio
import uvicorn
from tritonclient.grpc import service_pb2, service_pb2_grpc
from tritonclient.utils import InferenceServerException

from stridecast.service import Settings, create_app
from tests.servers import free_port

MODEL = "oscillator"
TOKEN = "client-test-token"
BATCHES = (1, 64)


class ServerThread:
    """uvicorn serving the app on 127.0.0.1 in a thread, with gRPC beside it."""

    def __init__(self, models_dir, **settings):
        self.app = create_app([models_dir], Settings(grpc_port=0, **settings))
        self.port = free_port()
        self.server = uvicorn.Server(uvicorn.Config(self.app, host="127.0.0.1", port=self.port,
                                                    log_level="warning"))
        self.thread = threading.Thread(target=self.server.run, daemon=True)

    def __enter__(self) -> ServerThread:
        self.thread.start()
        deadline = time.monotonic() + 30
        while not self.server.started:
            if time.monotonic() > deadline or not self.thread.is_alive():
                raise RuntimeError("the test server did not start")
            time.sleep(0.02)
        return self

    def __exit__(self, *exc) -> None:
        self.server.should_exit = True
        self.thread.join(timeout=30)

    @property
    def http_url(self) -> str:
        return f"127.0.0.1:{self.port}"

    @property
    def grpc_url(self) -> str:
        return f"127.0.0.1:{self.app.state.grpc_port}"


@pytest.fixture(scope="module")
def served(models_dir) -> Iterator[ServerThread]:
    with ServerThread(models_dir) as server:
        yield server


@pytest.fixture(scope="module")
def served_with_token(models_dir) -> Iterator[ServerThread]:
    with ServerThread(models_dir, token=TOKEN) as server:
        yield server


def _states(batch: int) -> np.ndarray:
    generator = np.random.default_rng(batch)
    return generator.uniform(-1.0, 1.0, size=(batch, 2)).astype(np.float32)


def _times(batch: int) -> np.ndarray:
    # One time per state, on and off the base-step grid (0.05 s).
    return np.round(np.linspace(0.0, 3.0, batch) + (np.arange(batch) % 3) * 0.013, 6)


def _expected(stepper, states: np.ndarray, times: np.ndarray) -> np.ndarray:
    """The Python API's answer, row by row (each state to its own time)."""
    return np.concatenate([stepper.advance(states[row:row + 1], float(times[row]))
                           for row in range(states.shape[0])])


def _http_inputs(module, states, times, binary: bool):
    state = module.InferInput("state", list(states.shape), "FP32")
    state.set_data_from_numpy(states, binary_data=binary)
    t = module.InferInput("t", list(times.shape), "FP64")
    t.set_data_from_numpy(times, binary_data=binary)
    return [state, t]


@pytest.mark.parametrize("batch", BATCHES)
@pytest.mark.parametrize("binary", [True, False], ids=["binary", "json"])
def test_http_client_per_state_times(served, stepper, batch, binary):
    states, times = _states(batch), _times(batch)
    client = httpclient.InferenceServerClient(served.http_url)
    try:
        assert client.is_server_live() and client.is_server_ready()
        assert client.is_model_ready(MODEL)
        assert "binary_tensor_data" in client.get_server_metadata()["extensions"]
        outputs = [httpclient.InferRequestedOutput("state", binary_data=binary)]
        result = client.infer(MODEL, _http_inputs(httpclient, states, times, binary),
                              outputs=outputs, request_id="r1")
        assert result.get_response()["id"] == "r1"
        assert result.as_numpy("state").tobytes() == _expected(stepper, states, times).tobytes()
        # Without requested outputs the client asks for all outputs in binary
        # (`binary_data_output`); the answer must decode the same.
        default = client.infer(MODEL, _http_inputs(httpclient, states, times, binary))
        assert default.as_numpy("state").tobytes() == result.as_numpy("state").tobytes()
    finally:
        client.close()


@pytest.mark.parametrize("algorithm", ["gzip", "deflate"])
def test_http_client_compressed_request_and_answer(served, stepper, algorithm):
    states, times = _states(64), np.array([1.25])
    client = httpclient.InferenceServerClient(served.http_url)
    try:
        result = client.infer(MODEL, _http_inputs(httpclient, states, times, True),
                              request_compression_algorithm=algorithm,
                              response_compression_algorithm=algorithm)
        assert result.as_numpy("state").tobytes() == stepper.advance(states, 1.25).tobytes()
    finally:
        client.close()


@pytest.mark.parametrize("binary", [True, False], ids=["binary", "json"])
def test_async_http_client(served, stepper, binary):
    states, times = _states(64), _times(64)

    async def run() -> np.ndarray:
        client = httpclient_aio.InferenceServerClient(served.http_url)
        try:
            assert await client.is_model_ready(MODEL)
            metadata = await client.get_model_metadata(MODEL)
            assert metadata["inputs"][0]["shape"] == [-1, 2]
            outputs = [httpclient_aio.InferRequestedOutput("state", binary_data=binary)]
            result = await client.infer(
                MODEL, _http_inputs(httpclient_aio, states, times, binary), outputs=outputs)
            return result.as_numpy("state")
        finally:
            await client.close()

    answer = asyncio.run(run())
    assert answer.tobytes() == _expected(stepper, states, times).tobytes()


def _grpc_inputs(module, states, times):
    state = module.InferInput("state", list(states.shape), "FP32")
    state.set_data_from_numpy(states)
    t = module.InferInput("t", list(times.shape), "FP64")
    t.set_data_from_numpy(times)
    return [state, t]


@pytest.mark.parametrize("batch", BATCHES)
def test_grpc_client_per_state_times(served, stepper, batch):
    states, times = _states(batch), _times(batch)
    client = grpcclient.InferenceServerClient(served.grpc_url)
    try:
        assert client.is_server_live() and client.is_server_ready()
        assert client.is_model_ready(MODEL)
        assert "binary_tensor_data" in client.get_server_metadata().extensions
        metadata = client.get_model_metadata(MODEL)
        assert [list(tensor.shape) for tensor in metadata.inputs] == [[-1, 2], [-1]]
        result = client.infer(MODEL, _grpc_inputs(grpcclient, states, times), request_id="g1",
                              outputs=[grpcclient.InferRequestedOutput("state")])
        assert result.get_response().id == "g1"
        assert result.as_numpy("state").tobytes() == _expected(stepper, states, times).tobytes()
    finally:
        client.close()


def test_async_grpc_client(served, stepper):
    states, times = _states(64), np.array([2.0])

    async def run() -> np.ndarray:
        async with grpcclient_aio.InferenceServerClient(served.grpc_url) as client:
            result = await client.infer(MODEL, _grpc_inputs(grpcclient_aio, states, times))
            return result.as_numpy("state")

    assert asyncio.run(run()).tobytes() == stepper.advance(states, 2.0).tobytes()


def test_grpc_typed_contents_with_the_clients_own_stub(served, stepper):
    # The protocol's other tensor form: typed `contents` instead of raw bytes (the .proto's
    # InferTensorContents), sent with the client library's generated stub and messages.
    states = _states(3)
    request = service_pb2.ModelInferRequest(model_name=MODEL)
    state = request.inputs.add(name="state", datatype="FP32", shape=[3, 2])
    state.contents.fp32_contents.extend(states.reshape(-1).tolist())
    t = request.inputs.add(name="t", datatype="FP64", shape=[1])
    t.contents.fp64_contents.append(0.75)
    with grpc.insecure_channel(served.grpc_url) as channel:
        response = service_pb2_grpc.GRPCInferenceServiceStub(channel).ModelInfer(request)
    (output,) = response.outputs
    assert list(output.shape) == [3, 2] and output.datatype == "FP32"
    assert response.raw_output_contents[0] == stepper.advance(states, 0.75).tobytes()


def test_grpc_errors_carry_the_services_messages(served):
    client = grpcclient.InferenceServerClient(served.grpc_url)
    try:
        with pytest.raises(InferenceServerException, match="no served model 'nothing'"):
            client.get_model_metadata("nothing")
        bad = grpcclient.InferInput("state", [1, 3], "FP32")
        bad.set_data_from_numpy(np.zeros((1, 3), np.float32))
        t = grpcclient.InferInput("t", [1], "FP64")
        t.set_data_from_numpy(np.array([1.0]))
        refused = r"`inputs\['state'\]` has shape \(1, 3\); this bundle's state has 2"
        with pytest.raises(InferenceServerException, match=refused) as error:
            client.infer(MODEL, [bad, t])
        assert error.value.status() == "StatusCode.INVALID_ARGUMENT"
    finally:
        client.close()


def test_token_is_required_on_both_transports(served_with_token, stepper):
    states, times = _states(1), np.array([1.0])
    header = {"authorization": f"Bearer {TOKEN}"}
    grpc_client = grpcclient.InferenceServerClient(served_with_token.grpc_url)
    http_client = httpclient.InferenceServerClient(served_with_token.http_url)
    try:
        with pytest.raises(InferenceServerException, match="authorization") as error:
            grpc_client.infer(MODEL, _grpc_inputs(grpcclient, states, times))
        assert error.value.status() == "StatusCode.UNAUTHENTICATED"
        answer = grpc_client.infer(MODEL, _grpc_inputs(grpcclient, states, times),
                                   headers=header).as_numpy("state")
        assert answer.tobytes() == stepper.advance(states, 1.0).tobytes()
        with pytest.raises(InferenceServerException, match="Bearer"):
            http_client.infer(MODEL, _http_inputs(httpclient, states, times, True))
        answer = http_client.infer(MODEL, _http_inputs(httpclient, states, times, True),
                                   headers=header).as_numpy("state")
        assert answer.tobytes() == stepper.advance(states, 1.0).tobytes()
    finally:
        grpc_client.close()
        http_client.close()


def test_grpc_calls_appear_in_the_metrics(served):
    client = grpcclient.InferenceServerClient(served.grpc_url)
    try:
        client.infer(MODEL, _grpc_inputs(grpcclient, _states(2), np.array([0.5])))
    finally:
        client.close()
    import httpx

    text = httpx.get(f"http://{served.http_url}/metrics").text
    assert ('stridecast_http_requests_total{method="GRPC",model="oscillator",'
            'route="/inference.GRPCInferenceService/ModelInfer",status="OK"}') in text
    assert 'stridecast_network_evaluations_total{model="oscillator",route="infer"}' in text
