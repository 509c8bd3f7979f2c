"""`stridecast ensemble` end to end on a local cluster of worker processes."""

from __future__ import annotations

import numpy as np
import pytest

from stridecast import demo_bundle
from stridecast.cli import main
from stridecast.runtime import load

DEMO_BUNDLE = demo_bundle()

xr = pytest.importorskip("xarray", reason="needs the ensemble extra")
pytest.importorskip("distributed", reason="needs the ensemble extra")


def test_ensemble_command_writes_netcdf_equal_to_forecast(tmp_path, capsys):
    stepper = load(DEMO_BUNDLE)
    rng = np.random.default_rng(2)
    states = np.array([3.0, -24.0, 0.0, 0.0]) + rng.normal(size=(300, 4)) * [1, 0.05, 0.5, 0.1]
    np.save(tmp_path / "states.npy", states)
    out = tmp_path / "ensemble.nc"
    code = main(["ensemble", "--demo", "--states", str(tmp_path / "states.npy"), "--until", "2",
                 "--every", "0.5", "--out", str(out), "--workers", "1", "--no-progress"])
    assert code == 0 and "wrote 300 members × 5 times" in capsys.readouterr().out
    dataset = xr.open_dataset(out, engine="h5netcdf")
    assert [dataset[name].attrs["units"] for name in ("x", "z", "vx", "vz")] == \
        ["m", "m", "m/s", "m/s"]
    # The reference is the runtime's own forecast; float32 products may round differently
    # with the BLAS thread count, hence a float32-sized tolerance (common practice).
    direct = stepper.forecast(states, np.arange(5) * 0.5).transpose(1, 0, 2)
    got = np.stack([dataset[name].values for name in ("x", "z", "vx", "vz")], axis=-1)
    np.testing.assert_allclose(got, direct, rtol=1e-5, atol=1e-4)


def test_ensemble_command_refuses_a_wrong_state_file(tmp_path, capsys):
    np.save(tmp_path / "states.npy", np.zeros((5, 3)))
    code = main(["ensemble", "--demo", "--states", str(tmp_path / "states.npy"), "--until", "1",
                 "--every", "0.5", "--out", str(tmp_path / "o.zarr"), "--workers", "1",
                 "--no-progress"])
    assert code == 1
    assert "shape (5, 3)" in capsys.readouterr().err
    assert not (tmp_path / "o.zarr").exists()
