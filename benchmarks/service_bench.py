"""HTTP service throughput and latency, against the in-process runtime call.

``python -m stridecast.benchmarks.service_bench BUNDLE [--quick] [--json FILE]`` starts
`stridecast.service.serve` in a subprocess on 127.0.0.1 (a free port), then times
`POST /v1/models/{name}/advance` for batches of 1 and 256 states, 1, 8 and 32 concurrent
clients, JSON and MessagePack bodies, in bounded loops (a time budget and a request cap per
cell). `Stepper.advance` on the same input, in this process, is the floor the service adds to.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import socket
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import httpx
import msgpack
import numpy as np

from stridecast.runtime import load

from .timing import Budget, format_rate, format_seconds, interleaved, summary

BATCHES = (1, 256)
CONCURRENCY = (1, 8, 32)
ENCODINGS = ("json", "msgpack")
STARTUP_SECONDS = 60
SERVE = ("import sys; from stridecast.service import serve; "
         "serve([sys.argv[2]], host='127.0.0.1', port=int(sys.argv[1]), log_level='warning')")


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _start_server(bundle: Path) -> tuple[subprocess.Popen, str]:
    port = _free_port()
    process = subprocess.Popen([sys.executable, "-c", SERVE, str(port), str(bundle)],
                               stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    base = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + STARTUP_SECONDS
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"the server exited: {process.stderr.read().decode()}")
        try:
            if httpx.get(f"{base}/readyz", timeout=1.0).status_code == 200:
                return process, base
        except httpx.TransportError:
            time.sleep(0.1)
    process.terminate()
    raise RuntimeError("the server did not become ready in time")


def _states(stepper, batch: int) -> np.ndarray:
    # Around the normalisation mean, which lies inside any sensible training envelope.
    generator = np.random.default_rng(0)
    mean = np.asarray(stepper.manifest.mean)
    scale = np.asarray(stepper.manifest.scale)
    return (mean + 0.1 * scale * generator.standard_normal((batch, stepper.state_dim))
            ).astype(stepper.dtype)


def _request(encoding: str, states: np.ndarray, t: float) -> tuple[bytes, dict[str, str]]:
    if encoding == "msgpack":
        typed = {"dtype": states.dtype.str, "shape": list(states.shape), "data": states.tobytes()}
        return (msgpack.packb({"state": typed, "t": t}),
                {"content-type": "application/msgpack", "accept": "application/msgpack"})
    return (json.dumps({"state": states.tolist(), "t": t}).encode(),
            {"content-type": "application/json"})


async def _drive(url: str, body: bytes, headers: dict[str, str], concurrency: int,
                 budget: Budget) -> tuple[np.ndarray, float]:
    """`concurrency` clients post `body` until the budget is spent; latencies and wall time."""
    latencies: list[float] = []
    limits = httpx.Limits(max_connections=concurrency, max_keepalive_connections=concurrency)
    async with httpx.AsyncClient(limits=limits, timeout=30.0) as client:
        for _ in range(budget.warmup):
            (await client.post(url, content=body, headers=headers)).raise_for_status()
        start = time.perf_counter()

        async def worker() -> None:
            while (len(latencies) < budget.max_rounds
                   and (len(latencies) < budget.min_rounds
                        or time.perf_counter() - start < budget.seconds)):
                begin = time.perf_counter()
                response = await client.post(url, content=body, headers=headers)
                response.raise_for_status()
                if headers.get("accept") == "application/msgpack":
                    msgpack.unpackb(response.content)
                else:
                    response.json()
                latencies.append(time.perf_counter() - begin)

        await asyncio.gather(*(worker() for _ in range(concurrency)))
        elapsed = time.perf_counter() - start
    return np.asarray(latencies), elapsed


def run(bundle: Path, *, quick: bool = False) -> list[dict[str, Any]]:
    """Measure every (batch, encoding, concurrency) cell and the in-process floor."""
    bundle = Path(bundle)
    stepper = load(bundle)
    name = bundle.resolve().name
    t = 100 * stepper.base_step  # a grid time: the plan is the same for every request
    budget = (Budget(seconds=0.5, min_rounds=20, max_rounds=500, warmup=5) if quick
              else Budget(seconds=2.0, min_rounds=50, max_rounds=5000, warmup=20))
    rows: list[dict[str, Any]] = []
    process, base = _start_server(bundle)
    try:
        url = f"{base}/v1/models/{name}/advance"
        for batch in BATCHES:
            states = _states(stepper, batch)
            floor = interleaved({"runtime": lambda states=states: stepper.advance(states, t)},
                                budget)["runtime"]
            rows.append({"batch": batch, "encoding": "in-process", "concurrency": 1,
                         "requests_per_second": 1.0 / float(np.mean(floor)), **summary(floor)})
            for encoding in ENCODINGS:
                body, headers = _request(encoding, states, t)
                for concurrency in CONCURRENCY:
                    latencies, elapsed = asyncio.run(
                        _drive(url, body, headers, concurrency, budget))
                    rows.append({"batch": batch, "encoding": encoding,
                                 "concurrency": concurrency,
                                 "requests_per_second": latencies.size / elapsed,
                                 **summary(latencies)})
    finally:
        process.terminate()
        process.wait(timeout=30)
    return rows


def to_markdown(rows: list[dict[str, Any]]) -> str:
    lines = ["| batch | encoding | clients | requests/s | p50 | p99 |",
             "|---:|---|---:|---:|---:|---:|"]
    for row in rows:
        lines.append(f"| {row['batch']} | {row['encoding']} | {row['concurrency']} | "
                     f"{format_rate(row['requests_per_second'])} | {format_seconds(row['p50'])} | "
                     f"{format_seconds(row['p99'])} |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description=__doc__.splitlines()[0],
        epilog="example:\n"
               "  python -m stridecast.benchmarks.service_bench crane-demo.bundle --quick",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("bundle", type=Path, help="bundle directory to serve")
    parser.add_argument("--quick", action="store_true", help="short budgets (a smoke run)")
    parser.add_argument("--json", type=Path, help="also write the rows as JSON")
    arguments = parser.parse_args(argv)
    rows = run(arguments.bundle, quick=arguments.quick)
    print(to_markdown(rows))
    if arguments.json:
        arguments.json.write_text(json.dumps(rows, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
