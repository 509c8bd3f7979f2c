"""The container's start command, run here, and `serve --workers 2` under a concurrent load.

There is no container engine on the project's machines, so the image itself is not built in
tests; what is run is the exact ENTRYPOINT of deploy/Containerfile (bundle folder and port
swapped for a temporary folder and a free port).
Expected numbers: the runtime called in this process on the same input; float32 products may
round differently with the server's BLAS thread count, hence a float32-sized tolerance.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from stridecast import demo_bundle
from stridecast.runtime import load
from tests.servers import MOUNT, container_start_command, free_port, stop, wait_ready

DEMO_BUNDLE = demo_bundle()

httpx = pytest.importorskip("httpx")
STARTUP_SECONDS = 60


def start(command: list[str]):
    port = command[command.index("--port") + 1]
    process = subprocess.Popen([sys.executable, "-m", *command], stdout=subprocess.DEVNULL,
                               stderr=subprocess.PIPE)
    base = f"http://127.0.0.1:{port}"
    wait_ready(process, base, seconds=STARTUP_SECONDS)
    return process, base


def command_for(models, *, workers: int | None = None) -> list[str]:
    command = [str(models) if part == MOUNT else part for part in container_start_command()]
    command[command.index("--port") + 1] = str(free_port())
    if workers is not None:
        command[command.index("--workers") + 1] = str(workers)
    assert command[0] == "stridecast"  # run as `python -m stridecast ...`, the same program
    return command


@pytest.fixture(scope="module")
def models(tmp_path_factory):
    folder = tmp_path_factory.mktemp("models")
    shutil.copytree(DEMO_BUNDLE, folder / "crane-demo")
    return folder


def test_the_container_start_command_serves_the_mounted_bundles(models):
    command = command_for(models)
    process, base = start(command)
    try:
        listed = httpx.get(f"{base}/v2/models/crane-demo", timeout=5).json()
        assert listed["name"] == "crane-demo"
        assert httpx.get(f"{base}/v2/health/ready", timeout=5).status_code == 200
    finally:
        stop(process, seconds=20)


def test_two_workers_behind_one_port_answer_every_request(models):
    stepper = load(DEMO_BUNDLE)
    rng = np.random.default_rng(11)
    states = np.array([3.0, -24.0, 0.0, 0.0]) + rng.normal(size=(64, 4)) * [1, 0.05, 0.5, 0.1]
    process, base = start(command_for(models, workers=2))

    def ask(http, index: int):
        response = http.post("/v1/models/crane-demo/advance",
                             json={"state": states[index].tolist(), "t": 4.0})
        return index, response.status_code, response.json()

    try:
        # Fresh connections per request group so the kernel spreads them over both workers.
        with httpx.Client(base_url=base, timeout=30,
                          limits=httpx.Limits(max_keepalive_connections=0)) as http, \
                ThreadPoolExecutor(max_workers=16) as pool:
            answers = list(pool.map(lambda index: ask(http, index), range(len(states))))
    finally:
        stop(process, seconds=20)
    assert [status for _, status, _ in answers] == [200] * len(states)
    expected = stepper.advance(states.astype(np.float32), 4.0)
    got = np.array([body["state"] for _, _, body in sorted(answers, key=lambda a: a[0])])
    np.testing.assert_allclose(got, expected, rtol=1e-6, atol=1e-5)
