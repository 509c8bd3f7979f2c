"""Service throughput and latency per wire format, against the same answer computed in process.

``python -m stridecast.benchmarks.service_bench BUNDLE [--quick] [--json FILE] [--markdown FILE]``
starts the
service in a subprocess on 127.0.0.1 (free ports, HTTP and gRPC) and times the open inference
protocol's `infer` for batches of 1 and 64 states, 1 and 8 concurrent clients, with four
encodings side by side: JSON, MessagePack, the binary tensor data extension, and gRPC (raw
tensor contents). It does so under uvicorn's pure-Python stack (asyncio + h11) and under
uvloop + httptools, both serving at once and taking turns on each cell, to show whether they
help. The floors: onnxruntime running the bundle's ONNX
files in this process along the runtime's plan, and `Stepper.advance` itself. Loops are bounded
by a time budget and a request cap per cell.
"""

from __future__ import annotations

import argparse
import asyncio
import dataclasses
import json
import os
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

from .competitors import OnnxRuntimeLoop, plan_steps
from .environment import describe, numpy_blas_threads, thread_variables
from .timing import Budget, format_rate, format_seconds, interleaved, summary

BATCHES = (1, 64)
CONCURRENCY = (1, 8)
ENCODINGS = ("json", "msgpack", "binary", "grpc")
STACKS = {"asyncio+h11": ("asyncio", "h11"), "uvloop+httptools": ("uvloop", "httptools")}
STARTUP_SECONDS = 60
SERVE = """
import sys, uvicorn
from stridecast.service import Settings, create_app
port, grpc_port, bundle, loop, http = sys.argv[1:6]
app = create_app([bundle], Settings(grpc_port=int(grpc_port), max_waiting=256))
uvicorn.run(app, host="127.0.0.1", port=int(port), loop=loop, http=http, log_level="warning",
            access_log=False)
"""


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _start_server(bundle: Path, loop: str, http: str) -> tuple[subprocess.Popen, str, str]:
    port, grpc_port = _free_port(), _free_port()
    process = subprocess.Popen(
        [sys.executable, "-c", SERVE, str(port), str(grpc_port), str(bundle), loop, http],
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    base = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + STARTUP_SECONDS
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"the server exited: {process.stderr.read().decode()}")
        try:
            if httpx.get(f"{base}/readyz", timeout=1.0).status_code == 200:
                return process, base, f"127.0.0.1:{grpc_port}"
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


def _datatype(states: np.ndarray) -> str:
    return "FP32" if states.dtype == np.float32 else "FP64"


def http_request(encoding: str, states: np.ndarray, t: float) -> tuple[bytes, dict[str, str]]:
    """The body and headers of one `infer` request in `encoding` (JSON, MessagePack, binary)."""
    shape, datatype = list(states.shape), _datatype(states)
    if encoding == "binary":
        raw_state, raw_time = states.astype(states.dtype.newbyteorder("<")).tobytes(), \
            np.asarray([t], "<f8").tobytes()
        header = json.dumps({"inputs": [
            {"name": "state", "shape": shape, "datatype": datatype,
             "parameters": {"binary_data_size": len(raw_state)}},
            {"name": "t", "shape": [1], "datatype": "FP64",
             "parameters": {"binary_data_size": len(raw_time)}}],
            "parameters": {"binary_data_output": True}}).encode()
        return header + raw_state + raw_time, {"Inference-Header-Content-Length":
                                               str(len(header))}
    if encoding == "msgpack":
        typed = {"dtype": states.dtype.str, "shape": shape, "data": states.tobytes()}
        document = {"inputs": [{"name": "state", "shape": shape, "datatype": datatype,
                                "data": typed},
                               {"name": "t", "shape": [1], "datatype": "FP64", "data": [t]}]}
        return msgpack.packb(document), {"content-type": "application/msgpack",
                                         "accept": "application/msgpack"}
    document = {"inputs": [{"name": "state", "shape": shape, "datatype": datatype,
                            "data": states.reshape(-1).tolist()},
                           {"name": "t", "shape": [1], "datatype": "FP64", "data": [t]}]}
    return json.dumps(document).encode(), {"content-type": "application/json"}


def decode_http(encoding: str, response: httpx.Response) -> np.ndarray:
    """The output state of an `infer` answer (so every cell pays for decoding its answer)."""
    if encoding == "binary":
        length = int(response.headers["inference-header-content-length"])
        output = json.loads(response.content[:length])["outputs"][0]
        dtype = "<f4" if output["datatype"] == "FP32" else "<f8"
        return np.frombuffer(response.content[length:], dtype).reshape(output["shape"])
    if encoding == "msgpack":
        data = msgpack.unpackb(response.content)["outputs"][0]["data"]
        return np.frombuffer(data["data"], data["dtype"]).reshape(data["shape"])
    output = response.json()["outputs"][0]
    return np.asarray(output["data"]).reshape(output["shape"])


