"""Load on a real uvicorn process: concurrent clients for a bounded time, at and past the
service's concurrency limit (`max_concurrency` running + `max_waiting` queued).

Every answer is either a 200 whose states equal the runtime's own answer (bitwise, MessagePack
typed arrays; the expected values come from calling the runtime in this process) or a 503 with
Retry-After (the documented answer past the limit); anything else counts as an error and fails.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field

import httpx
import msgpack
import numpy as np
import pytest

from stridecast.runtime import load
from tests.reliability.server import running_server
from tests.systems import write_oscillator

RUNNING, WAITING = 2, 2
PHASE_SECONDS = 5.0
MAX_REQUESTS_PER_CLIENT = 20_000  # a second bound, should the clock misbehave
BATCH, TIMES = 64, 200
FORECAST = "/v1/models/oscillator/forecast"
# See test_service_input.py: pymalloc keeps freed arenas, so RSS is checked against a bound.
RSS_GROWTH_BOUND = 64 * 1024 * 1024


@dataclass
class Tally:
    """What the clients of one phase saw."""

    latencies: list[float] = field(default_factory=list)
    overloaded: list[float] = field(default_factory=list)
    errors: list[str] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)


def request_body() -> bytes:
    rng = np.random.default_rng(3)
    state = rng.uniform(-1, 1, (BATCH, 2)).round(3).tolist()
    times = (np.arange(1, TIMES + 1) * 0.05).round(2).tolist()
    return msgpack.packb({"state": state, "times": times})


@pytest.fixture(scope="module")
def bundle(tmp_path_factory):
    return write_oscillator(tmp_path_factory.mktemp("load") / "oscillator")


@pytest.fixture(scope="module")
def expected(bundle) -> bytes:
    document = msgpack.unpackb(request_body())
    # Expected: the runtime in this process, same bundle and request.
    states = load(bundle).forecast(np.asarray(document["state"], np.float32),
                                   document["times"])
    return states.astype("<f4").tobytes()


@pytest.fixture(scope="module")
def server(bundle, tmp_path_factory):
    log = tmp_path_factory.mktemp("logs") / "load.log"
    with running_server({"oscillator": bundle}, log, max_concurrency=RUNNING,
                        max_waiting=WAITING, request_timeout=10) as running:
        yield running


def run_phase(server, clients: int, expected: bytes) -> Tally:
    tally = Tally()
    body = request_body()
    headers = {"content-type": "application/msgpack", "accept": "application/msgpack"}
    start = threading.Barrier(clients)
    deadline = [0.0]

    def client() -> None:
        with httpx.Client(base_url=server.base, timeout=30.0, headers=headers) as http:
            start.wait(timeout=30)
            deadline[0] = deadline[0] or time.monotonic() + PHASE_SECONDS
            for _ in range(MAX_REQUESTS_PER_CLIENT):
                if time.monotonic() > deadline[0]:
                    return
                began = time.perf_counter()
                try:
                    response = http.post(FORECAST, content=body)
                except httpx.HTTPError as error:
                    with tally.lock:
                        tally.errors.append(f"transport: {error!r}")
                    continue
                elapsed = time.perf_counter() - began
                with tally.lock:
                    if response.status_code == 200:
                        states = msgpack.unpackb(response.content)["states"]
                        if states["data"] != expected:
                            tally.errors.append("a 200 with different states")
                        tally.latencies.append(elapsed)
                    elif response.status_code == 503 and response.headers.get("retry-after"):
                        tally.overloaded.append(elapsed)
                    else:
                        tally.errors.append(f"status {response.status_code}")

    threads = [threading.Thread(target=client) for _ in range(clients)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=PHASE_SECONDS + 60)
    assert not any(thread.is_alive() for thread in threads), "a client did not stop"
    return tally


def milliseconds(values: list[float], percentile: float) -> str:
    return f"{np.percentile(values, percentile) * 1000:.1f}" if values else "–"


@pytest.mark.slow
@pytest.mark.parametrize(("clients", "label"), [
    (RUNNING + WAITING, "at the limit"), (8 * (RUNNING + WAITING), "8× past the limit")])
def test_concurrent_clients_get_answers_or_503(server, expected, reliability, clients, label):
    before = server.rss_bytes()
    tally = run_phase(server, clients, expected)
    growth = server.rss_bytes() - before
    assert tally.errors == []
    assert tally.latencies, "no request was served"
    if clients <= RUNNING + WAITING:
        # Each client waits for its answer, so at most running + waiting are ever admitted.
        assert tally.overloaded == []
    assert growth <= RSS_GROWTH_BOUND
    assert server.alive() and server.healthy()
    served = len(tally.latencies)
    reliability.record(
        "Service: load", f"{clients} concurrent clients for {PHASE_SECONDS:.0f} s, {label} "
        f"(running {RUNNING} + waiting {WAITING}); forecasts of {BATCH} states × {TIMES} times, "
        "MessagePack", served + len(tally.overloaded),
        f"{served:,} served (p50 {milliseconds(tally.latencies, 50)} ms, p99 "
        f"{milliseconds(tally.latencies, 99)} ms), {len(tally.overloaded):,} × 503 "
        f"(p99 {milliseconds(tally.overloaded, 99)} ms), 0 errors, all 200s equal to the "
        f"runtime's answer; RSS {growth / 2**20:+.1f} MiB",
        summary=(f"{clients} clients past the concurrency limit: 0 errors, "
                 f"{len(tally.overloaded):,} × 503, p99 {milliseconds(tally.latencies, 99)} ms"
                 if clients > RUNNING + WAITING else ""),
    )
