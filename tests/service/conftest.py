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

import numpy as np
import onnx
import pytest
import scipy.linalg
from fastapi.testclient import TestClient
from onnx import TensorProto, helper, numpy_helper

from stridecast.runtime import LevelEntry, Manifest, load, write_bundle
from stridecast.service import Settings, create_app

OMEGA = 2.0
BASE_STEP = 0.05
STRIDES = (1, 4, 16)
ENVELOPE = ((-2.0, -4.0), (2.0, 4.0))
VALIDATED_HORIZON = 5.0
GENERATOR = np.array([[0.0, 1.0], [-OMEGA**2, 0.0]])


def flow_map(t: float) -> np.ndarray:
    """The exact flow map of the oscillator over time `t` (the matrix exponential, SciPy)."""
    return scipy.linalg.expm(GENERATOR * t)


def exact_state(state: np.ndarray, t: float) -> np.ndarray:
    """x(t) for rows x(0) of `state`, from the matrix exponential."""
    return np.asarray(state, dtype=np.float64) @ flow_map(t).T


def level_model(stride: int) -> bytes:
    """ONNX model "state" (B, 2) -> "next" = state @ expm(A stride Δt)ᵀ, float32 weights."""
    weight = flow_map(stride * BASE_STEP).T.astype(np.float32)
    graph = helper.make_graph(
        [helper.make_node("MatMul", ["state", "weight"], ["next"])],
        f"oscillator_stride_{stride}",
        [helper.make_tensor_value_info("state", TensorProto.FLOAT, ["batch", 2])],
        [helper.make_tensor_value_info("next", TensorProto.FLOAT, ["batch", 2])],
        initializer=[numpy_helper.from_array(weight, "weight")],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)],
                              producer_name="stridecast-tests")
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model.SerializeToString()


def write_oscillator(out: Path, *, name: str = "oscillator") -> Path:
    manifest = Manifest(
        state_names=("x", "v"), state_units=("m", "m/s"), base_step=BASE_STEP,
        mean=(0.0, 0.0), scale=(1.0, 1.0),
        levels=tuple(LevelEntry(stride, file="", sha256="0" * 64) for stride in STRIDES),
        update="replace", time_unit="s", name=name,
        description="Harmonic oscillator with ω = 2, exact flow map.",
        envelope_min=ENVELOPE[0], envelope_max=ENVELOPE[1],
        validated_horizon=VALIDATED_HORIZON,
    )
    return write_bundle(out, manifest, {stride: level_model(stride) for stride in STRIDES})


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
