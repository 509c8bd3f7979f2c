"""`describe_stepper`: the one description of a loaded stepper (runtime/describe.py).

Expected values: the bundle's own manifest.json read with the standard library's json (the
file the stepper was loaded from), and what the builder was asked to write.
"""

from __future__ import annotations

import json

from stridecast.runtime import load
from stridecast.runtime.describe import describe_stepper
from tests.builders import field_bundle, linear_bundle, oscillator_matrix


def test_describes_the_loaded_stepper_as_its_manifest_says(tmp_path):
    out = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                        strides=(1, 4), envelope=([-2.0, -4.0], [2.0, 4.0]),
                        validated_horizon=1.5, name="osc")
    document = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    described = describe_stepper(load(out, dtype="float64"))
    assert described == {
        "name": document["name"],
        "description": document.get("description", ""),
        "state": {"dim": document["state"]["dim"], "names": document["state"]["names"],
                  "units": document["state"]["units"]},
        "time": {"base_step": document["time"]["base_step"], "unit": document["time"]["unit"]},
        "strides": [level["stride"] for level in document["levels"]],
        "update": document["update"],
        "envelope": {"min": [-2.0, -4.0], "max": [2.0, 4.0]},
        "validated_horizon": 1.5,
        "dtype": "float64",
        "latent_dim": None,
        "kernel_paths": {"1": "affine-chain", "4": "affine-chain"},
    }
    # Plain data: it survives a JSON round trip unchanged.
    assert json.loads(json.dumps(described)) == described


def test_a_subset_and_a_reduced_bundle_describe_themselves(tmp_path):
    out = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                        strides=(1, 4, 16), validated_horizon=1.5)
    subset = describe_stepper(load(out).with_levels((1, 16)))
    # A subset runs only its levels, and the full bundle's validated horizon no longer holds.
    assert subset["strides"] == [1, 16] and subset["validated_horizon"] is None
    assert subset["dtype"] == "float32" and set(subset["kernel_paths"]) == {"1", "16"}
    field = field_bundle(tmp_path / "field.bundle", dim=50, rates=[-1.0, -2.0, -3.0],
                         base_step=0.1, strides=(1, 2))
    described = describe_stepper(load(field))
    assert described["state"]["dim"] == 50 and len(described["state"]["names"]) == 50
    assert described["latent_dim"] == 3 and described["envelope"] is None
