"""Expected error and envelope findings as ensemble variables, as the runtime reports them."""

from __future__ import annotations

import numpy as np
import pytest

from stridecast import demo_bundle
from stridecast.ensemble import forecast_ensemble
from stridecast.runtime import Stepper, load

DEMO_BUNDLE = demo_bundle()

pytestmark = pytest.mark.skipif(
    not (hasattr(Stepper, "check") and hasattr(Stepper, "expected_error")),
    reason="waits for issue 10's Stepper.check and Stepper.expected_error (branch "
           "trust-runtime), not merged yet")


def test_flags_and_expected_error_follow_the_runtime(cluster_client):
    stepper = load(DEMO_BUNDLE)
    rng = np.random.default_rng(4)
    states = np.array([3.0, -24.0, 0.0, 0.0]) + rng.normal(size=(200, 4)) * [1, 0.05, 0.5, 0.1]
    states[::7, 0] += 40.0  # far outside the crane's swing: outside the envelope
    times = np.array([0.0, 2.0, 5.0, 500.0])
    dataset = forecast_ensemble(stepper, states, times, client=cluster_client, chunk_states=64)
    # The reference is the runtime's own rule set (Stepper.check / expected_error), applied
    # here to the direct forecast: the ensemble must only arrange the answers.
    np.testing.assert_array_equal(dataset["expected_error"].values,
                                  stepper.expected_error(times))
    direct = stepper.forecast(states, times)
    for kind in ("outside_box", "far_from_data"):
        flags = np.zeros((len(states), len(times)), dtype=np.int8)
        for index in range(len(times)):
            for finding in stepper.check(direct[index]):
                if finding.kind == kind:
                    flags[list(finding.states), index] = 1
        np.testing.assert_array_equal(dataset[kind].values, flags)
    assert dataset["initial_outside_box"].values[::7].all()
    horizon = stepper.manifest.validated_horizon
    np.testing.assert_array_equal(dataset["beyond_horizon"].values, (times > horizon).astype(int))
