"""Smoke test of benchmarks/trust_bench.py: the timed variants compute the same answers.

No timings are asserted (speed belongs in benchmarks/); what is checked is that the bundles
with and without an envelope give identical states, so the timings compare equal work, and
that the data-based variant really measures distances (scipy.spatial.cKDTree as reference).
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("scipy")

from scipy.spatial import cKDTree

from stridecast.benchmarks import trust_bench
from stridecast.runtime import load


def test_variants_give_the_same_answers(tmp_path):
    samples = trust_bench.crane_states(256)
    paths = trust_bench.variants(tmp_path, samples)
    steppers = [load(path, on_extrapolation="ignore") for path in paths.values()]
    state = trust_bench.crane_states(4, seed=3).astype(np.float32)
    answers = [stepper.advance(state, 4.0) for stepper in steppers]
    for answer in answers[1:]:
        np.testing.assert_array_equal(answer, answers[0])
    sampled = steppers[-1]
    manifest = sampled.manifest
    assert manifest.envelope_samples.count == 256
    far = np.array([0.0, -24.0, 0.0, 5.0])
    (finding,) = [f for f in sampled.check(far) if f.kind == "far_from_data"]
    normalised = (samples - manifest.mean) / manifest.scale
    distance = cKDTree(normalised.astype(np.float32)).query(
        (far - manifest.mean) / manifest.scale)[0]
    assert finding.amount == pytest.approx(distance / 0.5, rel=1e-5)
