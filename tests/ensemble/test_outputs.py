"""`stridecast/ensemble/outputs.py`: results written chunk by chunk to memory, zarr or NetCDF,
staged under a temporary name and renamed into place.

References: the written files are read back with xarray (zarr, and h5netcdf for NetCDF-4) and
h5py's view of the HDF5 chunk layout; values come from the chunks handed to the writer.
"""

from __future__ import annotations

import dask.array as da
import h5py
import numpy as np
import pytest
import xarray as xr

from stridecast.ensemble import OutputError
from stridecast.ensemble.outputs import MemoryWriter, NetCDFWriter, ZarrWriter, open_writer

MEMBERS, TIMES = 10, np.array([0.0, 0.5, 1.0])
VALUES = np.arange(MEMBERS * 3, dtype=np.float64).reshape(MEMBERS, 3) / 7
FLAGS = (np.arange(MEMBERS * 3).reshape(MEMBERS, 3) % 2).astype(np.int8)


def template(chunk: int = 4) -> xr.Dataset:
    """A small dataset in the ensemble's layout: lazy per-member variables, filled per-time."""
    return xr.Dataset(
        {"x": (("member", "time"), da.zeros((MEMBERS, 3), chunks=(chunk, 3)), {"units": "m"}),
         "outside_box": (("member", "time"), da.zeros((MEMBERS, 3), np.int8, chunks=(chunk, 3)),
                         {"flag_values": [0, 1], "flag_meanings": "no yes"}),
         "expected_error": (("time",), np.array([0.0, 0.01, np.nan]))},
        coords={"member": ("member", da.arange(MEMBERS, chunks=chunk, dtype=np.int64)),
                "time": ("time", TIMES, {"units": "s"})},
        attrs={"bundle_name": "probe", "bundle_strides": "[1, 4]"})


def write_all(writer, chunk: int = 4):
    for start in range(0, MEMBERS, chunk):
        stop = min(start + chunk, MEMBERS)
        writer.write(start, {"x": VALUES[start:stop], "outside_box": FLAGS[start:stop],
                             "member": np.arange(start, stop, dtype=np.int64)})
    return writer.finish()


def check(dataset: xr.Dataset) -> None:
    np.testing.assert_array_equal(dataset["x"].values, VALUES)
    np.testing.assert_array_equal(dataset["outside_box"].values, FLAGS)
    np.testing.assert_array_equal(dataset["member"].values, np.arange(MEMBERS))
    np.testing.assert_array_equal(dataset["time"].values, TIMES)
    np.testing.assert_array_equal(dataset["expected_error"].values, [0.0, 0.01, np.nan])
    assert dataset["x"].attrs["units"] == "m" and dataset["time"].attrs["units"] == "s"
    assert list(dataset["outside_box"].attrs["flag_values"]) == [0, 1]
    assert dataset.attrs["bundle_name"] == "probe"


def test_in_memory():
    writer = open_writer(None, template(), chunk_states=4)
    assert isinstance(writer, MemoryWriter)
    check(write_all(writer))


@pytest.mark.parametrize(("suffix", "kind"), [(".zarr", ZarrWriter), (".nc", NetCDFWriter)])
def test_files_appear_only_when_finished_and_read_back_equal(tmp_path, suffix, kind):
    target = tmp_path / f"result{suffix}"
    writer = open_writer(target, template(), chunk_states=4)
    assert isinstance(writer, kind)
    assert not target.exists()
    [staging] = tmp_path.glob(f".result{suffix}.partial-*")
    returned = write_all(writer)
    assert target.exists() and not staging.exists()
    check(returned)
    reader = (xr.open_zarr(target, consolidated=False) if suffix == ".zarr"
              else xr.open_dataset(target, engine="h5netcdf"))
    with reader as dataset:
        check(dataset)


def test_netcdf_chunks_follow_the_member_chunks(tmp_path):
    write_all(open_writer(tmp_path / "result.nc", template(), chunk_states=4))
    with h5py.File(tmp_path / "result.nc", "r") as handle:
        assert handle["x"].chunks == (4, 3)
        assert handle["outside_box"].chunks == (4, 3)


@pytest.mark.parametrize("suffix", [".zarr", ".nc"])
def test_abort_leaves_nothing(tmp_path, suffix):
    target = tmp_path / f"result{suffix}"
    writer = open_writer(target, template(), chunk_states=4)
    writer.write(0, {"x": VALUES[:4], "outside_box": FLAGS[:4],
                     "member": np.arange(4, dtype=np.int64)})
    writer.abort()
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("suffix", [".zarr", ".nc"])
def test_overwrite_replaces_an_existing_result(tmp_path, suffix):
    target = tmp_path / f"result{suffix}"
    write_all(open_writer(target, template(), chunk_states=4))
    with pytest.raises(OutputError, match="already exists; remove it or pass overwrite=True"):
        open_writer(target, template(), chunk_states=4)
    check(write_all(open_writer(target, template(), chunk_states=4, overwrite=True)))
    assert [path.name for path in tmp_path.iterdir()] == [target.name]


def test_unusable_targets_are_refused_before_any_work(tmp_path):
    with pytest.raises(OutputError, match=r"expected a path ending in \.zarr or \.nc or \.nc4"):
        open_writer(tmp_path / "result.csv", template(), chunk_states=4)
    with pytest.raises(OutputError, match="does not exist"):
        open_writer(tmp_path / "absent" / "result.nc", template(), chunk_states=4)
    assert list(tmp_path.iterdir()) == []
    assert issubclass(OutputError, ValueError)
