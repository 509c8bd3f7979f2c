"""`stridecast ensemble`: forecast many initial states on Dask into zarr or NetCDF.

Needs the `ensemble` extra; the handler imports Dask and xarray only when run.
"""

from __future__ import annotations

import argparse
import sys

from stridecast.runtime.validation import DTYPES, OFF_GRID_POLICIES

from .common import bundle_path, needs_extra, read_times
from .parsing import add_command


def register(subparsers) -> None:
    ensemble = add_command(subparsers, "ensemble", "Forecast an ensemble of initial states on Dask "
                   "into a zarr store or NetCDF file.",
                   "stridecast ensemble crane-demo.bundle --states states.npy --until 60 "
                   "--every 0.5 --out ensemble.zarr --workers 2",
                   "stridecast.cli.ensemble_command:ensemble_command")
    ensemble.add_argument("bundle", nargs="?", help="bundle directory")
    ensemble.add_argument("--demo", action="store_true", help="the bundle shipped in the package")
    ensemble.add_argument("--states", required=True, metavar="FILE",
                          help="initial states (members, d): .npy, .zarr or .nc")
    ensemble.add_argument("--until", type=float, required=True,
                          help="last time of an evenly spaced grid starting at 0")
    ensemble.add_argument("--every", type=float, required=True, help="spacing of that grid")
    ensemble.add_argument("--out", required=True, metavar="OUT.zarr|OUT.nc",
                          help="where the labelled result goes")
    ensemble.add_argument("--overwrite", action="store_true", help="replace an existing --out")
    where = ensemble.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="a running Dask scheduler, e.g. tcp://10.0.0.5:8786")
    where.add_argument("--workers", type=int, default=None, metavar="N",
                       help="start a local cluster of N worker processes (default: 1)")
    ensemble.add_argument("--chunk-states", type=int, default=None, metavar="M",
                          help="members per task (default: about 16 MiB of results)")
    ensemble.add_argument("--off-grid", choices=OFF_GRID_POLICIES,
                          default="interpolate", help="what to do between grid times "
                          "(default: %(default)s)")
    ensemble.add_argument("--dtype", choices=DTYPES, default="float32",
                          help="arithmetic of the networks (default: %(default)s)")
    ensemble.add_argument("--no-progress", action="store_true", help="no progress bar")


def ensemble_command(arguments: argparse.Namespace) -> int:
    from stridecast.runtime import load

    with needs_extra("ensemble"):
        from distributed import Client, LocalCluster

        from stridecast.ensemble import forecast_ensemble
    stepper = load(bundle_path(arguments), dtype=arguments.dtype)
    times = read_times(argparse.Namespace(times=None, until=arguments.until,
                                      every=arguments.every))
    if arguments.workers is not None and arguments.workers < 1:
        print(f"stridecast ensemble: `--workers` is {arguments.workers}; expected at least 1.",
              file=sys.stderr)
        return 2
    if arguments.scheduler:
        cluster, client = None, Client(arguments.scheduler)
    else:
        cluster = LocalCluster(n_workers=arguments.workers or 1, threads_per_worker=1,
                               processes=True, dashboard_address=None)
        client = Client(cluster)
    bar = _progress_bar(arguments.no_progress)
    try:
        dataset = forecast_ensemble(stepper, arguments.states, times, client=client,
                                    chunk_states=arguments.chunk_states, out=arguments.out,
                                    overwrite=arguments.overwrite, off_grid=arguments.off_grid,
                                    progress=bar)
    finally:
        bar.close()
        client.close()
        if cluster is not None:
            cluster.close()
    print(f"wrote {dataset.sizes['member']} members × {dataset.sizes['time']} times to "
          f"{arguments.out}")
    return 0


class _progress_bar:
    """`progress(done, total)` drawn with tqdm when installed, else silent."""

    def __init__(self, disabled: bool):
        self._bar = None
        self._disabled = disabled

    def __call__(self, done: int, total: int) -> None:
        if self._disabled:
            return
        if self._bar is None:
            try:
                from tqdm import tqdm
            except ModuleNotFoundError:
                self._disabled = True
                return
            self._bar = tqdm(total=total, unit="member", unit_scale=True, file=sys.stderr)
        self._bar.update(done - self._bar.n)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
