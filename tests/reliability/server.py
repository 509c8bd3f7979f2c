"""A real uvicorn process on 127.0.0.1 for the service reliability tests, and ways to poke it.

The server is started the way operators start it (`uvicorn --factory` over
`app_from_environment`, settings from `STRIDECAST_*` variables), so its memory can be read from
/proc and a crash would be visible as an exited process.
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import httpx
import pytest

from tests.servers import free_port, stop

STARTUP_SECONDS = 60
FACTORY = "stridecast.service.app:app_from_environment"


@dataclass
class Server:
    """A running server: its base URL, port and process."""

    base: str
    port: int
    process: subprocess.Popen
    log: Path
    ready_rss: int = 0

    def rss_bytes(self) -> int:
        """Resident set size of the server process (VmRSS in /proc/PID/status)."""
        for line in Path(f"/proc/{self.process.pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
        raise RuntimeError("VmRSS missing from /proc status")

    def alive(self) -> bool:
        return self.process.poll() is None

    def healthy(self) -> bool:
        try:
            return httpx.get(f"{self.base}/healthz", timeout=5.0).status_code == 200
        except httpx.TransportError:
            return False

    def connect(self, timeout: float = 10.0) -> socket.socket:
        connection = socket.create_connection(("127.0.0.1", self.port), timeout=timeout)
        connection.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        return connection

    def errors_logged(self) -> str:
        return self.log.read_text(errors="replace")


@contextmanager
def running_server(models: dict[str, Path], log: Path, **settings) -> Iterator[Server]:
    """Start uvicorn serving `models` with `settings` (Settings field names), yield, stop."""
    port = free_port()
    environment = dict(os.environ)
    environment["STRIDECAST_MODELS"] = json.dumps([str(path) for path in models.values()])
    for name, value in settings.items():
        environment[f"STRIDECAST_{name.upper()}"] = str(value)
    with open(log, "wb") as sink:
        process = subprocess.Popen(
            [sys.executable, "-m", "uvicorn", "--factory", FACTORY, "--host", "127.0.0.1",
             "--port", str(port), "--log-level", "warning", "--no-access-log"],
            env=environment, stdout=sink, stderr=subprocess.STDOUT)
    server = Server(f"http://127.0.0.1:{port}", port, process, log)
    try:
        deadline = time.monotonic() + STARTUP_SECONDS
        while True:
            if not server.alive():
                pytest.fail(f"the server exited early: {server.errors_logged()}")
            try:
                if httpx.get(f"{server.base}/readyz", timeout=1.0).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline:
                pytest.fail("the server did not become ready in time")
            time.sleep(0.1)
        server.ready_rss = server.rss_bytes()
        yield server
    finally:
        if server.alive():
            stop(process)


def read_response(connection: socket.socket, timeout: float = 10.0) -> tuple[int | None, bytes]:
    """Read one HTTP/1.1 response (status, body) from a raw socket; (None, b"") if closed."""
    connection.settimeout(timeout)
    data = b""
    while b"\r\n\r\n" not in data:
        chunk = connection.recv(65536)
        if not chunk:
            return None, b""
        data += chunk
    head, _, body = data.partition(b"\r\n\r\n")
    status = int(head.split(b" ", 2)[1])
    length = None
    for line in head.split(b"\r\n")[1:]:
        name, _, value = line.partition(b":")
        if name.strip().lower() == b"content-length":
            length = int(value.strip())
    while length is not None and len(body) < length:
        chunk = connection.recv(65536)
        if not chunk:
            break
        body += chunk
    return status, body[:length] if length is not None else body


def request_head(path: str, port: int, headers: dict[str, str]) -> bytes:
    lines = [f"POST {path} HTTP/1.1", f"Host: 127.0.0.1:{port}"]
    lines += [f"{name}: {value}" for name, value in headers.items()]
    return ("\r\n".join(lines) + "\r\n\r\n").encode()
