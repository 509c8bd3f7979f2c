"""Finding, naming, loading and verifying models at start."""

from __future__ import annotations

import logging
import shutil

import pytest

from stridecast.service import create_app
from stridecast.service.registry import discover, load_registry, named_sources


def test_a_folder_of_bundles_names_each_after_its_folder(models_dir):
    assert [name for name, _ in discover(models_dir)] == ["broken", "oscillator"]
    assert discover(models_dir / "oscillator") == [("oscillator", models_dir / "oscillator")]


def test_a_failing_bundle_is_reported_and_logged_not_served(models_dir, caplog):
    with caplog.at_level(logging.ERROR, logger="stridecast.service"):
        registry = load_registry(named_sources([models_dir]))
    assert registry.loaded and registry.ready
    assert [entry.name for entry in registry.served] == ["oscillator"]
    broken = registry.get("broken")
    assert not broken.ready and "the file was changed or corrupted" in broken.error
    assert "model 'broken'" in caplog.text and "not served" in caplog.text


def test_a_missing_path_is_a_failed_entry(tmp_path):
    registry = load_registry(named_sources([tmp_path / "absent"]))
    (entry,) = registry.entries
    assert entry.name == "absent" and not entry.ready
    assert "does not exist" in entry.error
    assert not registry.ready


def test_mapping_names_models_and_duplicate_names_fail(oscillator_path, tmp_path):
    registry = load_registry(named_sources({"osc": oscillator_path}))
    assert registry.get("osc").ready
    elsewhere = tmp_path / "elsewhere" / "oscillator"
    shutil.copytree(oscillator_path, elsewhere)
    duplicate = load_registry(named_sources([oscillator_path, elsewhere]))
    assert [(entry.name, entry.ready) for entry in duplicate.entries] == [
        ("oscillator", True), ("oscillator", False)]
    assert "already taken" in duplicate.entries[-1].error


def test_loaded_steppers_are_accepted(make_client, stepper):
    by_name = make_client({"mine": stepper})
    assert by_name.post("/v1/models/mine/advance", json={"state": [1, 0], "t": 1}).status_code \
        == 200
    by_manifest = make_client([stepper])
    assert by_manifest.get("/v1/models/oscillator").status_code == 200


@pytest.mark.parametrize(("models", "error", "pattern"), [
    ("bundle-path", TypeError, r"got a single path 'bundle-path' \(wrap it in a list\)"),
    ({"a/b": "x"}, ValueError, r"model name 'a/b' must be a non-empty string without '/'"),
    ([42], TypeError, r"model 'model-0' is a int; expected a bundle path"),
])
def test_arguments_that_are_not_models_fail_early(models, error, pattern):
    with pytest.raises(error, match=pattern):
        create_app(models)


def test_steppers_get_the_thread_count_of_the_settings(oscillator_path):
    registry = load_registry(named_sources([oscillator_path]), threads=3)
    (entry,) = registry.served
    assert {kernel.policy.threads for kernel in entry.stepper._kernels.values()} == {3}
    default = load_registry(named_sources([oscillator_path]))
    assert {k.policy.threads for k in default.served[0].stepper._kernels.values()} == {1}
