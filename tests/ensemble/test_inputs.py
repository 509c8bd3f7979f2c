"""`stridecast/ensemble/inputs.py`: initial states from memory, Dask or files, checked first.

References: the files are written by the formats' own libraries (NumPy `np.save`, zarr,
xarray over h5netcdf) and read back by NumPy; Dask's own `dask.compute` evaluates lazy blocks.
"""

from __future__ import annotations

import dask
import dask.array as da
import numpy as np
import pytest
import xarray as xr
import zarr

from stridecast.ensemble.inputs import StateSource, check_finite, open_states
from stridecast.runtime import StateError

NAMES = ("x", "v")
STATES = np.random.default_rng(0).normal(size=(23, 2))


def _values(source: StateSource) -> np.ndarray:
    return np.asarray(source.array.compute() if source.lazy else source.array)


def test_in_memory_states():
    source = open_states(STATES.tolist(), NAMES)
    assert not source.lazy and source.members == 23
    np.testing.assert_array_equal(_values(source), STATES)


def test_a_dask_array_stays_lazy():
    array = da.from_array(STATES, chunks=(5, 2))
    source = open_states(array, NAMES)
    assert source.lazy and source.array is array


def test_npy_file_is_memory_mapped_lazily(tmp_path):
    np.save(tmp_path / "states.npy", STATES)
    source = open_states(tmp_path / "states.npy", NAMES)
    assert source.lazy
    np.testing.assert_array_equal(_values(source), np.load(tmp_path / "states.npy"))


def test_zarr_array_and_zarr_dataset(tmp_path):
    zarr.save_array(str(tmp_path / "plain.zarr"), STATES, zarr_format=2)
    np.testing.assert_array_equal(_values(open_states(tmp_path / "plain.zarr", NAMES)), STATES)
    xr.Dataset({"v": ("member", STATES[:, 1]), "x": ("member", STATES[:, 0])}).to_zarr(
        tmp_path / "named.zarr", zarr_format=2)
    # Components are taken by the bundle's names, in the bundle's order.
    np.testing.assert_array_equal(_values(open_states(tmp_path / "named.zarr", NAMES)), STATES)


def test_netcdf_with_one_variable_per_component_or_one_2d_variable(tmp_path):
    xr.Dataset({"v": ("member", STATES[:, 1]), "x": ("member", STATES[:, 0])}).to_netcdf(
        tmp_path / "named.nc", engine="h5netcdf")
    np.testing.assert_array_equal(_values(open_states(tmp_path / "named.nc", NAMES)), STATES)
    xr.Dataset({"initial": (("member", "component"), STATES)}).to_netcdf(
        tmp_path / "matrix.nc", engine="h5netcdf")
    np.testing.assert_array_equal(_values(open_states(tmp_path / "matrix.nc", NAMES)), STATES)


@pytest.mark.parametrize(("states", "pattern"), [
    (np.zeros((4, 3)), r"shape \(4, 3\); this bundle's state has 2 components \['x', 'v'\]"),
    (np.zeros(2), r"shape \(2,\)"),
    (np.zeros((0, 2)), "holds no states"),
    (np.array([["a", "b"]]), "expected real numbers"),
    (np.zeros((2, 2), bool), "dtype bool"),
    (da.zeros((4, 3), chunks=2), r"shape \(4, 3\)"),
])
def test_shapes_and_dtypes_are_refused_before_any_work(states, pattern):
    with pytest.raises(StateError, match=pattern):
        open_states(states, NAMES)


def test_file_refusals(tmp_path):
    with pytest.raises(StateError, match="does not exist"):
        open_states(tmp_path / "absent.npy", NAMES)
    (tmp_path / "states.csv").write_text("1,2\n")
    with pytest.raises(StateError, match=r"suffix '\.csv'; expected one of"):
        open_states(tmp_path / "states.csv", NAMES)
    xr.Dataset({"a": ("m", [1.0]), "b": ("m", [2.0])}).to_netcdf(tmp_path / "other.nc",
                                                                  engine="h5netcdf")
    with pytest.raises(StateError, match=r"holds variables \['a', 'b'\]; expected one 1-D "
                                         r"variable per component \['x', 'v'\]"):
        open_states(tmp_path / "other.nc", NAMES)
    (tmp_path / "broken.nc").write_bytes(b"not a netcdf file")
    with pytest.raises(StateError, match="could not be read"):
        open_states(tmp_path / "broken.nc", NAMES)


@pytest.mark.parametrize("lazy", [False, True])
def test_chunks_cover_every_member_once_in_order(lazy):
    array = da.from_array(STATES, chunks=(7, 1)) if lazy else STATES
    source = StateSource(array)
    parts = list(source.chunks(10))
    assert [start for start, _ in parts] == [0, 10, 20]
    blocks = dask.compute(*[block for _, block in parts]) if lazy else [b for _, b in parts]
    assert [len(block) for block in blocks] == [10, 10, 3]
    np.testing.assert_array_equal(np.concatenate(blocks), STATES)


@pytest.mark.parametrize("lazy", [False, True])
def test_check_finite_names_the_first_bad_member(lazy):
    states = STATES.copy()
    states[[13, 17], [1, 0]] = [np.nan, np.inf]
    array = da.from_array(states, chunks=(5, 2)) if lazy else states
    with pytest.raises(StateError, match="member 13 holds a non-finite value"):
        check_finite(StateSource(array), dask.compute)
    check_finite(StateSource(da.from_array(STATES, chunks=5) if lazy else STATES),
                 dask.compute)
