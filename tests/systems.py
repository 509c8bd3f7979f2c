"""Shared test systems with known exact solutions: trajectories, torch levels, served bundles.

Linear systems x' = A x: the flow map over time t is expm(A t) (the standard solution of linear
ODEs, computed by scipy.linalg.expm), so sampled trajectories and levels are exact up to
rounding. Test files import these from here, never from one another.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import onnx
import scipy.linalg
import torch
from onnx import TensorProto, helper, numpy_helper
from scipy.linalg import expm
from torch import nn

from stridecast.runtime import LevelEntry, Manifest, write_bundle
from tests.builders import oscillator_matrix

# x'' + 0.1 x' + x = 0: a lightly damped oscillator with ω = 1.
DAMPED_OSCILLATOR = oscillator_matrix(omega=1.0, damping=0.05)


def linear_trajectories(system: np.ndarray, *, base_step: float, count: int, steps: int,
                        seed: int) -> np.ndarray:
    """`count` trajectories of `steps` samples from initial states uniform in [-1, 1]^d."""
    rng = np.random.default_rng(seed)
    flow = expm(system * base_step)
    state = rng.uniform(-1.0, 1.0, size=(count, system.shape[0]))
    samples = [state]
    for _ in range(steps - 1):
        state = state @ flow.T
        samples.append(state)
    return np.stack(samples, axis=1)


def block_oscillators(count: int) -> np.ndarray:
    """`count` undamped oscillators of different frequencies as one block-diagonal system."""
    dim = 2 * count
    system = np.zeros((dim, dim))
    for index in range(count):
        system[2 * index:2 * index + 2, 2 * index:2 * index + 2] = oscillator_matrix(
            omega=1.0 + 0.25 * index)
    return system


# ------------------------------------------------- exact torch levels and held-out trajectories
DAMPED_BASE_STEP = 0.1


def exact_level(stride: int, factor: float = 1.0) -> nn.Module:
    """The increment network z ↦ (F − I) z with F = factor · expm(A k Δt) (mean 0, scale 1) of
    `DAMPED_OSCILLATOR` at `DAMPED_BASE_STEP`."""
    layer = nn.Linear(2, 2, bias=False)
    with torch.no_grad():
        flow = factor * expm(DAMPED_OSCILLATOR * stride * DAMPED_BASE_STEP)
        layer.weight.copy_(torch.from_numpy(flow - np.eye(2)))
    return layer


def held_out_list(count: int = 3, steps: int = 40, seed: int = 2) -> list[torch.Tensor]:
    """Float32 trajectories of `DAMPED_OSCILLATOR` at `DAMPED_BASE_STEP`, as torch tensors."""
    trajectories = linear_trajectories(DAMPED_OSCILLATOR, base_step=DAMPED_BASE_STEP,
                                       count=count, steps=steps, seed=seed)
    return [torch.from_numpy(t.astype(np.float32)) for t in trajectories]


# ----------------------------------------------------------------- the served oscillator bundle
# The harmonic oscillator x' = v, v' = -ω² x. Its flow map over time τ is the matrix exponential
# expm(A τ) with A = [[0, 1], [-ω², 0]] (SciPy, `scipy.linalg.expm`), so a level of stride k is
# the single linear layer z' = z @ expm(A k Δt)ᵀ with update "replace", mean 0 and scale 1.
OSCILLATOR_OMEGA = 2.0
OSCILLATOR_BASE_STEP = 0.05
OSCILLATOR_STRIDES = (1, 4, 16)
OSCILLATOR_ENVELOPE = ((-2.0, -4.0), (2.0, 4.0))
OSCILLATOR_HORIZON = 5.0
OSCILLATOR_GENERATOR = np.array([[0.0, 1.0], [-OSCILLATOR_OMEGA**2, 0.0]])


def oscillator_flow_map(t: float) -> np.ndarray:
    """The exact flow map of the oscillator over time `t` (the matrix exponential, SciPy)."""
    return scipy.linalg.expm(OSCILLATOR_GENERATOR * t)


def exact_oscillator_state(state: np.ndarray, t: float) -> np.ndarray:
    """x(t) for rows x(0) of `state`, from the matrix exponential."""
    return np.asarray(state, dtype=np.float64) @ oscillator_flow_map(t).T


def oscillator_level_model(stride: int) -> bytes:
    """ONNX model "state" (B, 2) -> "next" = state @ expm(A stride Δt)ᵀ, float32 weights."""
    weight = oscillator_flow_map(stride * OSCILLATOR_BASE_STEP).T.astype(np.float32)
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
    """The served oscillator as a bundle at `out` (levels 1, 4, 16; box envelope; horizon 5)."""
    manifest = Manifest(
        state_names=("x", "v"), state_units=("m", "m/s"), base_step=OSCILLATOR_BASE_STEP,
        mean=(0.0, 0.0), scale=(1.0, 1.0),
        levels=tuple(LevelEntry(stride, file="", sha256="0" * 64)
                     for stride in OSCILLATOR_STRIDES),
        update="replace", time_unit="s", name=name,
        description="Harmonic oscillator with ω = 2, exact flow map.",
        envelope_min=OSCILLATOR_ENVELOPE[0], envelope_max=OSCILLATOR_ENVELOPE[1],
        validated_horizon=OSCILLATOR_HORIZON,
    )
    return write_bundle(out, manifest, {stride: oscillator_level_model(stride)
                                        for stride in OSCILLATOR_STRIDES})
