"""A bundle changed on disk while the service runs does not change its answers: bundles are
loaded and verified once, at start.

Expected answers: the service's own answers before the change (bitwise), which equal the
runtime's (tests/service checks that). Each change is shown to be real: a fresh `load` of the
changed folder refuses it, or answers differently.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from fastapi.testclient import TestClient

from stridecast.runtime import BundleError, load, sha256_hex
from stridecast.service import Settings, create_app
from tests.systems import write_oscillator

STATE = [[1.0, 0.0], [0.2, -0.4]]
LEVEL = Path("levels/stride-00004.onnx")


def flip_byte(bundle: Path) -> None:
    data = bytearray((bundle / LEVEL).read_bytes())
    data[len(data) // 2] ^= 0x10
    (bundle / LEVEL).write_bytes(bytes(data))


def truncate(bundle: Path) -> None:
    (bundle / LEVEL).write_bytes(b"")


def delete_levels(bundle: Path) -> None:
    shutil.rmtree(bundle / "levels")


def rewrite_manifest(bundle: Path) -> None:
    # Still a valid manifest (it carries no checksum of itself), but with another time step.
    document = json.loads((bundle / "manifest.json").read_text())
    document["time"]["base_step"] = 0.5
    (bundle / "manifest.json").write_text(json.dumps(document))


def symlink_level_elsewhere(bundle: Path) -> None:
    other = write_oscillator(bundle.parent / "elsewhere", name="elsewhere")
    (bundle / LEVEL).unlink()
    (bundle / LEVEL).symlink_to(other / "levels/stride-00001.onnx")


def swap_directory(bundle: Path) -> None:
    # Another valid bundle (different strides' weights: its stride-4 level is stride 1's)
    # renamed into the same path, the way a deploy would replace it.
    replacement = write_oscillator(bundle.parent / "replacement", name="oscillator")
    data = (replacement / "levels/stride-00001.onnx").read_bytes()
    document = json.loads((replacement / "manifest.json").read_text())
    for level in document["levels"]:
        if level["file"] == str(LEVEL):
            (replacement / LEVEL).write_bytes(data)
            level["sha256"] = sha256_hex(data)
    (replacement / "manifest.json").write_text(json.dumps(document))
    os.rename(bundle, bundle.parent / "retired")
    os.rename(replacement, bundle)


CHANGES = {
    "byte-flipped": (flip_byte, "refused"),
    "level-truncated": (truncate, "refused"),
    "levels-deleted": (delete_levels, "refused"),
    "manifest-rewritten": (rewrite_manifest, "different"),
    "level-symlinked-elsewhere": (symlink_level_elsewhere, "refused"),
    "directory-swapped": (swap_directory, "different"),
}


def answers(client: TestClient) -> tuple[bytes, bytes, dict]:
    advance = client.post("/v1/models/oscillator/advance", json={"state": STATE, "t": 1.2})
    forecast = client.post("/v1/models/oscillator/forecast",
                           json={"state": STATE, "times": [0.5, 1.2, 3.0]})
    assert advance.status_code == forecast.status_code == 200
    detail = client.get("/v1/models/oscillator").json()
    return (np.asarray(advance.json()["state"], np.float32).tobytes(),
            np.asarray(forecast.json()["states"], np.float32).tobytes(), detail)


@pytest.mark.parametrize("change", list(CHANGES))
def test_bundle_changed_on_disk_does_not_change_answers(tmp_path, reliability, change):
    bundle = write_oscillator(tmp_path / "oscillator")
    before_load = load(bundle).advance(np.asarray(STATE, np.float32), 1.2)
    with TestClient(create_app({"oscillator": bundle}, Settings())) as client:
        before = answers(client)
        # Expected: the runtime in this process agrees with the service before the change.
        assert before[0] == before_load.tobytes()
        mutate, effect = CHANGES[change]
        mutate(bundle)
        if effect == "refused":
            with pytest.raises(BundleError):
                load(bundle)
        else:
            fresh = load(bundle).advance(np.asarray(STATE, np.float32), 1.2)
            assert fresh.tobytes() != before[0]
        for _ in range(3):
            assert answers(client) == before
        assert client.get("/readyz").status_code == 200
    reliability.record(
        "Service: bundles on disk", "a served bundle changed while the service runs: a byte "
        "flipped, a level truncated, levels deleted, the manifest rewritten, a level "
        "symlinked elsewhere, the whole folder swapped for another valid bundle", 1,
        "answers and model details unchanged (bitwise), service ready; a fresh `load` of the "
        "changed folder refuses it or answers differently, so each change was real")
