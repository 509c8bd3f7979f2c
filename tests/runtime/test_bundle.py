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
    (lambda d: d["levels"][1].__setitem__("stride", 0), "positive number of base steps"),
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


def test_check_target_names_the_option_and_never_replaces_a_file(tmp_path):
    # The one overwrite rule (runtime.bundle.check_target) that every writer calls.
    bundle_module.check_target(tmp_path / "new.bundle", overwrite=False)  # nothing there: fine
    existing = tmp_path / "old.bundle"
    existing.mkdir()
    with pytest.raises(BundleError, match=r"^`--out` '.*old\.bundle' already exists; pass "
                                          r"--overwrite\.$"):
        bundle_module.check_target(existing, overwrite=False, where="--out",
                                   hint="pass --overwrite")
    bundle_module.check_target(existing, overwrite=True)
    (tmp_path / "file").write_text("x")
    with pytest.raises(BundleError, match=r"exists and is not a directory; refusing"):
        bundle_module.check_target(tmp_path / "file", overwrite=True)
    (tmp_path / "link").symlink_to(existing)
    with pytest.raises(BundleError, match=r"exists and is not a directory; refusing"):
        bundle_module.check_target(tmp_path / "link", overwrite=True)


def test_write_report_replaces_the_file_whole_and_readable(bundle):
    path = bundle_module.write_report(bundle, {"a": [1.5, None]})
    assert json.loads(path.read_text()) == {"a": [1.5, None]}
    assert path.stat().st_mode & 0o777 == 0o644  # bundles are read by other users
    bundle_module.write_report(bundle, {"b": 2})
    assert json.loads(path.read_text()) == {"b": 2}
    # JSON has no NaN (RFC 8259, section 6): refused, and the old file stays as it was.
    with pytest.raises(BundleError, match=r"`report` cannot be written as JSON"):
        bundle_module.write_report(bundle, {"c": float("nan")})
    assert json.loads(path.read_text()) == {"b": 2}
    assert [p.name for p in bundle.iterdir() if p.name.startswith(".report")] == []


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


# ------------------------------------------------------------------- envelope samples file
SAMPLES = np.array([[0.0, 0.0], [1.0, -1.0], [0.5, 0.25]])


@pytest.fixture
def sampled(tmp_path) -> Path:
    return linear_bundle(tmp_path / "sampled.bundle", oscillator_matrix(), base_step=0.1,
                         strides=(1, 4), envelope=([-2.0, -4.0], [2.0, 4.0]),
                         samples=SAMPLES, radius=0.3)


def write_samples_file(bundle: Path, array: np.ndarray, *, fortran: bool = False) -> None:
    """Replace the samples file and record its new checksum, as a tamperer would."""
    import io

    buffer = io.BytesIO()
    np.save(buffer, np.asfortranarray(array) if fortran else array, allow_pickle=True)
    data = buffer.getvalue()
    (bundle / "envelope" / "samples.npy").write_bytes(data)
    edit_manifest(bundle, lambda d: d["envelope"]["samples"].__setitem__(
        "sha256", bundle_module.sha256_hex(data)))


def test_samples_file_written_checksummed_and_read_back(sampled):
    document = json.loads((sampled / "manifest.json").read_text())
    entry = document["envelope"]["samples"]
    assert entry["file"] == "envelope/samples.npy" and entry["count"] == 3
    data = (sampled / entry["file"]).read_bytes()
    assert entry["sha256"] == bundle_module.sha256_hex(data)
    # numpy.load (the reference reader of its own format) sees the same array.
    import io
    np.testing.assert_array_equal(np.load(io.BytesIO(data), allow_pickle=False), SAMPLES)
    manifest = bundle_module.read_manifest(sampled)
    read = bundle_module.read_envelope_samples(sampled, manifest)
    np.testing.assert_array_equal(read, SAMPLES)
    assert load(sampled).manifest.envelope_samples.radius == 0.3


def test_samples_checksum_mismatch(sampled):
    path = sampled / "envelope" / "samples.npy"
    data = bytearray(path.read_bytes())
    data[-1] ^= 0x01
    path.write_bytes(bytes(data))
    with pytest.raises(BundleError, match=r"checksum of 'envelope/samples\.npy' \(envelope"):
        load(sampled)


