"""Loading trajectory files: .npy and .npz keys, shapes, finiteness, refusals."""

from __future__ import annotations

import numpy as np
import pytest

from stridecast.export import load_trajectories
from stridecast.runtime import StateError


def test_npy_single_trajectory(tmp_path):
    path = tmp_path / "one.npy"
    np.save(path, np.arange(12.0).reshape(6, 2))
    data = load_trajectories(path)
    assert data.trajectories.shape == (1, 6, 2) and data.trajectories.dtype == np.float64
    assert data.base_step is None and data.state_names is None


def test_npz_with_all_keys(tmp_path):
    path = tmp_path / "data.npz"
    np.savez(path, trajectories=np.zeros((3, 5, 2), dtype=np.float32), base_step=0.25,
             state_names=np.array(["theta", "omega"]), units=np.array(["rad", "rad/s"]),
             comment=np.array("ignored"))
    data = load_trajectories(path)
    assert data.trajectories.shape == (3, 5, 2)
    assert data.base_step == 0.25
    assert data.state_names == ("theta", "omega") and data.units == ("rad", "rad/s")


@pytest.mark.parametrize(("contents", "message"), [
    ({"states": np.zeros((2, 5, 2))}, r"has keys \['states'\]; the key 'trajectories'"),
    ({"trajectories": np.zeros((2, 5, 2)), "base_step": np.array([0.1, 0.2])},
     r"`base_step` in .* must be one number"),
    ({"trajectories": np.zeros((2, 5, 2)), "state_names": np.array(["a"])},
     r"`state_names` in .* must be 2 strings; got <U1 array of shape \(1,\)\."),
    ({"trajectories": np.zeros((2, 5, 2, 1))}, r"has shape \(2, 5, 2, 1\); expected \(N, T, d\)"),
    ({"trajectories": np.zeros((0, 5, 2))}, r"has shape \(0, 5, 2\)"),
    ({"trajectories": np.array([[[0.0, np.inf]]])},
     r"holds NaN or infinity \(1 values\), first at trajectory 0, step 0, component 1\."),
    ({"trajectories": np.array([[["a", "b"]]])}, r"cannot be read as numbers"),
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
    ("missing.npy", r"does not exist or is not a file\."),
    ("data.csv", r"has suffix '\.csv'; expected \.npy or \.npz\."),
    ("broken.npy", r"cannot read .* as a NumPy array"),
])
def test_refuses_bad_files(tmp_path, name, message):
    if name != "missing.npy":
        (tmp_path / name).write_text("1,2,3\n")
    with pytest.raises(StateError, match=message):
        load_trajectories(tmp_path / name)
