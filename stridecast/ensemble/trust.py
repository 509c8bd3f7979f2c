"""The runtime's trust names (expected error curve, envelope findings) as ensemble variables.

They come from `Stepper.expected_error` and `Stepper.check`; every rule and message stays in
the runtime, this module only arranges the answers by member and time.
"""

from __future__ import annotations

import contextlib
import warnings

import numpy as np

from stridecast import runtime
from stridecast.runtime import Stepper

# Findings about states (rows of a batch) and about requested times, by the runtime's kinds.
STATE_KINDS = ("outside_box", "far_from_data")
TIME_KINDS = ("beyond_horizon",)


def available(stepper: Stepper) -> bool:
    """Whether this runtime has the trust names (`Stepper.check`, `Stepper.expected_error`)."""
    return hasattr(stepper, "check") and hasattr(stepper, "expected_error")


def expected_errors(stepper: Stepper, times: np.ndarray) -> np.ndarray:
    """Held-out error expected at each time, shape (T,); nan where the bundle does not say."""
    return np.asarray(stepper.expected_error(times), dtype=np.float64).reshape(times.shape)


def state_flags(stepper: Stepper, states: np.ndarray) -> dict[str, np.ndarray]:
    """Per kind in `STATE_KINDS`, which rows of `states` (B, d) the runtime flags, as int8 (B,)."""
    flags = {kind: np.zeros(states.shape[0], dtype=np.int8) for kind in STATE_KINDS}
    for finding in stepper.check(states):
        if finding.kind in flags and finding.states:
            flags[finding.kind][list(finding.states)] = 1
    return flags


def time_findings(stepper: Stepper, probe: np.ndarray, times: np.ndarray
                  ) -> tuple[dict[str, np.ndarray], list[str]]:
    """Per kind in `TIME_KINDS`, which times the runtime flags (int8 (T,)), and the messages of
    the findings that concern the bundle as a whole (e.g. no validated horizon)."""
    flags = {kind: np.zeros(times.shape[0], dtype=np.int8) for kind in TIME_KINDS}
    general: dict[str, str] = {}
    for index, t in enumerate(times):
        for finding in stepper.check(probe, float(t)):
            if finding.kind in flags:
                flags[finding.kind][index] = 1
            elif finding.kind not in STATE_KINDS:
                general.setdefault(finding.kind, finding.message)
    return flags, list(general.values())


@contextlib.contextmanager
def quiet_extrapolation():
    """Silence the runtime's extrapolation warnings: the ensemble records them as variables."""
    category = getattr(runtime, "ExtrapolationWarning", None)
    with warnings.catch_warnings():
        if category is not None:
            warnings.simplefilter("ignore", category)
        yield
