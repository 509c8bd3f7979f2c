"""The optional manifest blocks `validation` and `envelope.samples`: parse, refuse, round trip."""

from __future__ import annotations

import copy
import json
import math

import pytest

from stridecast import demo_bundle
from stridecast.runtime import (
    SAMPLES_FILE,
    BundleError,
    EnvelopeSamples,
    ValidationCurve,
    load,
    parse_manifest,
    parse_manifest_text,
)
from tests.builders import older_crane_bundle

CRANE = demo_bundle()
SHA = "ab" * 32


def base_document() -> dict:
    return {
        "format": "stridecast.bundle", "format_version": 1,
        "state": {"dim": 2, "names": ["x", "v"], "units": ["m", "m/s"]},
        "time": {"base_step": 0.1, "unit": "s"},
        "normalization": {"mean": [0.0, 0.0], "scale": [1.0, 2.0]},
        "update": "increment",
        "levels": [{"stride": 1, "file": "levels/stride-00001.onnx", "sha256": "0" * 64}],
        "envelope": {"min": [-1.0, -2.0], "max": [1.0, 2.0],
                     "samples": {"file": SAMPLES_FILE, "sha256": SHA, "count": 3,
                                 "radius": 0.25}},
        "validated_horizon": 0.2,
        "validation": {"metric": "normalised_rms", "tolerance": 0.1,
                       "reference_std": [1.0, 2.0], "times": [0.1, 0.2, 0.3],
                       "errors": [0.01, 0.05, None]},
    }


def test_blocks_parse_and_null_error_is_infinite():
    manifest = parse_manifest(base_document())
    assert manifest.validation == ValidationCurve(
        metric="normalised_rms", tolerance=0.1, reference_std=(1.0, 2.0),
        times=(0.1, 0.2, 0.3), errors=(0.01, 0.05, math.inf))
    assert manifest.envelope_samples == EnvelopeSamples(
        file=SAMPLES_FILE, sha256=SHA, count=3, radius=0.25)


def test_to_dict_round_trip_writes_null_for_infinite():
    document = base_document()
    manifest = parse_manifest(document)
    written = manifest.to_dict()
    assert written["validation"]["errors"] == [0.01, 0.05, None]
    assert written["envelope"]["samples"] == document["envelope"]["samples"]
    # Strict JSON (no Infinity token) and the same manifest back.
    text = json.dumps(written, allow_nan=False)
    assert parse_manifest_text(text) == manifest


def test_blocks_are_optional():
    document = base_document()
    del document["validation"]
    del document["envelope"]["samples"]
    manifest = parse_manifest(document)
    assert manifest.validation is None and manifest.envelope_samples is None
    assert "validation" not in manifest.to_dict()
    assert "samples" not in manifest.to_dict()["envelope"]


def test_older_bundle_still_loads(tmp_path):
    # A bundle written before these blocks existed (the shipped one, with both removed).
    older = older_crane_bundle(tmp_path / "older.bundle")
    document = json.loads((older / "manifest.json").read_text())
    assert "validation" not in document and "samples" not in (document.get("envelope") or {})
    stepper = load(older)
    assert stepper.manifest.validation is None
    assert stepper.manifest.envelope_samples is None
    assert stepper.manifest.to_dict() == {**document, "producer": document["producer"]}


def test_shipped_bundle_blocks_round_trip():
    document = json.loads((CRANE / "manifest.json").read_text())
    manifest = load(CRANE).manifest
    assert manifest.validation is not None and manifest.envelope_samples is not None
    assert manifest.to_dict()["validation"] == document["validation"]
    assert manifest.to_dict()["envelope"] == document["envelope"]


def _set(path: str, value):
    def change(document):
        *parents, last = path.split(".")
        target = document
        for key in parents:
            target = target[key]
        if value is KeyError:
            del target[last]
        else:
            target[last] = value
    return change


@pytest.mark.parametrize(("change", "message"), [
    (_set("validation.metric", "rmse"), r"`validation.metric` is 'rmse'; expected one of"),
    (_set("validation.tolerance", 0), r"`validation.tolerance` must be > 0; got 0.0\."),
    (_set("validation.tolerance", KeyError), r"`validation` lacks the fields \['tolerance'\]"),
    (_set("validation.extra", 1), r"`validation` has unknown fields \['extra'\]"),
    (_set("validation.reference_std", [1.0, 0.0]), r"`validation.reference_std` must be > 0"),
    (_set("validation.reference_std", [1.0]), r"`validation.reference_std` must be a list of 2"),
    (_set("validation.times", []), r"`validation.times` must be a non-empty list"),
    (_set("validation.times", [0.1, 0.1, 0.3]), r"strictly ascending; got \[0.1, 0.1, 0.3\]"),
    (_set("validation.times", [-0.1, 0.1, 0.3]), r"`validation.times` must be ≥ 0"),
    (_set("validation.errors", [0.1, 0.2]), r"`validation.errors` must be a list of 3"),
    (_set("validation.errors", [0.1, -0.2, 0.3]), r"`validation.errors\[1\]` must be ≥ 0"),
    (_set("validation.errors", [0.1, "x", 0.3]), r"`validation.errors\[1\]` must be a finite"),
    (_set("envelope.samples.count", 0), r"`envelope.samples.count` must be a positive integer"),
    (_set("envelope.samples.radius", -1.0), r"`envelope.samples.radius` must be > 0"),
    (_set("envelope.samples.sha256", "xyz"), r"`envelope.samples.sha256` must be 64"),
    (_set("envelope.samples.file", 3), r"`envelope.samples.file` must be a string"),
    (_set("envelope.samples.file", "levels/stride-00001.onnx"), r"the file of a level"),
    (_set("envelope.samples.shape", [3, 2]), r"`envelope.samples` has unknown fields"),
])
def test_bad_blocks_refused(change, message):
    document = copy.deepcopy(base_document())
    change(document)
    with pytest.raises(BundleError, match=message):
        parse_manifest(document)