def grpc_request(model: str, states: np.ndarray, t: float) -> Any:
    from stridecast.service.grpc_messages import messages

    request = messages().ModelInferRequest(model_name=model)
    request.inputs.add(name="state", datatype=_datatype(states), shape=list(states.shape))
    request.inputs.add(name="t", datatype="FP64", shape=[1])
    request.raw_input_contents.extend([states.tobytes(), np.asarray([t], "<f8").tobytes()])
    return request


async def _drive_http(url: str, encoding: str, body: bytes, headers: dict[str, str],
                      concurrency: int, budget: Budget) -> tuple[np.ndarray, float]:
    limits = httpx.Limits(max_connections=concurrency, max_keepalive_connections=concurrency)
    async with httpx.AsyncClient(limits=limits, timeout=30.0) as client:
        async def call() -> None:
            response = await client.post(url, content=body, headers=headers)
            response.raise_for_status()
            decode_http(encoding, response)

        return await _drive(call, concurrency, budget)


async def _drive_grpc(target: str, request: Any, concurrency: int,
                      budget: Budget) -> tuple[np.ndarray, float]:
    import grpc

    from stridecast.service.grpc_messages import SERVICE, messages

    async with grpc.aio.insecure_channel(target) as channel:
        infer = channel.unary_unary(f"/{SERVICE}/ModelInfer",
                                    request_serializer=type(request).SerializeToString,
                                    response_deserializer=messages().ModelInferResponse.FromString)

        async def call() -> None:
            response = await infer(request)
            output = response.outputs[0]
            dtype = "<f4" if output.datatype == "FP32" else "<f8"
            np.frombuffer(response.raw_output_contents[0], dtype).reshape(list(output.shape))

        return await _drive(call, concurrency, budget)


async def _drive(call, concurrency: int, budget: Budget) -> tuple[np.ndarray, float]:
    """`concurrency` clients repeat `call` until the budget is spent; latencies and wall time."""
    for _ in range(budget.warmup):
        await call()
    latencies: list[float] = []
    start = time.perf_counter()

    async def worker() -> None:
        while (len(latencies) < budget.max_rounds
               and (len(latencies) < budget.min_rounds
                    or time.perf_counter() - start < budget.seconds)):
            begin = time.perf_counter()
            await call()
            latencies.append(time.perf_counter() - begin)

    await asyncio.gather(*(worker() for _ in range(concurrency)))
    return np.asarray(latencies), time.perf_counter() - start


def _measure(name: str, base: str, grpc_target: str, encoding: str, states: np.ndarray,
             t: float, concurrency: int, budget: Budget) -> tuple[np.ndarray, float]:
    if encoding == "grpc":
        return asyncio.run(_drive_grpc(grpc_target, grpc_request(name, states, t), concurrency,
                                       budget))
    body, headers = http_request(encoding, states, t)
    return asyncio.run(_drive_http(f"{base}/v2/models/{name}/infer", encoding, body, headers,
                                   concurrency, budget))


def _row(stack: str, batch: int, encoding: str, concurrency: int, latencies: np.ndarray,
         elapsed: float) -> dict[str, Any]:
    return {"stack": stack, "batch": batch, "encoding": encoding, "concurrency": concurrency,
            "requests_per_second": latencies.size / elapsed, **summary(latencies)}


