"""Fixed choices of `stridecast demo`: time grid, strides, horizons, seeds and run sizes.

Kept apart so the demo's stages, evaluation and output all read the same numbers.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from stridecast import demo_bundle

DEFAULT_OUT = Path("crane-demo.bundle")
SHIPPED_BUNDLE = demo_bundle(must_exist=False)
SHIP_COMMAND = "python -m stridecast.demo --ship"

# 0.04 s resolves the 0.40 s bob with 10 samples per period. Strides grow by 5: 0.04, 0.2, 1,
# 5 and 25 s; the top level spans about 2.5 swing periods, so a minute takes at most 2 top
# steps and any horizon up to a minute at most 10 network evaluations instead of 1,500.
# Longer strides would need proportionally longer training trajectories (rollout × stride).
BASE_STEP = 0.04
STRIDES = (1, 5, 25, 125, 625)
# Hybrid: the levels below 1 s (strides 1 and 5) are replaced by Runge–Kutta on the physics.
HYBRID_BELOW = 25
# Table horizons (s), deliberately off the coarse grids so that every level takes part.
TABLE_HORIZONS = (0.6, 2.2, 7.4, 18.6, 33.8, 59.6)
HORIZON = TABLE_HORIZONS[-1]
CURVE_SPACING = 0.4  # s, between the points of the error curves
GROUND_TRUTH_TOLERANCE = 1e-10  # rtol = atol of the SciPy DOP853 reference
SEED = 0
HELD_OUT_SEED = 12345  # a different stream from training, so the states are held out
# Shown in the plot and the printed commands: a 0.15 rad swing (≈ 3.6 m), a 2 cm stretch.
EXAMPLE_MODES = {"swing_angle": 0.15, "swing_rate": 0.0, "stretch": 0.02, "stretch_rate": 0.0}
EXAMPLE_LABEL = "a 0.15 rad swing and a 2 cm stretch, at rest"
CHECK_STATES = 8  # held-out states whose errors the report states for the shipped-bundle test
TOLERANCE_FACTOR = 1.5  # stated tolerance = this × the error measured when the bundle was made


@dataclass(frozen=True)
class DemoSettings:
    """Sizes of one demo run: data, networks and training."""

    label: str
    trajectories: int
    duration: float  # s per training trajectory; > rollout × largest stride × base step
    hidden: tuple[int, ...]
    epochs: int
    windows_per_epoch: int
    batch_size: int
    learning_rate: float
    rollout: int
    held_out_states: int
    exporter: str

    @property
    def quick(self) -> bool:
        return self.label != "full"


# About 2 minutes of CPU on one core (torch runs single-threaded here; see demo.py); the
# bundle (hidden 64, 64: about 20 KB per level) is small enough to ship inside the package.
FULL = DemoSettings(label="full", trajectories=112, duration=110.0, hidden=(64, 64),
                    epochs=70, windows_per_epoch=16384, batch_size=256, learning_rate=1e-3,
                    rollout=4, held_out_states=32, exporter="auto")
# The same steps in about 20 s of CPU, at a visibly lower accuracy. The legacy exporter saves
# about 10 s of dynamo tracing; the larger learning rate makes the few epochs count.
QUICK = DemoSettings(label="quick", trajectories=24, duration=105.0, hidden=(32, 32),
                     epochs=8, windows_per_epoch=4096, batch_size=256, learning_rate=3e-3,
                     rollout=4, held_out_states=16, exporter="legacy")
