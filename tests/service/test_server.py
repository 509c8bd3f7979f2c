"""A real uvicorn process on 127.0.0.1, started by `serve`, queried over HTTP, shut down cleanly.

Expected numbers: the runtime called in this process on the same input (bitwise).
"""

from __future__ import annotations

import select
import socket
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


def test_413_reaches_a_client_still_trickling_a_chunked_body(models_dir, token_file):
    # RFC 9112 §7.1 (chunked transfer coding) and RFC 9110 §15.5.14 (413: the server may close
    # the connection to stop the client sending): the answer must reach a client that is still
    # sending, not wait for a body that never ends.
    process, base = start(models_dir, token_file)
    port = int(base.rsplit(":", 1)[1])
    piece, pieces = b" " * 256, 256  # 64 KiB of JSON whitespace against a 4 KiB limit
    chunk = f"{len(piece):x}\r\n".encode() + piece + b"\r\n"
    head = (b"POST /v1/models/oscillator/advance HTTP/1.1\r\nHost: 127.0.0.1\r\n"
            b"Authorization: Bearer tok-123\r\nContent-Type: application/json\r\n"
            b"Transfer-Encoding: chunked\r\n\r\n")
    sent = 0
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=30) as connection:
            connection.sendall(head)
            # One chunk at a time with a pause, until the answer is readable: a trickle.
            while sent < pieces and not select.select([connection], [], [], 0.02)[0]:
                connection.sendall(chunk)
                sent += 1
            answer = b""
            while b"\r\n\r\n" not in answer:
                data = connection.recv(65536)
                if not data:
                    break
                answer += data
    finally:
        code = stop(process)
    status_line, _, rest = answer.partition(b"\r\n")
    assert status_line.split()[1] == b"413", answer
    assert b"connection: close" in rest.lower()
    # Answered after the limit was passed and long before the body's end (its last chunk and
    # the terminating zero-size chunk were never sent).
    assert 4096 // len(piece) <= sent < pieces
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


def test_one_process_serves_the_models_it_checked_without_loading_them_again(
        models_dir, monkeypatch):
    # serve() loads every bundle once to check it before starting; with one process the app
    # must serve that registry, not read and verify each bundle a second time.
    from fastapi.testclient import TestClient

    from stridecast.service import app as app_module
    from stridecast.service import registry as registry_module
    from stridecast.service import server

    loads = []
    real = registry_module.load_registry

    def counting(*arguments, **options):
        loads.append(1)
        return real(*arguments, **options)

    apps = []
    monkeypatch.setattr(server, "load_registry", counting)
    monkeypatch.setattr(app_module, "load_registry", counting)
    monkeypatch.setattr(server.uvicorn, "run", lambda app, **options: apps.append(app))
    server.serve([models_dir], port=free_port())
    (app,) = apps
    with TestClient(app) as client:
        names = [model["name"] for model in client.get("/v1/models").json()["models"]]
    assert names and loads == [1]
