"""The peers stridecast is measured against, each following the same plan of network steps.

onnxruntime runs the bundle's own ONNX files, one session call per step; torch eager runs the
original modules (or torch twins rebuilt from the ONNX weights). Both normalise once in NumPy
before the loop and de-normalise once after it, which is the cheapest honest way to drive them
(the runtime instead folds the normalisation into the first and last layers).
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path

import numpy as np

from stridecast.runtime import Stepper

Steps = tuple[tuple[int, int], ...]


def plan_steps(stepper: Stepper, base_steps: int) -> Steps:
    """The runtime's own plan to `base_steps`, as ((stride, count), ...) coarse first."""
    return stepper.plan(base_steps * stepper.base_step, off_grid="error").steps


class _Normalised:
    """Normalise once, loop over plan steps in normalised units, de-normalise once."""

    def __init__(self, stepper: Stepper):
        manifest = stepper.manifest
        self.mean = np.asarray(manifest.mean, dtype=np.float32)
        self.scale = np.asarray(manifest.scale, dtype=np.float32)
        self.increment = manifest.update == "increment"

    def advance(self, states: np.ndarray, steps: Steps) -> np.ndarray:
        normalised = ((states - self.mean) / self.scale).astype(np.float32)
        return self._denormalise(self._loop(normalised, steps))

    def _denormalise(self, normalised: np.ndarray) -> np.ndarray:
        return normalised * self.scale + self.mean

    def _loop(self, normalised: np.ndarray, steps: Steps) -> np.ndarray:
        raise NotImplementedError


def session_options():
    """onnxruntime options of the benchmark: one intra- and inter-op thread, no spinning."""
    import onnxruntime

    options = onnxruntime.SessionOptions()
    options.intra_op_num_threads = 1
    options.inter_op_num_threads = 1
    # Spinning threads would burn a core between calls and distort the other competitors.
    options.add_session_config_entry("session.intra_op.allow_spinning", "0")
    options.add_session_config_entry("session.inter_op.allow_spinning", "0")
    return options


class OnnxRuntimeLoop(_Normalised):
    """One onnxruntime session per level, one `run` call per plan step."""

    name = "onnxruntime"

    def __init__(self, stepper: Stepper, bundle: os.PathLike[str] | str):
        import onnxruntime

        super().__init__(stepper)
        options = session_options()
        self.sessions = {}
        for entry in stepper.manifest.levels:
            session = onnxruntime.InferenceSession(
                str(Path(bundle) / entry.file), options, providers=["CPUExecutionProvider"])
            self.sessions[entry.stride] = (session, [entry.output], entry.input)

    def _loop(self, normalised: np.ndarray, steps: Steps) -> np.ndarray:
        for stride, count in steps:
            session, outputs, input_name = self.sessions[stride]
            for _ in range(count):
                network = session.run(outputs, {input_name: normalised})[0]
                normalised = normalised + network if self.increment else network
        return normalised


class TorchEagerLoop(_Normalised):
    """The torch modules called eagerly under `torch.inference_mode`, one call per plan step.

    torch runs with one intra-op thread, like onnxruntime: every peer is then single-threaded,
    and torch's OpenMP threads, which keep spinning after each call, do not take CPU time from
    the competitor timed next (on a 2-core machine they slowed it several-fold).
    """

    name = "torch"

    def __init__(self, stepper: Stepper, modules: Mapping[int, object]):
        import torch

        super().__init__(stepper)
        torch.set_num_threads(1)
        self.modules = dict(modules)

    def _loop(self, normalised: np.ndarray, steps: Steps) -> np.ndarray:
        import torch

        with torch.inference_mode():
            tensor = torch.from_numpy(np.ascontiguousarray(normalised))
            for stride, count in steps:
                module = self.modules[stride]
                for _ in range(count):
                    network = module(tensor)
                    tensor = tensor + network if self.increment else network
            return tensor.numpy()


def torch_threads() -> int:
    """Intra-op threads torch uses in this process (as left by the environment)."""
    import torch

    return torch.get_num_threads()
