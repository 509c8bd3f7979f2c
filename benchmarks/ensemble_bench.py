"""Ensembles: states per second against Dask workers, and peak client memory against size.

Run: python -m stridecast.benchmarks.ensemble_bench [--quick] [--json FILE]
Peers measured in the same run: a single-process `Stepper.forecast` over the same chunks, and
`forecast_ensemble` in-process (no cluster). Memory is the client's peak traced allocation
(tracemalloc) while streaming states from a zarr store to a zarr store.
"""

from __future__ import annotations

import argparse
import json
import os
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

from stridecast import demo_bundle
from stridecast.ensemble import forecast_ensemble
from stridecast.runtime import load

TIMES = np.arange(0, 11) * 1.0  # 0 .. 10 s every 1 s
CHUNK = 8192


def crane_states(count: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return (np.array([3.0, -24.0, 0.0, 0.0]) + rng.normal(size=(count, 4))
            * [1.0, 0.05, 0.5, 0.1]).astype(np.float32)


def throughput(count: int) -> dict:
    from distributed import Client, LocalCluster

    stepper = load(demo_bundle())
    states = crane_states(count)
    rows = {}
    start = time.perf_counter()
    for first in range(0, count, CHUNK):
        stepper.forecast(states[first:first + CHUNK], TIMES)
    rows["single process, Stepper.forecast"] = count / (time.perf_counter() - start)
    start = time.perf_counter()
    forecast_ensemble(stepper, states, TIMES, chunk_states=CHUNK)
    rows["forecast_ensemble, no cluster"] = count / (time.perf_counter() - start)
    for workers in (1, 2):
        with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                          dashboard_address=None) as cluster, Client(cluster) as client:
            forecast_ensemble(stepper, states[:CHUNK], TIMES, client=client)  # warm workers
            start = time.perf_counter()
            forecast_ensemble(stepper, states, TIMES, client=client, chunk_states=CHUNK)
            rows[f"forecast_ensemble, {workers} worker(s)"] = \
                count / (time.perf_counter() - start)
    return rows


def client_memory(sizes: list[int]) -> dict:
    import xarray as xr
    from distributed import Client, LocalCluster

    stepper = load(demo_bundle())
    result = {}
    with tempfile.TemporaryDirectory() as folder, \
            LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                         dashboard_address=None) as cluster, Client(cluster) as client:
        for size in sizes:
            source = Path(folder) / f"states-{size}.zarr"
            # Written in slices so that building the input does not count as client memory.
            xr.Dataset({"s": (("member", "c"), np.zeros((size, 4), np.float32))}).chunk(
                {"member": 65_536}).to_zarr(source, compute=False)
            import zarr
            array = zarr.open_group(str(source), mode="r+")["s"]
            for first in range(0, size, 65_536):
                array[first:first + 65_536] = crane_states(min(65_536, size - first), first)
            tracemalloc.start()
            start = time.perf_counter()
            forecast_ensemble(stepper, source, TIMES, client=client, chunk_states=CHUNK,
                              out=Path(folder) / f"out-{size}.zarr")
            seconds = time.perf_counter() - start
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            output_bytes = size * len(TIMES) * 4 * 4
            result[size] = {"peak_client_MiB": peak / 2**20, "seconds": seconds,
                            "output_MiB": output_bytes / 2**20}
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes")
    parser.add_argument("--json", default=None)
    arguments = parser.parse_args()
    count = 40_000 if arguments.quick else 200_000
    sizes = [10_000, 100_000] if arguments.quick else [10_000, 100_000, 1_000_000]
    blas = {name: os.environ.get(name, "unset") for name in
            ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")}
    rates = throughput(count)
    memory = client_memory(sizes)
    base = rates["single process, Stepper.forecast"]
    print(f"crane demo bundle, {len(TIMES)} times per member, chunks of {CHUNK} members, "
          f"{os.cpu_count()} CPUs, client BLAS threads {blas} (Dask workers use 1)")
    print(f"\n| how ({count} members) | states/s | vs single process |\n|---|---:|---:|")
    for name, rate in rates.items():
        print(f"| {name} | {rate:,.0f} | {rate / base:.2f}× |")
    print("\n| members | peak client memory (MiB) | output size (MiB) | seconds |\n"
          "|---:|---:|---:|---:|")
    for size, row in memory.items():
        print(f"| {size:,} | {row['peak_client_MiB']:.1f} | {row['output_MiB']:.1f} | "
              f"{row['seconds']:.1f} |")
    if arguments.json:
        Path(arguments.json).write_text(json.dumps({"rates": rates, "memory": memory,
                                                    "blas": blas}, indent=2) + "\n")


if __name__ == "__main__":
    main()
