"""forecast_ensemble on a real LocalCluster of worker processes."""

from __future__ import annotations

import os
import signal

import numpy as np
import pytest
from scipy.linalg import expm

from stridecast.ensemble import OutputError, forecast_ensemble
from stridecast.runtime import StateError, Stepper, TimeError, load
from tests.builders import linear_bundle, oscillator_matrix
from tests.systems import block_oscillators

TIMES = np.array([0.0, 0.3, 1.6, 2.0, 3.7])


def initial_states(count: int, dim: int = 2, seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed).normal(size=(count, dim))


def chunked_direct(client, stepper, states, times, chunk):
    """`Stepper.forecast` of the same chunks, run in a worker process (the same BLAS setup
    as the ensemble's tasks), shape (members, T, d)."""
    parts = [client.submit(Stepper.forecast, stepper, states[start:start + chunk], times,
                           pure=False) for start in range(0, len(states), chunk)]
    return np.concatenate([part.result() for part in parts], axis=1).transpose(1, 0, 2)


def stacked(dataset, names) -> np.ndarray:
    return np.stack([dataset[name].values for name in names], axis=-1)


@pytest.mark.parametrize("suffix", [None, ".zarr", ".nc"])
def test_cluster_result_equals_direct_forecast(cluster_client, oscillator, tmp_path, suffix):
    states = initial_states(530)
    out = None if suffix is None else tmp_path / f"result{suffix}"
    dataset = forecast_ensemble(oscillator, states, TIMES, client=cluster_client,
                                chunk_states=100, out=out)
    values = stacked(dataset, oscillator.state_names)
    # Bit for bit: the same chunks through Stepper.forecast in a worker process.
    np.testing.assert_array_equal(
        values, chunked_direct(cluster_client, oscillator, states, TIMES, 100))
    # Against the outside world: x(t) = expm(A t) x(0) (standard linear ODE solution, SciPy).
    exact = np.stack([states @ expm(oscillator_matrix() * t).T for t in TIMES], axis=1)
    np.testing.assert_allclose(values, exact, rtol=1e-9, atol=1e-9)
    np.testing.assert_array_equal(dataset["member"].values, np.arange(530))
    np.testing.assert_array_equal(dataset["time"].values, TIMES)
    assert dataset["time"].attrs["units"] == "s"
    assert dataset.attrs["bundle_name"] == "linear"
    assert str(oscillator.manifest.levels[0].sha256) in dataset.attrs["bundle_checksums"]
    if out is not None:
        assert out.exists() and not list(tmp_path.glob(".*partial*"))


def test_in_process_without_client_matches_cluster(cluster_client, oscillator):
    states = initial_states(120, seed=3)
    here = forecast_ensemble(oscillator, states, TIMES, chunk_states=50)
    there = forecast_ensemble(oscillator, states, TIMES, client=cluster_client, chunk_states=50)
    np.testing.assert_allclose(stacked(here, ("x0", "x1")), stacked(there, ("x0", "x1")),
                               rtol=1e-12, atol=1e-12)


def test_dask_array_and_file_inputs(cluster_client, oscillator, tmp_path):
    import dask.array as da
    import xarray as xr

    states = initial_states(300, seed=5)
    direct = forecast_ensemble(oscillator, states, TIMES, client=cluster_client,
                               chunk_states=64)
    np.save(tmp_path / "states.npy", states)
    xr.Dataset({"x0": ("member", states[:, 0]), "x1": ("member", states[:, 1])}).to_netcdf(
        tmp_path / "states.nc", engine="h5netcdf")
    xr.Dataset({"s": (("member", "component"), states)}).to_zarr(tmp_path / "states.zarr")
    sources = [da.from_array(states, chunks=(77, 2)), tmp_path / "states.npy",
               tmp_path / "states.nc", tmp_path / "states.zarr"]
    for source in sources:
        result = forecast_ensemble(oscillator, source, TIMES, client=cluster_client,
                                   chunk_states=64)
        np.testing.assert_array_equal(stacked(result, ("x0", "x1")),
                                      stacked(direct, ("x0", "x1")))


