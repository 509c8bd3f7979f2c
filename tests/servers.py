"""Shared helpers for tests that start a real server process: a free port, waiting until it is
ready, a clean stop, and the container recipe's start command."""

from __future__ import annotations

import json
import signal
import socket
import subprocess
import time
from pathlib import Path

import httpx
import pytest

SHUTDOWN_SECONDS = 15
DEPLOY = Path(__file__).resolve().parents[1] / "deploy"
# Where deploy/'s manifests mount the bundle folder in the container.
MOUNT = "/mnt/models"


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def wait_ready(process, base: str, *, seconds: float) -> None:
    """Poll `base`/readyz until it answers 200; fail if the process exits or time runs out."""
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if process.poll() is not None:
            pytest.fail(f"the server exited early: {process.stderr.read().decode()}")
        try:
            if httpx.get(f"{base}/readyz", timeout=1.0).status_code == 200:
                return
        except httpx.TransportError:
            pass
        time.sleep(0.1)
    stop(process)
    pytest.fail("the server did not become ready in time")


def stop(process, *, seconds: float = SHUTDOWN_SECONDS) -> int:
    process.send_signal(signal.SIGINT)
    try:
        return process.wait(timeout=seconds)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait(timeout=5)
        pytest.fail("the server did not shut down within its bound")


def container_start_command() -> list[str]:
    """The ENTRYPOINT of deploy/Containerfile (exec form, JSON)."""
    text = (DEPLOY / "Containerfile").read_text()
    (line,) = [line for line in text.splitlines() if line.startswith("ENTRYPOINT")]
    return json.loads(line.removeprefix("ENTRYPOINT"))
