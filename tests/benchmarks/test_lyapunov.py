"""Benettin/QR Lyapunov exponents against exact and published values."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("scipy")

from stridecast.benchmarks.lyapunov import lyapunov_exponents
from stridecast.benchmarks.systems import PublishedSystem, lorenz63


def test_linear_system_exponents_are_the_real_parts_of_the_eigenvalues():
    # For x' = A x every exponent is the real part of an eigenvalue of A (linear ODE theory).
    # A damped oscillator with ω = 2, damping rate 0.1: eigenvalues -0.1 ± 2i (both -0.1), and
    # a decoupled third component decaying at rate 0.5.
    matrix = np.array([[-0.1, 2.0, 0.0], [-2.0, -0.1, 0.0], [0.0, 0.0, -0.5]])
    linear = PublishedSystem(
        name="linear", source="test", parameters={}, vector_field=lambda s: s @ matrix.T,
        initial_state=(1.0, 0.0, 1.0), transient=0.0, base_step=0.1, strides=(1,),
        state_names=("a", "b", "c"))
    exponents = lyapunov_exponents(linear, count=3, duration=800.0, renormalise=8.0)
    # The finite-time averages carry an O(1/duration) bias from the initial frame.
    np.testing.assert_allclose(exponents, [-0.1, -0.1, -0.5], atol=0.01)
    # Their sum is exactly the trace, -0.7, at any duration (Liouville's formula).
    assert exponents.sum() == pytest.approx(-0.7, abs=1e-6)


def test_lorenz63_spectrum():
    exponents = lyapunov_exponents(lorenz63(), count=3, duration=150.0, renormalise=1.0)
    # Sprott (2003), Chaos and Time-Series Analysis, Appendix A: 0.9056, 0, -14.5723
    # (quoted from memory); a finite average over 150 time units scatters by a few hundredths.
    np.testing.assert_allclose(exponents, [0.9056, 0.0, -14.5723], atol=0.08)
    # The sum is the time average of the Jacobian's trace, constant -(σ + 1 + β) for Lorenz
    # (Liouville's formula), so it holds to the integration accuracy.
    assert exponents.sum() == pytest.approx(-(10.0 + 1.0 + 8.0 / 3.0), abs=1e-3)
