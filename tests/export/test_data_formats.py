"""`export/data_formats.py`: trajectories from HDF5, NetCDF and zarr read back equal what the
reference writers wrote (h5py, xarray over h5netcdf, zarr), and times give the base step.

Sources: CF conventions 1.11 §4.4 (time units "<unit> since <epoch>") and §9.3.3 (contiguous
ragged arrays: a count variable whose `sample_dimension` attribute names the dimension it cuts);
IEEE 754 binary32 resolution for float32 time stamps (`numpy.finfo`).
"""

from __future__ import annotations

import numpy as np
import pytest

from stridecast.export import load_trajectories
from stridecast.export.data_formats import base_step_from_times, shortest_decimal
from stridecast.runtime import StateError

RNG = np.random.default_rng(0)
# Three trajectories of different lengths, d = 2: the ragged case every format must carry.
RAGGED = [RNG.normal(size=(length, 2)) for length in (7, 12, 5)]


def assert_same(loaded, expected) -> None:
    assert len(loaded) == len(expected)
    for got, want in zip(loaded, expected, strict=True):
        assert got.dtype == np.float64
        np.testing.assert_array_equal(got, want)


def test_hdf5_layouts(tmp_path):
    h5py = pytest.importorskip("h5py")
    with h5py.File(tmp_path / "one.h5", "w") as handle:
        handle["trajectories"] = np.stack([RAGGED[0], RAGGED[0] + 1])
        handle.attrs["base_step"] = np.float32(0.05)
        handle.attrs["state_names"] = ["x", "y"]
        handle.attrs["time_unit"] = "s"
    data = load_trajectories(tmp_path / "one.h5")
    assert_same(data.trajectories, [RAGGED[0], RAGGED[0] + 1])
    assert (data.base_step, data.state_names, data.time_unit) == (0.05, ("x", "y"), "s")

    with h5py.File(tmp_path / "group.hdf5", "w") as handle:
        for index, array in enumerate(RAGGED):
            handle[f"trajectories/run{index}"] = array.astype(np.float32)
        handle["units"] = np.array([b"m", b"m/s"])
    data = load_trajectories(tmp_path / "group.hdf5")
    assert_same(data.trajectories, [array.astype(np.float32) for array in RAGGED])
    assert data.units == ("m", "m/s")

    with h5py.File(tmp_path / "root.h5", "w") as handle:
        for index, array in enumerate(RAGGED):
            handle[f"run{index}"] = array
    assert_same(load_trajectories(tmp_path / "root.h5").trajectories, RAGGED)


def test_netcdf_and_zarr_one_variable_per_component(tmp_path):
    xarray = pytest.importorskip("xarray")
    steps = 12
    values = np.stack([RAGGED[1], RAGGED[1] * 2])  # (trajectory, time, state)
    # float32 times 0, 0.1, ... as data logged in single precision would hold them.
    time = (np.arange(steps) * 0.1).astype(np.float32)
    dataset = xarray.Dataset(
        {"height": (("run", "time"), values[..., 0], {"units": "m"}),
         "speed": (("run", "time"), values[..., 1], {"units": "m/s"})},
        coords={"time": ("time", time, {"units": "seconds since 2000-01-01"})})
    dataset.to_netcdf(tmp_path / "runs.nc", engine="h5netcdf")
    pytest.importorskip("zarr")
    # Format 2: its consolidated metadata are part of the spec (format 3 warns about them).
    dataset.to_zarr(tmp_path / "runs.zarr", zarr_format=2)
    for name in ("runs.nc", "runs.zarr"):
        data = load_trajectories(tmp_path / name)
        assert_same(data.trajectories, list(values))
        assert data.state_names == ("height", "speed") and data.units == ("m", "m/s")
        assert data.base_step == 0.1 and data.time_unit == "seconds"


