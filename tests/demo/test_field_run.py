"""`stridecast demo --scenario mooring`: the field scenario end to end, and its evaluation.

Expected states come from SciPy (DOP853, `stridecast.demo.mooring.simulate`).
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from stridecast.cli import main as cli_main
from stridecast.demo import mooring
from stridecast.demo.field_evaluation import ground_truth, held_out_states, normalised_rms
from stridecast.demo.field_settings import (
    BASE_STEP,
    EXAMPLE_AMPLITUDES,
    FULL,
    LATENT_MODES,
    QUICK,
    STRIDES,
)
from stridecast.runtime import load

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the PNG specification's file signature


def test_settings_fit_the_strides():
    for settings in (FULL, QUICK):
        # Training windows span rollout × largest stride; trajectories must be longer.
        assert settings.duration > settings.rollout * max(STRIDES) * BASE_STEP
    assert QUICK.quick and not FULL.quick


def test_held_out_states_start_with_the_example():
    states = held_out_states(3)
    assert states.shape == (3, mooring.DEFAULT_PARAMETERS.state_dim)
    # Released at rest: the example's velocities are zero, its boat displaced by the sway.
    np.testing.assert_array_equal(states[0, 128:], 0.0)
    assert states[0, 127] == pytest.approx(EXAMPLE_AMPLITUDES[0], rel=0.05)
    np.testing.assert_array_equal(states, held_out_states(3))  # a fixed seed
    np.testing.assert_array_equal(held_out_states(1), states[:1])  # the example alone


def test_normalised_rms_is_the_root_mean_square_per_time():
    # By hand: errors 3 and 4 over scale 1 and 2 → (3, 2) → RMS √(13/2).
    truth = np.zeros((2, 1, 2))
    prediction = np.array([[[3.0, 4.0]], [[0.0, 0.0]]])
    errors = normalised_rms(prediction, truth, np.array([1.0, 2.0]))
    np.testing.assert_allclose(errors, [np.sqrt(13 / 2), 0.0])


@pytest.mark.slow
def test_quick_field_demo_end_to_end(tmp_path, capsys):
    # `stridecast demo --scenario mooring --quick`, as a user types it.
    out = tmp_path / "mooring-demo.bundle"
    plots = tmp_path / "plots"
    assert cli_main(["demo", "--scenario", "mooring", "--out", str(out), "--quick",
                     "--no-progress", "--plots-dir", str(plots)]) == 0
    text = capsys.readouterr().out
    for name in ("spacetime.png", "field-error.png"):
        assert (plots / name).read_bytes()[:8] == PNG_SIGNATURE
        assert str(plots / name) in text
    assert "QUICK MODE" in text and "not a safety function" in text
    assert "at the validated horizon" in text and "times longer" in text

    # Reloaded with the NumPy runtime: a reduced bundle of the full field.
    stepper = load(out, on_extrapolation="ignore")
    assert stepper.state_dim == 256 and stepper.latent_dim == LATENT_MODES
    assert stepper.state_names == mooring.state_names()
    manifest = stepper.manifest
    horizon, tolerance = manifest.validated_horizon, manifest.validation.tolerance
    assert horizon is not None and horizon > 0

    # Reference: SciPy DOP853 (mooring.simulate) from held-out states at the validated
    # horizon, measured with the bundle's own metric and scale.
    states = held_out_states(QUICK.held_out_states)
    truth = ground_truth(states, np.array([0.0, horizon]))[-1]
    error = normalised_rms(stepper.advance(states, horizon)[None], truth[None],
                           np.asarray(manifest.validation.reference_std))[0]
    report = json.loads((out / "report.json").read_text(encoding="utf-8"))["demo"]
    recorded = report["results"]["at_validated_horizon"]
    assert recorded["t"] == pytest.approx(horizon)
    # The demo's own figure is this measurement (same states, same truth up to float32).
    assert error == pytest.approx(recorded["normalised_rms"], rel=1e-3, abs=1e-4)
    assert error <= tolerance, f"t = {horizon} s: {error:.3g} > tolerance {tolerance}"
    assert report["results"]["speedup"] > 0