def test_a_killed_worker_loses_and_duplicates_nothing(cluster_client, tmp_path):
    # Chunks that take a while (32 components, 1,500 sequential finest steps) so that tasks
    # are still running on the workers when the client has written its first chunk (a loaded
    # machine makes the client, not the workers, the slow side otherwise).
    system = block_oscillators(16)
    path = linear_bundle(tmp_path / "big.bundle", system, base_step=0.01, strides=[1])
    stepper = load(path, dtype="float64")
    states = initial_states(2400, dim=32, seed=7)
    times = np.array([0.5, 1.5, 3.0, 15.0])
    written, killed = [], []

    def kill_once(done, total):
        written.append(done)
        if killed:
            return
        busy = [address for address, keys in cluster_client.processing().items() if keys]
        if not busy:
            return
        pids = cluster_client.run(os.getpid, workers=busy[:1])
        os.kill(pids[busy[0]], signal.SIGKILL)
        killed.append(busy[0])

    dataset = forecast_ensemble(stepper, states, times, client=cluster_client,
                                chunk_states=200, out=tmp_path / "killed.zarr",
                                progress=kill_once)
    assert killed, "no worker was busy when the first chunk finished; nothing was tested"
    # Each chunk reported exactly once, and every member is present once with exact values
    # (expm, SciPy: the standard solution of x' = A x).
    assert written == list(range(200, 2401, 200))
    np.testing.assert_array_equal(dataset["member"].values, np.arange(2400))
    values = stacked(dataset, stepper.state_names)
    exact = np.stack([states @ expm(system * t).T for t in times], axis=1)
    np.testing.assert_allclose(values, exact, rtol=1e-8, atol=1e-8)
    cluster_client.wait_for_workers(2, timeout=180)  # the nanny restarts the killed worker


def test_wrong_dimension_is_refused_before_work(cluster_client, oscillator, tmp_path):
    calls = []
    with pytest.raises(StateError, match=r"shape \(10, 3\).*2 components.*expected "
                                         r"\(members, 2\)\."):
        forecast_ensemble(oscillator, np.zeros((10, 3)), TIMES, client=cluster_client,
                          out=tmp_path / "a.zarr", progress=lambda *a: calls.append(a))
    assert not calls and not list(tmp_path.iterdir())


def test_nan_state_is_refused_before_work(cluster_client, oscillator, tmp_path):
    import dask.array as da

    states = initial_states(500)
    states[321, 1] = np.nan
    calls = []
    for source in (states, da.from_array(states, chunks=(100, 2))):
        with pytest.raises(StateError, match=r"member 321 holds a non-finite value.*nothing "
                                             r"was computed\)\."):
            forecast_ensemble(oscillator, source, TIMES, client=cluster_client,
                              out=tmp_path / "nan.nc", progress=lambda *a: calls.append(a))
    assert not calls and not list(tmp_path.iterdir())


def test_unwritable_output_is_refused_before_work(cluster_client, oscillator, tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    calls = []
    cases = [(blocker / "out.zarr", r"the folder .* does not exist\."),
             (tmp_path / "out.csv", r"`out` is .*out\.csv'; expected a path ending in "
                                    r"\.zarr or \.nc or \.nc4\.")]
    for out, message in cases:
        with pytest.raises(OutputError, match=message):
            forecast_ensemble(oscillator, initial_states(20), TIMES, client=cluster_client,
                              out=out, progress=lambda *a: calls.append(a))
    (tmp_path / "taken.zarr").mkdir()
    with pytest.raises(OutputError, match=r"already exists; remove it or pass overwrite"):
        forecast_ensemble(oscillator, initial_states(20), TIMES, client=cluster_client,
                          out=tmp_path / "taken.zarr")
    assert not calls


def test_bad_times_and_chunks_are_refused_before_work(oscillator):
    with pytest.raises(TimeError, match=r"`times` has shape \(0,\)"):
        forecast_ensemble(oscillator, initial_states(4), [])
    with pytest.raises(TimeError):
        forecast_ensemble(oscillator, initial_states(4), [-1.0])
    with pytest.raises(StateError, match=r"`chunk_states` is 0; expected an integer from 1"):
        forecast_ensemble(oscillator, initial_states(4), TIMES, chunk_states=0)
