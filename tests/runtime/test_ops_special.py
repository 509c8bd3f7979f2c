"""Accuracy of our NumPy erf/erfc and of the ops built on them (Erf, exact Gelu).

References: CPython's math.erf/math.erfc (the platform libm, < 1 ulp in glibc), SciPy's
special.ndtr for the normal CDF, and the published Gelu formulas (Hendrycks & Gimpel, 2016).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special as scipy_special

from stridecast.runtime.ops import resolve
from stridecast.runtime.ops.special import erf, erfc

RNG = np.random.default_rng(20250109)

# fdlibm's interval boundaries, each with its neighbours, where a piecewise method can slip.
BOUNDARIES = np.array([0.25, 0.84375, 1.25, 1 / 0.35, 6.0, 28.0])
EDGES = np.concatenate([np.nextafter(BOUNDARIES, 0), BOUNDARIES, np.nextafter(BOUNDARIES, 99)])


def _points(high: float) -> np.ndarray:
    positive = np.concatenate([
        RNG.uniform(0, high, 20_000),
        np.geomspace(1e-300, 1e-3, 200),  # tiny arguments, where erf(x) ≈ 2x/√π
        EDGES[high > EDGES],
    ])
    return np.concatenate([positive, -positive])


def _ulps(ours: np.ndarray, reference: np.ndarray) -> np.ndarray:
    # Distance in units of the reference's last place (spacing of subnormals at the bottom).
    return np.abs(ours - reference) / np.spacing(np.abs(reference))


def test_erf_within_one_ulp_of_math_erf():
    # Reference: math.erf (libm). fdlibm, whose method we vectorise, claims < 1 ulp; so does
    # glibc, so results may differ by 1 ulp where the two round a near-tie differently.
    x = _points(7.0)
    reference = np.array([math.erf(value) for value in x])
    assert _ulps(erf(x), reference).max() <= 1


def test_erfc_within_four_ulps_of_math_erfc():
    # Reference: math.erfc (libm). Our tail multiplies two NumPy exps, each within ~1 ulp,
    # so a few ulp (≈ 1e-15 relative) is the expected accuracy; measured max is 4.
    x = _points(26.0)  # erfc(26) ≈ 6e-296: still a normal float, so ulps are meaningful
    reference = np.array([math.erfc(value) for value in x])
    assert _ulps(erfc(x), reference).max() <= 4


def test_special_values():
    # Limits of erf and erfc (their definitions), and the sign of zero (erf is odd).
    x = np.array([np.inf, -np.inf, np.nan, 0.0, -0.0, 30.0, -30.0])
    np.testing.assert_array_equal(erf(x), [1, -1, np.nan, 0, 0, 1, -1])
    assert np.signbit(erf(x)[4])
    np.testing.assert_array_equal(erfc(x), [0, 2, np.nan, 1, 1, 0, 2])


def test_erf_keeps_shape_and_handles_many_blocks():
    # More elements than one evaluation block, in an odd shape; reference: math.erf.
    x = RNG.uniform(-4, 4, (3, 70_001))
    ours = erf(x)
    assert ours.shape == x.shape
    sample = RNG.choice(x.size, 2_000, replace=False)
    reference = np.array([math.erf(value) for value in x.reshape(-1)[sample]])
    assert _ulps(ours.reshape(-1)[sample], reference).max() <= 1


@pytest.mark.parametrize("opset", [9, 13])
def test_erf_op_float32_is_within_one_ulp_of_the_correctly_rounded_value(opset):
    # Reference: math.erf in float64 rounded once to float32 (≤ 0.5 ulp); our float64 result
    # is rounded once too, so the two differ by at most one float32 ulp.
    x = RNG.uniform(-5, 5, 20_000).astype(np.float32)
    ours = resolve("Erf", opset)(x)
    assert ours.dtype == np.float32
    reference = np.array([math.erf(value) for value in x.astype(np.float64)]).astype(np.float32)
    assert _ulps(ours.astype(np.float64), reference.astype(np.float64)).max() <= 1


def test_erf_op_float64():
    # Reference: math.erf; onnxruntime has no float64 Erf kernel.
    x = RNG.uniform(-6, 6, 5_000)
    reference = np.array([math.erf(value) for value in x])
    assert _ulps(resolve("Erf", 13)(x), reference).max() <= 1


def test_exact_gelu_float64_matches_scipy():
    # Reference: x·Φ(x) with Φ = scipy.special.ndtr, which is accurate in the lower tail;
    # our erfc form stays accurate there too, where 1 + erf would lose everything. Φ's
    # relative condition number is ≈ x² for x ≪ 0, so rounding x/√2 alone may cost ~x² ulp:
    # up to 900 ulp (2e-13) at x = −30, ~100 ulp at x = −10; for |x| ≤ 3 under ten ulp.
    x = np.concatenate([RNG.uniform(-10, 10, 5_000), [-30.0, -0.0, 0.0, 30.0]])
    ours = resolve("Gelu", 20)(x)
    np.testing.assert_allclose(ours, x * scipy_special.ndtr(x), rtol=2e-13, atol=0)
    central = np.abs(x) <= 3
    np.testing.assert_allclose(ours[central], x[central] * scipy_special.ndtr(x[central]),
                               rtol=2e-15, atol=0)


def test_tanh_gelu_float64_matches_the_formula():
    # Reference: the published approximation 0.5·x·(1 + tanh(√(2/π)(x + 0.044715x³))) in
    # float64. Its 1 + tanh cancels for negative x (absolute error ~1e-16·|x|), hence atol.
    x = RNG.uniform(-10, 10, 5_000)
    formula = 0.5 * x * (1 + np.tanh(math.sqrt(2 / math.pi) * (x + 0.044715 * x**3)))
    ours = resolve("Gelu", 20)(x, approximate="tanh")
    np.testing.assert_allclose(ours, formula, rtol=1e-14, atol=1e-15)
