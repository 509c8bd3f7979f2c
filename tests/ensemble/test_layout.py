"""`stridecast/ensemble/layout.py`: the ensemble dataset's variables, units and identity.

References: the CF conventions 1.11 §3.5 ("Flags": `flag_values` and a blank-separated
`flag_meanings` of the same length) and §1.3 (`units`, `long_name`); the bundle's level files
hashed with `hashlib.sha256` for the checksums; the bundle's validated horizon (a time is
beyond it when greater) for the time flags; `Stepper.expected_error` for the error curve.
"""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest

import stridecast
from stridecast.ensemble import layout
from stridecast.ensemble.chunks import forecast_chunk
from stridecast.ensemble.layout import (
    FLAG_ATTRS,
    MEMBER,
    TIME,
    chunk_arrays,
    component_names,
    identity,
    skeleton,
)
from stridecast.runtime import StateError, load
from tests.builders import edit_manifest, linear_bundle, oscillator_matrix
from tests.systems import OSCILLATOR_HORIZON, write_oscillator

TIMES = np.array([0.0, 1.0, 4.0, 6.0])


@pytest.fixture(scope="module")
def bundle(tmp_path_factory):
    return write_oscillator(tmp_path_factory.mktemp("layout") / "oscillator")


@pytest.fixture(scope="module")
def stepper(bundle):
    return load(bundle)


@pytest.fixture(scope="module")
def dataset(stepper):
    return skeleton(stepper, members=10, times=TIMES, chunk_states=4,
                    probe=np.zeros((1, 2), np.float32))


def test_component_variables_carry_units_and_member_chunks(dataset, stepper):
    for name, units in (("x", "m"), ("v", "m/s")):
        variable = dataset[name]
        assert variable.dims == (MEMBER, TIME) and variable.shape == (10, 4)
        assert variable.dtype == stepper.dtype
        assert variable.attrs == {"units": units, "long_name": name}
        assert variable.chunks == ((4, 4, 2), (4,))
    np.testing.assert_array_equal(dataset[MEMBER].values, np.arange(10))
    np.testing.assert_array_equal(dataset[TIME].values, TIMES)
    assert dataset[TIME].attrs["units"] == "s"


def test_trust_variables_follow_the_runtime(dataset, stepper):
    np.testing.assert_array_equal(dataset["expected_error"].values,
                                  stepper.expected_error(TIMES))
    np.testing.assert_array_equal(dataset["beyond_horizon"].values,
                                  (TIMES > OSCILLATOR_HORIZON).astype(np.int8))
    for kind in ("outside_box", "far_from_data"):
        assert dataset[kind].dims == (MEMBER, TIME)
        assert dataset[f"initial_{kind}"].dims == (MEMBER,)
    assert json.loads(dataset.attrs["findings"]) == []  # this bundle has a horizon


def test_flag_attributes_follow_cf(dataset):
    flagged = [name for name, variable in dataset.variables.items()
               if "flag_values" in variable.attrs]
    assert sorted(flagged) == ["beyond_horizon", "far_from_data", "initial_far_from_data",
                               "initial_outside_box", "outside_box"]
    assert len(FLAG_ATTRS["flag_meanings"].split(" ")) == len(FLAG_ATTRS["flag_values"])
    for name in flagged:
        assert dataset[name].attrs["long_name"]


def test_identity_names_the_bundle_and_its_checksums(bundle, stepper):
    attrs = identity(stepper)
    checksums = json.loads(attrs["bundle_checksums"])
    files = sorted((bundle / "levels").glob("*.onnx"))
    assert sorted(checksums.values()) == sorted(
        hashlib.sha256(path.read_bytes()).hexdigest() for path in files)
    assert json.loads(attrs["bundle_strides"]) == [1, 4, 16]
    assert attrs["bundle_name"] == "oscillator" and attrs["bundle_base_step"] == 0.05
    assert attrs["bundle_validated_horizon"] == OSCILLATOR_HORIZON
    assert attrs["stridecast_version"] == stridecast.__version__
    # NetCDF attributes are strings or numbers: nothing structured is left as a dict.
    assert all(isinstance(value, str | int | float) for value in attrs.values())


def test_components_named_like_the_layout_s_own_variables_are_refused(tmp_path):
    path = linear_bundle(tmp_path / "clash.bundle", oscillator_matrix(), base_step=0.1,
                         strides=(1,))

    def rename(document):
        document["state"]["names"] = ["time", "outside_box"]

    edit_manifest(path, rename)
    with pytest.raises(StateError, match=r"components \['outside_box', 'time'\] clash"):
        component_names(load(path))


def test_chunk_arrays_split_components_and_number_members(stepper):
    states = np.array([[1.0, 0.0], [0.0, 1.0], [3.0, 0.0]], np.float32)
    result = forecast_chunk(stepper, states, TIMES, start=7)
    arrays = chunk_arrays(("x", "v"), result)
    np.testing.assert_array_equal(arrays["x"], result.values[:, :, 0])
    np.testing.assert_array_equal(arrays["v"], result.values[:, :, 1])
    np.testing.assert_array_equal(arrays[MEMBER], [7, 8, 9])
    for kind, flags in result.flags.items():
        assert arrays[kind] is flags


def test_every_member_variable_of_the_skeleton_is_filled_by_a_chunk(dataset, stepper):
    result = forecast_chunk(stepper, np.zeros((2, 2), np.float32), TIMES, start=0)
    per_member = {name for name, variable in dataset.variables.items()
                  if MEMBER in variable.dims}
    assert set(chunk_arrays(layout.component_names(stepper), result)) == per_member
