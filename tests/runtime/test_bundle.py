"""Bundle reading and writing: manifest validation, path safety, checksums, atomic writes."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest

from stridecast.runtime import BundleError, Limits, load
from stridecast.runtime import bundle as bundle_module
from tests.builders import edit_manifest, linear_bundle, oscillator_matrix


@pytest.fixture
def bundle(tmp_path) -> Path:
    return linear_bundle(tmp_path / "osc.bundle", oscillator_matrix(), base_step=0.1,
                         strides=(1, 4))


def test_round_trip_manifest(bundle):
    stepper = load(bundle)
    assert stepper.strides == (1, 4)
    assert stepper.state_names == ("x0", "x1")
    assert stepper.base_step == 0.1
    document = json.loads((bundle / "manifest.json").read_text())
    assert document["format"] == "stridecast.bundle" and document["format_version"] == 1
    assert [level["file"] for level in document["levels"]] == [
        "levels/stride-00001.onnx", "levels/stride-00004.onnx"]


@pytest.mark.parametrize("path", [
    "../outside.onnx", "/etc/passwd", "levels/../../x.onnx", "levels\\stride.onnx",
    "levels/stride\x00.onnx", "C:/models/x.onnx", "",
])
def test_path_escapes_refused(bundle, path):
    edit_manifest(bundle, lambda d: d["levels"][0].__setitem__("file", path))
    with pytest.raises(BundleError, match=r"levels\[0\]\.file"):
        load(bundle)


def test_symlinked_level_refused(bundle, tmp_path):
    target = bundle / "levels" / "stride-00001.onnx"
    outside = tmp_path / "outside.onnx"
    outside.write_bytes(target.read_bytes())
    target.unlink()
    target.symlink_to(outside)
    with pytest.raises(BundleError, match="symlink"):
        load(bundle)


def test_symlinked_directory_refused(bundle, tmp_path):
    moved = tmp_path / "elsewhere"
    (bundle / "levels").rename(moved)
    (bundle / "levels").symlink_to(moved)
    with pytest.raises(BundleError, match="symlink"):
        load(bundle)


def test_hard_link_refused(bundle, tmp_path):
    os.link(bundle / "levels" / "stride-00004.onnx", tmp_path / "alias.onnx")
    with pytest.raises(BundleError, match="hard link"):
        load(bundle)


def test_missing_level_file(bundle):
    (bundle / "levels" / "stride-00004.onnx").unlink()
    with pytest.raises(BundleError, match=r"stride-00004\.onnx.*missing"):
        load(bundle)


def test_checksum_mismatch(bundle):
    path = bundle / "levels" / "stride-00001.onnx"
    data = bytearray(path.read_bytes())
    data[-1] ^= 0xFF
    path.write_bytes(bytes(data))
    with pytest.raises(BundleError, match=r"checksum of 'levels/stride-00001\.onnx'"):
        load(bundle)


@pytest.mark.parametrize(("change", "message"), [
    (lambda d: d.__setitem__("format_version", 2), "knows version 1 only"),
    (lambda d: d.__setitem__("format", "other"), "`format`"),
    (lambda d: d.__setitem__("surprise", 1), "unknown fields"),
    (lambda d: d["time"].__setitem__("base_step", 0), "time.base_step"),
    (lambda d: d["time"].__setitem__("base_step", "0.1"), "time.base_step"),
    (lambda d: d["normalization"].__setitem__("scale", [1.0, -1.0]), "scale"),
    (lambda d: d["normalization"].__setitem__("mean", [1.0]), "normalization.mean"),
    (lambda d: d.__setitem__("update", "multiply"), "`update`"),
    (lambda d: d["levels"][1].__setitem__("stride", 1), "distinct"),
    (lambda d: d["levels"][1].__setitem__("stride", 0), "positive integer"),
    (lambda d: d["levels"][1].__setitem__("sha256", "abc"), "hexadecimal"),
    (lambda d: d["state"].__setitem__("names", ["a", "a"]), "distinct"),
    (lambda d: d.__setitem__("levels", []), "non-empty"),
    (lambda d: d.__setitem__("envelope", {"min": [1, 1], "max": [0, 0]}), "envelope"),
])
def test_manifest_validation(bundle, change, message):
    edit_manifest(bundle, change)
    with pytest.raises(BundleError, match=message):
        load(bundle)


def test_producer_extras_ignored(bundle):
    edit_manifest(bundle, lambda d: d["producer"].update({"anything": {"nested": 1}}))
    assert load(bundle).strides == (1, 4)


def test_manifest_size_and_nesting_limits(bundle):
    with pytest.raises(BundleError, match="limit is 100 bytes"):
        load(bundle, limits=Limits(max_manifest_bytes=100))
    (bundle / "manifest.json").write_text("[" * 100_000 + "]" * 100_000)
    with pytest.raises(BundleError, match="nested too deeply"):
        load(bundle)


def test_nan_in_manifest_refused(bundle):
    text = (bundle / "manifest.json").read_text().replace('"base_step": 0.1', '"base_step": NaN')
    (bundle / "manifest.json").write_text(text)
    with pytest.raises(BundleError, match="NaN"):
        load(bundle)


def test_not_a_directory(tmp_path):
    with pytest.raises(BundleError, match="does not exist"):
        load(tmp_path / "nothing")
    (tmp_path / "file").write_text("x")
    with pytest.raises(BundleError, match="not a directory"):
        load(tmp_path / "file")


def test_write_refuses_existing_and_overwrites_atomically(bundle):
    with pytest.raises(BundleError, match="already exists"):
        linear_bundle(bundle, oscillator_matrix(), base_step=0.1, strides=(1, 4))
    linear_bundle(bundle, oscillator_matrix(), base_step=0.2, strides=(2,), overwrite=True)
    assert load(bundle).strides == (2,)
    assert [p.name for p in bundle.parent.iterdir() if p.name.startswith(".")] == []


def test_interrupted_write_leaves_nothing(tmp_path, monkeypatch, bundle):
    before = (bundle / "manifest.json").read_bytes()

    def fail(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(bundle_module, "move_into_place", fail)
    with pytest.raises(OSError, match="simulated"):
        linear_bundle(tmp_path / "new.bundle", oscillator_matrix(), base_step=0.1, strides=(1,))
    with pytest.raises(OSError, match="simulated"):
        linear_bundle(bundle, oscillator_matrix(), base_step=0.3, strides=(1,), overwrite=True)
    assert not (tmp_path / "new.bundle").exists()
    assert (bundle / "manifest.json").read_bytes() == before
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []
    np.testing.assert_equal(load(bundle).strides, (1, 4))
