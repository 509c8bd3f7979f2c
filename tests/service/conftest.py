"""Fixtures for the service tests: real bundles of an exact linear flow map, built without torch.

The system is the harmonic oscillator x' = v, v' = -ω² x. Its flow map over time τ is the
matrix exponential expm(A τ) with A = [[0, 1], [-ω², 0]] (SciPy, `scipy.linalg.expm`), so a
level of stride k is the single linear layer z' = z @ expm(A k Δt)ᵀ with update "replace",
mean 0 and scale 1. Every expected number in these tests comes from that matrix exponential or
from calling the runtime directly.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from stridecast.runtime import load
from stridecast.service import Settings, create_app
from tests.systems import write_oscillator


@pytest.fixture(scope="session")
def models_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder of bundles: "oscillator" (good) and "broken" (a level file was altered)."""
    root = tmp_path_factory.mktemp("models")
    write_oscillator(root / "oscillator")
    broken = write_oscillator(root / "broken", name="broken")
    level = broken / "levels" / "stride-00004.onnx"
    data = bytearray(level.read_bytes())
    data[-1] ^= 0xFF
    level.write_bytes(bytes(data))
    return root


@pytest.fixture(scope="session")
def oscillator_path(models_dir: Path) -> Path:
    return models_dir / "oscillator"


@pytest.fixture(scope="session")
def stepper(oscillator_path: Path):
    """The runtime's own answer to compare HTTP results against."""
    return load(oscillator_path)


@pytest.fixture(scope="session")
def stepper64(oscillator_path: Path):
    return load(oscillator_path, dtype="float64")


@pytest.fixture
def make_client(models_dir: Path) -> Iterator[Callable[..., TestClient]]:
    """Factory: a started TestClient over the bundle folder, with settings overrides."""
    clients: list[TestClient] = []

    def make(models=None, **overrides) -> TestClient:
        settings = Settings(**overrides)
        app = create_app([models_dir] if models is None else models, settings)
        client = TestClient(app, raise_server_exceptions=True)
        client.__enter__()
        clients.append(client)
        return client

    yield make
    for client in clients:
        client.__exit__(None, None, None)


@pytest.fixture
def client(make_client) -> TestClient:
    return make_client()
