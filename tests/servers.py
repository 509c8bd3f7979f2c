"""Test-only helpers for real server processes: a free port, waiting until ready, stopping,
and the container recipe's start command.

Shared by tests/service, tests/deploy and tests/reliability (test files never import one
another).
"""

from __future__ import annotations

import json
import signal
import socket
import subprocess
import time
from pathlib import Path

import httpx
import pytest

SHUTDOWN_SECONDS = 20
DEPLOY = Path(__file__).resolve().parents[1] / "deploy"
# Where deploy/'s manifests mount the bundle folder in the container.
MOUNT = "/mnt/models"


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago (the kernel's pick for port 0)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def wait_ready(process: subprocess.Popen, base: str, *, seconds: float,
               path: str = "/readyz") -> None:
    """Poll `base + path` until it answers 200; fail the test if the process exits first or
    the time runs out (the process is then stopped)."""
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if process.poll() is not None:
            errors = process.stderr.read().decode(errors="replace") if process.stderr else ""
            pytest.fail(f"the server exited early: {errors}")
        try:
            if httpx.get(f"{base}{path}", timeout=1.0).status_code == 200:
                return
        except httpx.TransportError:
            pass
        time.sleep(0.1)
    stop(process)
    pytest.fail("the server did not become ready in time")


def stop(process: subprocess.Popen, *, seconds: float = SHUTDOWN_SECONDS) -> int:
    """Interrupt the server (as Ctrl-C does) and return its exit code; kill it and fail the
    test if it does not shut down within `seconds`."""
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
