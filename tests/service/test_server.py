"""A real uvicorn process on 127.0.0.1, started by `serve`, queried over HTTP, shut down cleanly.

Expected numbers: the runtime called in this process on the same input (bitwise).
"""

from __future__ import annotations

import subprocess
import sys

import httpx
import msgpack
import numpy as np
import pytest

from tests.servers import free_port, stop, wait_ready

STARTUP_SECONDS = 30
SERVE = ("import sys; from stridecast.service import serve; "
         "serve(sys.argv[4:], host='127.0.0.1', port=int(sys.argv[1]), workers=int(sys.argv[2]), "
         "token_file=sys.argv[3], log_level='warning', max_body_bytes=4096)")


def start(models, token_file, *, workers: int = 1):
    port = free_port()
    process = subprocess.Popen(
        [sys.executable, "-c", SERVE, str(port), str(workers), str(token_file), str(models)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    base = f"http://127.0.0.1:{port}"
    wait_ready(process, base, seconds=STARTUP_SECONDS)
    return process, base




@pytest.fixture
def token_file(tmp_path):
    path = tmp_path / "token"
    path.write_text("tok-123\n")
    return path


def test_uvicorn_process_answers_and_shuts_down(models_dir, token_file, stepper):
    process, base = start(models_dir, token_file)
    auth = {"authorization": "Bearer tok-123"}
    try:
        with httpx.Client(base_url=base, timeout=10.0) as http:
            assert http.get("/healthz").json() == {"status": "ok"}
            names = {m["name"]: m["ready"] for m in http.get("/v1/models").json()["models"]}
            assert names == {"oscillator": True, "broken": False}

            state = [[1.0, 0.0], [0.2, -0.4]]
            assert http.post("/v1/models/oscillator/advance",
                             json={"state": state, "t": 1.2}).status_code == 401
            answer = http.post("/v1/models/oscillator/advance", json={"state": state, "t": 1.2},
                               headers=auth)
            assert answer.status_code == 200
            direct = stepper.advance(np.asarray(state, dtype=np.float32), 1.2)
            # Expected: the runtime in this process, bitwise.
            assert np.asarray(answer.json()["state"], np.float32).tobytes() == direct.tobytes()

            packed = http.post("/v1/models/oscillator/forecast",
                               content=msgpack.packb({"state": state, "times": [0.5, 1.2]}),
                               headers={**auth, "content-type": "application/msgpack",
                                        "accept": "application/msgpack"})
            states = msgpack.unpackb(packed.content)["states"]
            assert np.frombuffer(states["data"], "<f4").reshape(states["shape"])[1].tobytes() \
                == direct.tobytes()

            def chunks():
                for _ in range(10):
                    yield b" " * 1000

            # Chunked transfer (no Content-Length), cut off while reading.
            too_big = http.post("/v1/models/oscillator/advance", content=chunks(),
                                headers={**auth, "content-type": "application/json"})
            assert too_big.status_code == 413

            metrics = http.get("/metrics").text
            assert 'route="/v1/models/{name}/advance",status="200"' in metrics
    finally:
        code = stop(process)
    assert code == 0, process.stderr.read().decode()


def test_uvicorn_with_two_workers(models_dir, token_file):
    process, base = start(models_dir / "oscillator", token_file, workers=2)
    try:
        answers = [httpx.post(f"{base}/v2/models/oscillator/infer",
                              json={"inputs": [
                                  {"name": "state", "shape": [1, 2], "datatype": "FP32",
                                   "data": [1, 0]},
                                  {"name": "t", "shape": [1], "datatype": "FP64", "data": [1]}]},
                              headers={"authorization": "Bearer tok-123"}, timeout=10.0)
                   for _ in range(4)]
        assert {answer.status_code for answer in answers} == {200}
        assert len({answer.content for answer in answers}) == 1
    finally:
        code = stop(process)
    assert code == 0, process.stderr.read().decode()
