"""The demo's fixed choices (stridecast/demo/settings.py) fit one another and the physics.

Periods of the crane come from the linearised formulas of a mass on a spring, 2π √(m/k), and
of a simple pendulum, 2π √(L/g) (any mechanics textbook), computed here from the parameters.
"""

from __future__ import annotations

import math

import pytest

from stridecast import demo_bundle
from stridecast.demo import crane
from stridecast.demo.settings import (
    BASE_STEP,
    CHECK_STATES,
    CURVE_SPACING,
    FULL,
    HORIZON,
    HYBRID_BELOW,
    QUICK,
    SHIPPED_BUNDLE,
    STRIDES,
    TABLE_HORIZONS,
)


def test_settings_fit_the_strides_and_horizons():
    for settings in (FULL, QUICK):
        # Training windows span rollout × largest stride; trajectories must be longer.
        assert settings.duration > settings.rollout * max(STRIDES) * BASE_STEP
    assert FULL.duration > max(TABLE_HORIZONS) and not FULL.quick and QUICK.quick
    # Every table horizon lies on the base-step grid.
    for horizon in TABLE_HORIZONS:
        assert abs(horizon / BASE_STEP - round(horizon / BASE_STEP)) < 1e-9


def test_the_base_step_resolves_the_bob_and_strides_grow_by_five():
    parameters = crane.DEFAULT_PARAMETERS
    bob = 2 * math.pi * math.sqrt(parameters.mass / parameters.stiffness)  # 2π √(m/k)
    swing = 2 * math.pi * math.sqrt(
        (parameters.rest_length + parameters.mass * parameters.gravity / parameters.stiffness)
        / parameters.gravity)  # 2π √(L_eq / g)
    assert bob / BASE_STEP == pytest.approx(10, rel=0.02)  # 10 samples per bob period
    assert tuple(5**k for k in range(len(STRIDES))) == STRIDES
    # The top level spans about 2.5 swing periods.
    assert max(STRIDES) * BASE_STEP / swing == pytest.approx(2.5, rel=0.02)


def test_horizons_spacing_and_hybrid_cut_are_consistent():
    assert HORIZON == TABLE_HORIZONS[-1] == max(TABLE_HORIZONS)
    assert list(TABLE_HORIZONS) == sorted(TABLE_HORIZONS)
    assert HYBRID_BELOW in STRIDES and pytest.approx(1.0) == HYBRID_BELOW * BASE_STEP
    assert abs(CURVE_SPACING / BASE_STEP - round(CURVE_SPACING / BASE_STEP)) < 1e-9
    # "Deliberately off the coarse grids": no table horizon is a whole number of top steps.
    for horizon in TABLE_HORIZONS:
        assert round(horizon / BASE_STEP) % max(STRIDES) != 0
    assert min(FULL.held_out_states, QUICK.held_out_states) >= CHECK_STATES


def test_the_shipped_bundle_path_is_the_one_of_the_package():
    assert demo_bundle(must_exist=False) == SHIPPED_BUNDLE
