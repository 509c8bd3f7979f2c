"""The optional manifest block `reduction.reconstruction` (runtime/manifest.py): parsed,
serialised back unchanged, refused when malformed; bundles without it load as before."""

from __future__ import annotations

import json

import numpy as np
import pytest

from stridecast.runtime import BundleError, load, parse_manifest
from tests.builders import reduced_bundle


@pytest.fixture
def document(tmp_path):
    # A tiny reduced bundle with exact linear maps (tests.builders, scipy.linalg.expm); only
    # its manifest matters here.
    basis = np.linalg.qr(np.random.default_rng(0).normal(size=(6, 2)))[0]
    path = reduced_bundle(tmp_path / "b", -np.eye(2), basis, base_step=0.1, strides=(1, 2),
                          mean=np.zeros(6), scale=np.ones(6))
    assert load(path).manifest.reduction.reconstruction_threshold is None
    return json.loads((path / "manifest.json").read_text())


def test_reconstruction_block_round_trips(document):
    document["reduction"]["reconstruction"] = {"metric": "normalised_rms", "threshold": 0.02}
    manifest = parse_manifest(document)
    assert manifest.reduction.reconstruction_threshold == 0.02
    assert manifest.to_dict() == document
    document["reduction"]["reconstruction"] = None
    assert parse_manifest(document).reduction.reconstruction_threshold is None


@pytest.mark.parametrize(("block", "message"), [
    ({"metric": "max_abs", "threshold": 0.1},
     r"`reduction.reconstruction.metric` is 'max_abs'; expected 'normalised_rms'\."),
    ({"metric": "normalised_rms", "threshold": 0},
     r"`reduction.reconstruction.threshold` must be > 0; got 0.0\."),
    ({"metric": "normalised_rms", "threshold": "big"},
     r"`reduction.reconstruction.threshold` must be a finite number; got 'big'\."),
    ({"metric": "normalised_rms"}, r"`reduction.reconstruction` lacks the fields \['threshold'\]"),
    ({"metric": "normalised_rms", "threshold": 0.1, "quantile": 0.99},
     r"`reduction.reconstruction` has unknown fields \['quantile'\]"),
])
def test_malformed_reconstruction_block_is_refused(document, block, message):
    document["reduction"]["reconstruction"] = block
    with pytest.raises(BundleError, match=message):
        parse_manifest(document)