def run(bundle: Path, *, quick: bool = False) -> dict[str, Any]:
    """Measure the floors and every (stack, batch, encoding, concurrency) cell."""
    load_before = list(os.getloadavg())
    bundle = Path(bundle)
    stepper = load(bundle)
    name = bundle.resolve().name.removesuffix(".bundle")
    t = 100 * stepper.base_step  # a grid time: the plan is the same for every request
    budget = (Budget(seconds=0.4, min_rounds=20, max_rounds=400, warmup=5) if quick
              else Budget(seconds=2.0, min_rounds=50, max_rounds=5000, warmup=20))
    rows: list[dict[str, Any]] = []
    onnxruntime_loop = OnnxRuntimeLoop(stepper, bundle)
    steps = plan_steps(stepper, 100)
    for batch in BATCHES:
        states = _states(stepper, batch)
        floors = interleaved({
            "onnxruntime in process": lambda s=states: onnxruntime_loop.advance(s, steps),
            "runtime in process": lambda s=states: stepper.advance(s, t)}, budget)
        for label, samples in floors.items():
            rows.append(_row("-", batch, label, 1, samples, float(np.sum(samples))))
    # Both stacks serve at once and take turns on every cell (A then B, then B then A, half
    # the budget each), so a change in the machine's load falls on both alike.
    servers = {}
    try:
        for stack, (loop, http) in STACKS.items():
            servers[stack] = _start_server(bundle, loop, http)
        half = dataclasses.replace(budget, seconds=budget.seconds / 2,
                                   min_rounds=budget.min_rounds // 2,
                                   max_rounds=budget.max_rounds // 2)
        for batch in BATCHES:
            states = _states(stepper, batch)
            for encoding in ENCODINGS:
                for concurrency in CONCURRENCY:
                    measured: dict[str, list[tuple[np.ndarray, float]]] = {s: [] for s in STACKS}
                    for order in (list(STACKS), list(reversed(STACKS))):
                        for stack in order:
                            _, base, grpc_target = servers[stack]
                            measured[stack].append(_measure(
                                name, base, grpc_target, encoding, states, t, concurrency,
                                half))
                    for stack, parts in measured.items():
                        rows.append(_row(stack, batch, encoding, concurrency,
                                         np.concatenate([p[0] for p in parts]),
                                         sum(p[1] for p in parts)))
    finally:
        for process, _, _ in servers.values():
            process.terminate()
            process.wait(timeout=30)
    return {"rows": rows, "blas": numpy_blas_threads(), "thread_variables": thread_variables(),
            "openblas_coretype": os.environ.get("OPENBLAS_CORETYPE"),
            "bundle": name, "t": t, "quick": quick, "machine": describe(),
            "load_before": load_before, "load_after": list(os.getloadavg())}


def _load(values: list[float]) -> str:
    return " / ".join(f"{value:.2f}" for value in values)


def to_markdown(result: dict[str, Any], command: str | None = None) -> str:
    rows = result["rows"]
    floor = {row["batch"]: row["p50"] for row in rows
             if row["encoding"] == "onnxruntime in process"}
    machine = result.get("machine", {})
    lines = []
    if command:
        lines += ["```", command, "```", ""]
    lines += [f"BLAS: {result['blas']}; thread variables: {result['thread_variables']}; "
              f"bundle {result['bundle']}, t = {result['t']:g}", "",
              f"Machine: {machine.get('cpu')}, {machine.get('cpus_usable')} usable CPUs; load "
              f"average (1 / 5 / 15 min) {_load(result['load_before'])} before, "
              f"{_load(result['load_after'])} after; client, server and floors share the "
              "machine.", "",
              "| server stack | batch | encoding | clients | requests/s | p50 | p99 | "
              "p50 / onnxruntime |", "|---|---:|---|---:|---:|---:|---:|---:|"]
    for row in rows:
        ratio = row["p50"] / floor[row["batch"]]
        lines.append(f"| {row['stack']} | {row['batch']} | {row['encoding']} | "
                     f"{row['concurrency']} | {format_rate(row['requests_per_second'])} | "
                     f"{format_seconds(row['p50'])} | {format_seconds(row['p99'])} | "
                     f"{ratio:.1f}x |")
    lines += ["", "Does uvloop + httptools help? Requests/s under uvloop+httptools over "
              "asyncio+h11, same cell:", "",
              "| batch | encoding | clients | ratio |", "|---:|---|---:|---:|"]
    by_cell = {(row["stack"], row["batch"], row["encoding"], row["concurrency"]): row
               for row in rows}
    for (stack, batch, encoding, clients), row in by_cell.items():
        if stack != "uvloop+httptools":
            continue
        plain = by_cell[("asyncio+h11", batch, encoding, clients)]
        ratio = row["requests_per_second"] / plain["requests_per_second"]
        lines.append(f"| {batch} | {encoding} | {clients} | {ratio:.2f} |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description=__doc__.splitlines()[0],
        epilog="example:\n  env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE "
               "python -m stridecast.benchmarks.service_bench crane-demo.bundle --quick",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("bundle", type=Path, help="bundle directory to serve")
    parser.add_argument("--quick", action="store_true", help="short budgets (a smoke run)")
    parser.add_argument("--json", type=Path, help="also write the rows as JSON")
    parser.add_argument("--markdown", type=Path,
                        help="also write the tables, with this command, to a Markdown file")
    arguments = parser.parse_args(argv)
    result = run(arguments.bundle, quick=arguments.quick)
    unset = " ".join(f"-u {name}" for name in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")
                     if name not in os.environ)
    arguments_given = " ".join(argv if argv is not None else sys.argv[1:])
    command = ((f"env {unset} " if unset else "")
               + f"python -m stridecast.benchmarks.service_bench {arguments_given}")
    text = to_markdown(result, command)
    print(text)
    if arguments.json:
        _write(arguments.json, json.dumps(result, indent=2, default=str) + "\n")
    if arguments.markdown:
        _write(arguments.markdown, "# Service benchmark\n\n" + INTRO + "\n\n" + text + "\n")
    return 0


INTRO = (
    "The open inference protocol's `infer` for batches of 1 and 64 states, 1 and 8 concurrent "
    "clients, in four encodings (JSON, MessagePack, binary tensor data extension, gRPC raw "
    "contents), under uvicorn's asyncio + h11 and under uvloop + httptools; the floors are "
    "onnxruntime running the bundle's ONNX files along the runtime's plan in process and "
    "`Stepper.advance` in process. Written by `benchmarks/service_bench.py`.")


def _write(path: Path, text: str) -> None:
    # Temporary name, then rename: never a half-written file under the final name.
    partial = path.with_name(f".{path.name}.partial")
    partial.write_text(text)
    partial.replace(path)


if __name__ == "__main__":
    sys.exit(main())
