"""Test data with known exact solutions, for training tests.

Linear systems x' = A x: the flow map over time t is expm(A t) (the standard solution of linear
ODEs, computed by scipy.linalg.expm), so sampled trajectories are exact up to float64 rounding.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import expm

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