@pytest.mark.parametrize(("array", "fortran", "message"), [
    (SAMPLES[:2], False, r"has shape \(2, 2\); the manifest promises \(3, 2\)"),
    (SAMPLES.astype(">f8"), False, r"holds dtype '>f8'; expected one of \['<f4', '<f8'\]"),
    (SAMPLES.astype(np.int64), False, r"holds dtype '<i8'"),
    (np.array([[1, 2], [3, 4], [5, 6]], dtype=object), False, r"holds dtype '\|O'"),
    (SAMPLES, True, r"is stored in Fortran order; expected C order"),
    (np.where(SAMPLES == 1.0, np.nan, SAMPLES), False, r"holds non-finite values"),
])
def test_bad_samples_file_refused(sampled, array, fortran, message):
    write_samples_file(sampled, array, fortran=fortran)
    with pytest.raises(BundleError, match=r"`envelope.samples.file` " + message):
        load(sampled)


def test_samples_file_not_npy_or_truncated(sampled):
    path = sampled / "envelope" / "samples.npy"
    good = path.read_bytes()
    for data, message in ((b"not a numpy file", "is not a readable .npy file"),
                          (good[:-8], "holds 40 bytes of data; shape \\(3, 2\\) of <f8 needs 48")):
        path.write_bytes(data)
        edit_manifest(sampled, lambda d, data=data: d["envelope"]["samples"].__setitem__(
            "sha256", bundle_module.sha256_hex(data)))
        with pytest.raises(BundleError, match=message):
            load(sampled)


@pytest.mark.parametrize("path", ["../samples.npy", "/etc/passwd", "envelope/../../x.npy"])
def test_samples_path_escapes_refused(sampled, path):
    edit_manifest(sampled, lambda d: d["envelope"]["samples"].__setitem__("file", path))
    with pytest.raises(BundleError, match=r"`envelope\.samples\.file`"):
        load(sampled)


def test_samples_symlink_and_size_limit_refused(sampled, tmp_path):
    size = (sampled / "envelope" / "samples.npy").stat().st_size
    level_size = max(p.stat().st_size for p in (sampled / "levels").iterdir())
    assert level_size < size  # so a limit between them stops only the samples file
    with pytest.raises(BundleError, match=rf"samples\.npy' of {size} bytes; the limit is"):
        load(sampled, limits=Limits(max_model_bytes=level_size))
    target = sampled / "envelope" / "samples.npy"
    outside = tmp_path / "outside.npy"
    outside.write_bytes(target.read_bytes())
    target.unlink()
    target.symlink_to(outside)
    with pytest.raises(BundleError, match="symlink"):
        load(sampled)


def test_write_bundle_checks_extra_files(sampled, tmp_path):
    from dataclasses import replace

    manifest = bundle_module.read_manifest(sampled)
    level = {stride: (sampled / f"levels/stride-{stride:05d}.onnx").read_bytes()
             for stride in (1, 4)}
    samples = (sampled / "envelope" / "samples.npy").read_bytes()
    with pytest.raises(BundleError, match=r"names 'notes.txt', which the manifest does not"):
        bundle_module.write_bundle(tmp_path / "b", manifest, level, extra_files={
            "envelope/samples.npy": samples, "notes.txt": b"hi"})
    with pytest.raises(BundleError, match=r"`extra_files` does not hold it"):
        bundle_module.write_bundle(tmp_path / "c", manifest, level)
    with pytest.raises(BundleError, match=r"has shape \(3, 2\); the manifest promises \(5, 2\)"):
        bundle_module.write_bundle(
            tmp_path / "d", replace(manifest, envelope_samples=replace(
                manifest.envelope_samples, count=5)), level,
            extra_files={"envelope/samples.npy": samples})
    with pytest.raises(BundleError, match=r"is the manifest, the report or under levels/"):
        bundle_module.write_bundle(tmp_path / "e", manifest, level,
                                   extra_files={"levels/x.onnx": b""})
    assert not any((tmp_path / name).exists() for name in "bcde")
