"""`forecast_ensemble`: many initial states through one bundle, on Dask, into an xarray Dataset.

The client submits chunks of members through a bounded window and writes each finished chunk
at once, so its memory stays bounded by the window whatever the ensemble size.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence

import numpy as np
import xarray as xr

from stridecast.runtime import StateError, Stepper, TimeError, load

from . import layout
from .chunks import forecast_chunk
from .inputs import StateSource, check_finite, open_states
from .outputs import open_writer

Progress = Callable[[int, int], None]
# Aim for chunks whose result holds about this many bytes: large enough that scheduling costs
# little, small enough that the window of chunks in flight fits easily in memory.
TARGET_CHUNK_BYTES = 16 * 2**20


def forecast_ensemble(bundle: Stepper | str | os.PathLike[str], states, times: Sequence[float],
                      *, client=None, chunk_states: int | None = None, out=None,
                      overwrite: bool = False, off_grid: str = "interpolate",
                      progress: Progress | None = None) -> xr.Dataset:
    """Forecast every member of an ensemble at `times` and return a labelled dataset.

    Parameters
    ----------
    bundle : Stepper or path
        A loaded stepper (from `stridecast.runtime.load`) or a bundle directory. Workers load
        and verify the bundle themselves from its path, once each.
    states : array_like, dask.array.Array, or path, shape (members, d)
        Initial states in physical units: in memory, lazy, or a ``.npy``, zarr or NetCDF file
        (see `stridecast.ensemble.inputs.open_states`).
    times : sequence of float, shape (T,)
        Times to forecast, in the bundle's time unit.
    client : dask.distributed.Client, optional
        Where to compute. Default: the current default client if there is one, else this
        process, chunk after chunk.
    chunk_states : int, optional
        Members per task and per storage chunk (default: about 16 MiB of results, within the
        bundle's batch limit).
    out : path, optional
        ``*.zarr`` or ``*.nc``: stream the result there and return it opened lazily. Without
        it, the result is gathered in memory.
    overwrite : bool
        Replace an existing `out`.
    off_grid : {"interpolate", "nearest", "error"}
        As in `Stepper.forecast`.
    progress : callable, optional
        ``progress(members_done, members_total)``, called on the client after each chunk.

    Returns
    -------
    xarray.Dataset
        Dimensions (member, time); one variable per state component (units from the
        manifest); ``expected_error`` (time) and finding flags as variables; the bundle's
        identity in the attributes.
    """
    stepper = bundle if isinstance(bundle, Stepper) else load(bundle)
    source = open_states(states, stepper.state_names)
    requested = np.asarray(times, dtype=np.float64)
    if requested.ndim != 1 or requested.size == 0:
        raise TimeError(f"`times` has shape {requested.shape}; expected a non-empty 1-D "
                        "sequence of times.")
    chunk = _chunk_size(chunk_states, stepper, len(requested))
    client = _default_client(client)
    compute = _computer(client)
    probe = _first_state(source, compute)
    # One member forecast on the client checks times, off_grid and the bundle before any work.
    forecast_chunk(stepper, probe, requested, 0, off_grid)
    template = layout.skeleton(stepper, source.members, requested, chunk, probe)
    writer = open_writer(out, template, chunk_states=chunk, overwrite=overwrite)
    try:
        check_finite(source, compute)
        names = layout.component_names(stepper)
        if client is None:
            _run_here(stepper, source, requested, chunk, off_grid, writer, names, progress)
        else:
            _run_on_cluster(client, stepper, source, requested, chunk, off_grid, writer, names,
                            progress)
        return writer.finish()
    except BaseException:
        writer.abort()
        raise


def _chunk_size(chunk_states: int | None, stepper: Stepper, count: int) -> int:
    limit = stepper.limits.max_batch
    if chunk_states is None:
        per_member = count * stepper.state_dim * stepper.dtype.itemsize
        return int(max(1, min(limit, TARGET_CHUNK_BYTES // max(per_member, 1))))
    if isinstance(chunk_states, bool) or not isinstance(chunk_states, int | np.integer) \
            or not 1 <= chunk_states <= limit:
        raise StateError(f"`chunk_states` is {chunk_states!r}; expected an integer from 1 to "
                         f"{limit} (the bundle's batch limit).")
    return int(chunk_states)


def _default_client(client):
    if client is not None:
        return client
    try:
        from distributed import default_client
        return default_client()
    except (ImportError, ValueError):
        return None


def _computer(client) -> Callable:
    import dask

    if client is None:
        return lambda *values: dask.compute(*values, scheduler="threads")
    return lambda *values: tuple(client.gather(client.compute(list(values))))


def _first_state(source: StateSource, compute) -> np.ndarray:
    first = source.array[:1]
    return np.asarray(compute(first)[0] if source.lazy else first)


def _run_here(stepper, source, times, chunk, off_grid, writer, names, progress) -> None:
    done = 0
    for start, block in source.chunks(chunk):
        states = np.asarray(block.compute(scheduler="synchronous") if source.lazy else block)
        result = forecast_chunk(stepper, states, times, start, off_grid)
        writer.write(start, layout.chunk_arrays(names, result))
        done += len(states)
        if progress is not None:
            progress(done, source.members)


def _run_on_cluster(client, stepper, source, times, chunk, off_grid, writer, names,
                    progress) -> None:
    from distributed import as_completed

    # One task holds the stepper; every chunk depends on it, so each worker receives (and
    # loads) it once and the scheduler recomputes it if the worker holding it dies.
    shared = client.submit(_identity, stepper, pure=False)
    window = max(2, 2 * sum(client.nthreads().values()))
    blocks = source.chunks(chunk)
    running = as_completed()

    def submit_next() -> bool:
        item = next(blocks, None)
        if item is None:
            return False
        start, block = item
        states = client.compute(block) if source.lazy else block
        running.add(client.submit(forecast_chunk, shared, states, times, start, off_grid,
                                  pure=False))
        return True

    for _ in range(window):
        if not submit_next():
            break
    done = 0
    try:
        for future in running:
            result = future.result()
            future.release()
            writer.write(result.start, layout.chunk_arrays(names, result))
            done += result.values.shape[0]
            if progress is not None:
                progress(done, source.members)
            submit_next()
    finally:
        shared.release()


def _identity(value):
    return value
