"""`runtime/limits.py`: the documented defaults and the frozen record.

Expected values: the README's "Limits (defaults; settable)" section, which users read; a
change to either must change both.
"""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import pytest

from stridecast.runtime import BundleError, Limits, StateError, load
from stridecast.runtime.limits import DEFAULT_LIMITS
from tests.builders import linear_bundle, oscillator_matrix

README = Path(__file__).resolve().parents[2] / "README.md"


def _readme_limits() -> str:
    text = README.read_text(encoding="utf-8")
    section = re.search(r"^## Limits \(defaults; settable\)\n(.*?)^## ", text, re.S | re.M)
    return " ".join(section.group(1).split())


@pytest.mark.parametrize(("phrase", "field", "expected"), [
    ("Bundle file ≤ 256 MiB", "max_model_bytes", 256 * 2**20),
    ("protobuf depth ≤ 16", "max_protobuf_depth", 16),
    ("tensor ≤ 2^28 elements", "max_tensor_elements", 2**28),
    ("manifest ≤ 1 MiB", "max_manifest_bytes", 2**20),
    ("network steps per query ≤ 10^6", "max_steps_per_query", 10**6),
    ("batch ≤ 65,536 states", "max_batch", 65_536),
    ("forecast points ≤ 100,000 per call", "max_forecast_points", 100_000),
])
def test_defaults_are_the_documented_ones(phrase, field, expected):
    assert phrase in _readme_limits()
    assert getattr(Limits(), field) == expected
    assert getattr(DEFAULT_LIMITS, field) == expected


def test_limits_are_frozen_and_changed_by_copy():
    with pytest.raises(dataclasses.FrozenInstanceError):
        DEFAULT_LIMITS.max_batch = 1  # type: ignore[misc]
    smaller = dataclasses.replace(DEFAULT_LIMITS, max_batch=2)
    assert smaller.max_batch == 2 and DEFAULT_LIMITS.max_batch == 65_536
    assert smaller.max_model_bytes == DEFAULT_LIMITS.max_model_bytes


def test_a_modified_copy_passed_to_load_is_the_one_enforced(tmp_path):
    path = linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                         strides=(1, 4))
    state = [[1.0, 0.0]] * 3
    assert load(path).advance(state, 0.4).shape == (3, 2)
    with pytest.raises(StateError, match="holds 3 states; the limit is 2"):
        load(path, limits=Limits(max_batch=2)).advance(state, 0.4)
    with pytest.raises(BundleError, match=r"strides \[4\] exceed the limit of 2"):
        load(path, limits=Limits(max_stride=2))