def test_netcdf_trajectories_variable_and_cf_ragged(tmp_path):
    xarray = pytest.importorskip("xarray")
    pytest.importorskip("h5netcdf")
    regular = np.stack([RAGGED[0], RAGGED[0] - 1])
    xarray.Dataset({"trajectories": (("run", "step", "state"), regular)},
                   coords={"state": ["u", "v"]}, attrs={"base_step": 0.2}
                   ).to_netcdf(tmp_path / "regular.nc", engine="h5netcdf")
    data = load_trajectories(tmp_path / "regular.nc")
    assert_same(data.trajectories, list(regular))
    assert data.state_names == ("u", "v") and data.base_step == 0.2

    # CF conventions 9.3.3, contiguous ragged array: a count variable whose
    # `sample_dimension` attribute names the dimension it cuts into trajectories.
    flat = np.concatenate(RAGGED)
    times = np.concatenate([np.arange(len(array)) * 0.25 for array in RAGGED])
    xarray.Dataset(
        {"row_size": ("trajectory", [len(array) for array in RAGGED],
                      {"sample_dimension": "obs"}),
         "time": ("obs", times, {"standard_name": "time", "units": "days"}),
         "a": ("obs", flat[:, 0]), "b": ("obs", flat[:, 1])}
    ).to_netcdf(tmp_path / "ragged.nc", engine="h5netcdf")
    data = load_trajectories(tmp_path / "ragged.nc")
    assert_same(data.trajectories, RAGGED)
    assert data.state_names == ("a", "b") and data.base_step == 0.25
    assert data.time_unit == "days"


@pytest.mark.parametrize(("times", "expected"), [
    # float32 grids: the step is the decimal they stand for (shortest round trip).
    ([(np.arange(10_001) * 0.01).astype(np.float32)], 0.01),
    ([np.arange(5) * 0.3 + 7.0, np.arange(9) * 0.3], 0.3),
    ([np.arange(4) * 2], 2.0),
    # The fewest digits within 1e-6 relative: 0.0123457 is 1.7e-6 away, 0.01234568 is 1e-7.
    ([np.arange(50) * 0.0123456789], 0.01234568),
])
def test_base_step_from_times(times, expected):
    assert base_step_from_times(times, "f") == expected


@pytest.mark.parametrize(("times", "message"), [
    ([np.array([0.0, 0.1, 0.3])], r"times of trajectory 0 in 'f' are not evenly spaced"),
    ([np.arange(4) * 0.1, np.arange(4) * 0.2], r"have different time steps"),
    ([np.array([0.0])], r"too short to give a base step"),
])
def test_base_step_from_times_refuses(times, message):
    with pytest.raises(StateError, match=message):
        base_step_from_times(times, "f")


def test_missing_reader_names_the_extra(tmp_path, monkeypatch):
    import builtins

    real_import = builtins.__import__

    def without_h5py(name, *args, **kwargs):
        if name == "h5py":
            raise ModuleNotFoundError("No module named 'h5py'", name="h5py")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", without_h5py)
    (tmp_path / "x.h5").write_bytes(b"")
    with pytest.raises(StateError, match=r"reading \.h5 files needs the package 'h5py'; "
                                         r'install it with pip install "stridecast\[data\]"\.'):
        load_trajectories(tmp_path / "x.h5")


def test_time_first_files_are_read_as_trajectory_rows(tmp_path):
    xarray = pytest.importorskip("xarray")
    values = np.stack([RAGGED[1], RAGGED[1] * 2])  # (trajectory, time, state)
    time = np.arange(values.shape[1]) * 0.5
    # The same data stored (time, run): the time dimension is recognised by its CF attribute.
    xarray.Dataset(
        {"p": (("when", "run"), values[..., 0].T), "q": (("when", "run"), values[..., 1].T)},
        coords={"when": ("when", time, {"standard_name": "time", "units": "hours"})}
    ).to_netcdf(tmp_path / "transposed.nc", engine="h5netcdf")
    data = load_trajectories(tmp_path / "transposed.nc")
    assert_same(data.trajectories, list(values))
    assert data.base_step == 0.5 and data.time_unit == "hours"


@pytest.mark.parametrize(("value", "expected"), [
    (float(np.float32(0.01)), 0.01), (0.30000000000000004, 0.3), (2.0, 2.0),
    # %g rounding: 7 digits (123456.8) are within 1e-6; 6 (123457) are 1.7e-6 away.
    (2 / 3, 0.666667), (123456.789, 123456.8),
])
def test_shortest_decimal_within_the_base_step_tolerance(value, expected):
    assert shortest_decimal(value) == expected
    assert abs(expected - value) <= 1e-6 * abs(value)
