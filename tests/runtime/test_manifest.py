"""manifest.json parsing, validation and serialisation (runtime/manifest.py)."""

from __future__ import annotations

import json

import pytest

from stridecast.runtime import BundleError
from stridecast.runtime.manifest import (
    LevelEntry,
    Manifest,
    level_file_name,
    parse_manifest,
    parse_manifest_text,
)

SHA = "a" * 64


def _manifest(**changes) -> Manifest:
    fields = dict(state_names=("x", "v"), state_units=("m", "m/s"), base_step=0.01,
                  mean=(0.0, 1.0), scale=(1.0, 2.0),
                  levels=(LevelEntry(1, level_file_name(1), SHA),
                          LevelEntry(16, level_file_name(16), SHA)),
                  envelope_min=(-1.0, -2.0), envelope_max=(1.0, 2.0), validated_horizon=3.0)
    fields.update(changes)
    return Manifest(**fields)


def test_to_dict_and_back_is_the_identity():
    manifest = _manifest()
    assert parse_manifest_text(json.dumps(manifest.to_dict())) == manifest
    assert manifest.strides == (1, 16)  # finest first
    assert manifest.level(16).file == "levels/stride-00016.onnx"


def _document(**changes) -> dict:
    document = _manifest().to_dict()
    document.update(changes)
    return document


@pytest.mark.parametrize(("change", "pattern"), [
    ({"format_version": 2}, r"`format_version` is 2; this reader knows version 1 only\."),
    ({"format_version": True}, r"`format_version` is True"),
    ({"surprise": 1}, r"unknown fields \['surprise'\]"),
    ({"update": "add"}, r"`update` is 'add'; expected one of"),
    ({"time": {"base_step": 0}}, r"`time.base_step` must be > 0; got 0"),
    ({"normalization": {"mean": [0, 0], "scale": [1, 0]}},
     r"`normalization.scale` must be > 0 everywhere"),
    ({"state": {"dim": 2, "names": ["x", "x"]}}, r"`state.names` must be distinct"),
    ({"validated_horizon": -1}, r"`validated_horizon` must be ≥ 0 or null"),
    ({"envelope": {"min": [2, 0], "max": [1, 1]}}, r"`envelope.min` must not exceed"),
])
def test_invalid_fields_are_refused_by_name(change, pattern):
    with pytest.raises(BundleError, match=pattern):
        parse_manifest(_document(**change))


def test_extension_fields_are_ignored_and_missing_ones_named():
    assert parse_manifest(_document(**{"x-note": "hello"})) == _manifest()
    document = _document()
    del document["levels"]
    with pytest.raises(BundleError, match=r"lacks the required fields \['levels'\]"):
        parse_manifest(document)


def test_text_limits_and_non_finite_numbers():
    text = json.dumps(_manifest().to_dict())
    with pytest.raises(BundleError, match=r"is \d+ bytes; the limit is 10 bytes"):
        parse_manifest_text(text, max_bytes=10)
    with pytest.raises(BundleError, match=r"contains NaN; only finite numbers"):
        parse_manifest_text(text.replace('"validated_horizon": 3.0', '"validated_horizon": NaN'))
    with pytest.raises(BundleError, match=r"not valid JSON"):
        parse_manifest_text("{")
