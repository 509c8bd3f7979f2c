"""Resource limits of the runtime: one frozen record with the documented defaults.

Every size the reader or the planner accepts is checked against these before allocation.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Limits:
    """Bounds the runtime enforces; pass a modified copy to `load` to change them."""

    max_model_bytes: int = 256 * 1024 * 1024
    max_manifest_bytes: int = 1024 * 1024
    max_protobuf_depth: int = 16
    max_tensor_elements: int = 2**28
    max_graph_nodes: int = 100_000
    # The planner's tables grow with the largest stride (about 0.25 s to build at 10^5).
    max_stride: int = 100_000
    # Network evaluations (planned steps) one query may need, per state.
    max_steps_per_query: int = 1_000_000
    max_batch: int = 65_536
    max_forecast_points: int = 100_000
    # State-sample distances the data-based envelope check may compute per call; beyond it an
    # evenly spaced subset of the visited states is measured (about 20 ms at d = 4).
    max_envelope_work: int = 1 << 24


DEFAULT_LIMITS = Limits()
