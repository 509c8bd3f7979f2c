"""Loading trajectory files (`export/data.py`): NumPy files read back equal what NumPy wrote,
ragged data, metadata, and the refusals. HDF5, NetCDF and zarr: test_data_formats.py."""

from __future__ import annotations

import json

import numpy as np
import pytest

from stridecast.export import load_trajectories
from stridecast.export.data import check_trajectories
from stridecast.runtime import StateError

RNG = np.random.default_rng(0)
# Three trajectories of different lengths, d = 2: the ragged case every format must carry.
RAGGED = [RNG.normal(size=(length, 2)) for length in (7, 12, 5)]


def assert_same(loaded, expected) -> None:
    assert len(loaded) == len(expected)
    for got, want in zip(loaded, expected, strict=True):
        assert got.dtype == np.float64
        np.testing.assert_array_equal(got, want)


def test_npy_single_trajectory(tmp_path):
    path = tmp_path / "one.npy"
    np.save(path, np.arange(12.0).reshape(6, 2))
    data = load_trajectories(path)
    assert_same(data.trajectories, [np.arange(12.0).reshape(6, 2)])
    assert data.base_step is None and data.state_names is None and data.time_unit is None


def test_npy_regular_trajectories(tmp_path):
    values = RNG.normal(size=(3, 6, 2))
    np.save(tmp_path / "many.npy", values)
    assert_same(load_trajectories(tmp_path / "many.npy").trajectories, list(values))


def test_npz_with_all_keys(tmp_path):
    path = tmp_path / "data.npz"
    np.savez(path, trajectories=np.zeros((3, 5, 2), dtype=np.float32), base_step=0.25,
             state_names=np.array(["theta", "omega"]), units=np.array(["rad", "rad/s"]),
             time_unit=np.array("min"), comment=np.array("ignored"))
    data = load_trajectories(path)
    assert_same(data.trajectories, [np.zeros((5, 2))] * 3)
    assert data.base_step == 0.25 and data.time_unit == "min"
    assert data.state_names == ("theta", "omega") and data.units == ("rad", "rad/s")


def test_npz_with_one_array_per_trajectory(tmp_path):
    path = tmp_path / "ragged.npz"
    np.savez(path, run_a=RAGGED[0], run_b=RAGGED[1], run_c=RAGGED[2],
             base_step=np.float32(0.01))
    data = load_trajectories(path)
    assert_same(data.trajectories, RAGGED)
    # float32(0.01) is 0.009999999776...; the intended decimal is kept (shortest round trip).
    assert data.base_step == 0.01


def test_folder_of_npy_files_in_natural_order(tmp_path):
    folder = tmp_path / "runs"
    folder.mkdir()
    for index, array in zip((2, 10, 1), RAGGED, strict=True):
        np.save(folder / f"run{index}.npy", array)
    (folder / "metadata.json").write_text(json.dumps(
        {"base_step": 0.5, "state_names": ["q", "p"], "time_unit": "h"}))
    data = load_trajectories(folder)
    # run1, run2, run10: digits compare as numbers.
    assert_same(data.trajectories, [RAGGED[2], RAGGED[0], RAGGED[1]])
    assert (data.base_step, data.state_names, data.time_unit) == (0.5, ("q", "p"), "h")


def test_list_input_is_ragged_and_regular_input_equals_its_list():
    ragged = check_trajectories(RAGGED)
    assert ragged.lengths.tolist() == [7, 12, 5]
    assert_same(ragged.to_list(), RAGGED)
    regular = np.stack([RAGGED[1], RAGGED[1] + 3])
    assert_same(check_trajectories(regular).to_list(), check_trajectories(list(regular))
                .to_list())


@pytest.mark.parametrize(("contents", "message"), [
    ({"trajectories": np.zeros((2, 5, 2)), "base_step": np.array([0.1, 0.2])},
     r"`base_step` in .* must be one number > 0; got array\(\[0\.1, 0\.2\]\)\."),
    ({"trajectories": np.zeros((2, 5, 2)), "state_names": np.array(["a"])},
     r"`state_names` in .* has 1 entries \['a'\]; the states have 2 components\."),
    ({"trajectories": np.zeros((2, 5, 2)), "units": np.array([1, 2])},
     r"`units` in .* must be a list of strings; got int64 array of shape \(2,\)\."),
    ({"trajectories": np.zeros((2, 5, 2, 1))}, r"has shape \(2, 5, 2, 1\); expected \(N, T, d\)"),
    ({"trajectories": np.zeros((0, 5, 2))}, r"is empty \(shapes \[\]\)"),
    ({"trajectories": np.zeros(7)}, r"has shape \(7,\); .*\(a scalar series x of shape \(T,\) "
                                    r"is x\[:, None\]\)\."),
    ({"trajectories": np.array([[[0.0, np.inf]]])},
     r"holds NaN or infinity \(1 values\), first at trajectory 0, step 0, component 1\."),
    ({"trajectories": np.array([[["a", "b"]]])}, r"cannot be read as numbers"),
    ({"a": np.zeros((5, 2)), "b": np.zeros((6, 3))},
     r"mixes state sizes: trajectory 0 has 2 components, trajectory 1 has 3;"),
    ({"base_step": 0.1}, r"holds no trajectories \(keys \['base_step'\]\); expected the key "
                         r"'trajectories' or one array \(T_i, d\) per trajectory\."),
    # (d, T) given as (T, d): the names match the first axis.
    ({"trajectories": np.zeros((3, 400)), "state_names": np.array(["x", "y", "z"])},
     r"has shape \(3, 400\) per trajectory but 3 state names, matching its first axis: the "
     r"data look like \(d, T\); transpose them"),
])
def test_refuses_bad_npz(tmp_path, contents, message):
    path = tmp_path / "bad.npz"
    np.savez(path, **contents)
    with pytest.raises(StateError, match=message):
        load_trajectories(path)


def test_refuses_pickled_objects(tmp_path):
    path = tmp_path / "objects.npz"
    np.savez(path, trajectories=np.array([{"not": "numbers"}], dtype=object))
    with pytest.raises(StateError, match=r"cannot read .* as an \.npz archive"):
        load_trajectories(path)


@pytest.mark.parametrize(("name", "message"), [
    ("missing.npy", r"does not exist\."),
    ("data.csv", r"has suffix '\.csv'; expected \.npy, \.npz, a folder of \.npy files, or one "
                 r"of \['\.h5', '\.hdf5', '\.nc', '\.zarr'\]\."),
    ("broken.npy", r"cannot read .* as a NumPy array"),
    ("broken.h5", r"cannot read .* as HDF5"),
    ("broken.nc", r"cannot read .* as NetCDF"),
])
def test_refuses_bad_files(tmp_path, name, message):
    if name != "missing.npy":
        (tmp_path / name).write_text("1,2,3\n")
    with pytest.raises(StateError, match=message):
        load_trajectories(tmp_path / name)


def test_refuses_bad_folders(tmp_path):
    with pytest.raises(StateError, match=r"holds no \.npy files"):
        load_trajectories(tmp_path)
    np.save(tmp_path / "a.npy", np.zeros((3, 4, 2)))
    with pytest.raises(StateError, match=r"a\.npy' has shape \(3, 4, 2\); each file of a "
                                         r"folder is one trajectory \(T_i, d\)\."):
        load_trajectories(tmp_path)
